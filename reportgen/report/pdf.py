"""The report page as PDF/A-3b (weasyprint), with the spec and the record attached; offline:
the renderer may fetch nothing but the ``data:`` images the figures embed."""

from __future__ import annotations

import base64
import contextlib
import os
import re
import warnings
from collections.abc import Iterator
from datetime import UTC, datetime
from typing import Any


def _offline_fetcher() -> Any:
    """A weasyprint URL fetcher that refuses every URL except inline ``data:`` ones.

    The HTML is self-contained (inline CSS and SVG; raster parts of figures are ``data:``
    URIs that the renderer itself wrote); a spec or data value that looks like a URL or a
    path must never make the renderer read a file or open a connection. Refused URLs are
    kept in ``.refused``.
    """
    import weasyprint

    class OfflineFetcher(weasyprint.URLFetcher):
        def __init__(self) -> None:
            super().__init__(allowed_protocols={"data"}, fail_on_errors=False)
            self.refused: list[str] = []

        def fetch(self, url: str, headers: Any = None) -> Any:
            if not url.startswith("data:"):
                self.refused.append(url)
                raise ValueError(f"reportgen renders offline; refused to fetch {url!r}")
            return super().fetch(url, headers)

    return OfflineFetcher()


@contextlib.contextmanager
def _source_date(when: datetime) -> Iterator[None]:
    """Set SOURCE_DATE_EPOCH to ``when`` while the PDF is written, then restore it.

    Without the HarfBuzz-subset library weasyprint subsets fonts with fontTools, which
    stamps each subset font with the current time unless SOURCE_DATE_EPOCH is set
    (reproducible-builds.org convention). The run's one clock is the recorded finish time.
    """
    key = "SOURCE_DATE_EPOCH"
    before = os.environ.get(key)
    os.environ[key] = str(int(when.replace(tzinfo=UTC).timestamp()))
    try:
        yield
    finally:
        if before is None:
            del os.environ[key]
        else:
            os.environ[key] = before


def _figures_as_images(html: str) -> str:
    """The report's inline SVG figures as ``<img>`` elements with ``data:`` URIs, sized as
    the SVG says.

    The PDF comes out byte-identical (tests/report/test_pdf_figures.py), but the renderer
    then parses each figure as SVG only, instead of also as HTML elements that the page's
    CSS cascade visits.
    """

    def image(match: re.Match[str]) -> str:
        svg = match.group(0).replace("<svg ", '<svg xmlns="http://www.w3.org/2000/svg" ', 1)
        head = svg[: svg.index(">")]
        size = ";".join(f"{k}:{v}" for k, v in re.findall(r'\b(width|height)="([^"]+)"', head))
        data = base64.b64encode(svg.encode("utf-8")).decode("ascii")
        return f'<img alt="" style="{size}" src="data:image/svg+xml;base64,{data}">'

    return re.sub(r"<svg .*?</svg>", image, html, flags=re.S)


def render_pdf(html: bytes, spec_bytes: bytes, record_bytes: bytes, stamp: str) -> bytes:
    """PDF/A-3b from the report HTML with spec.yaml and record.json attached.

    PDF/A-3 is the archival variant that allows embedded files. The result is a pure
    function of its inputs (the attachments' dates are ``stamp``, the run's finish time in
    UTC as ``YYYY-MM-DDTHH:MM:SSZ``; fixed identifier), so ``verify`` can re-render it and
    compare bytes.
    """
    return render_pdf_with(
        html,
        [
            ("spec.yaml", spec_bytes, "The spec of this run, as given"),
            ("record.json", record_bytes, "The hashed record of this run"),
        ],
        stamp,
    )


def render_pdf_with(html: bytes, files: list[tuple[str, bytes, str]], stamp: str) -> bytes:
    """PDF/A-3b from a page with ``files`` (name, bytes, description) attached; a pure
    function of its inputs (``render_pdf``)."""
    import logging

    import weasyprint

    logging.getLogger("weasyprint").setLevel(logging.ERROR)
    fetcher = _offline_fetcher()
    when = datetime.strptime(stamp, "%Y-%m-%dT%H:%M:%SZ")
    attachments = [
        weasyprint.Attachment(
            string=data,
            name=name,
            description=description,
            url_fetcher=fetcher,
            created=when,
            modified=when,
        )
        for name, data, description in files
    ]
    document = weasyprint.HTML(
        string=_figures_as_images(html.decode("utf-8")), base_url=None, url_fetcher=fetcher
    )
    with warnings.catch_warnings(), _source_date(when):
        # weasyprint 70 opens its bundled sRGB profile (PDF/A output intent) without closing
        # it; the file is dropped, with its warning, before write_pdf returns.
        warnings.filterwarnings(
            "ignore", message=r"unclosed file .*sRGB2014\.icc", category=ResourceWarning
        )
        pdf = document.write_pdf(
            pdf_variant="pdf/a-3b",
            attachments=attachments,
            pdf_identifier=b"reportgen",
            uncompressed_pdf=False,
        )
    return bytes(pdf)
