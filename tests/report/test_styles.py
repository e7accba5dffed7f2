"""House styles and the spec's own templates: what each shipped style prints, the sections
the spec picks, and templates that try to escape the sandbox.

PDF text is read back with pypdf; page images with poppler's pdftoppm where installed.
The rules for hostile templates are Jinja2's sandbox (its documentation: "Sandbox") plus
limits of our own; "Table 14.2.1"-style numbering is common practice for the tables of
clinical study reports (no source).
"""

from __future__ import annotations

import io
import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest

from reportgen.cli import main
from reportgen.errors import SpecError, TemplateError
from reportgen.inputs.spec import load_spec
from reportgen.report import sandbox

from .conftest import EXAMPLES, ROOT, STYLES

pytestmark = pytest.mark.render


def _pdf_text(pdf: bytes) -> list[str]:
    from pypdf import PdfReader

    reader = PdfReader(io.BytesIO(pdf))
    # PDF/A declares itself in the XMP metadata (ISO 19005; from memory)
    xmp = reader.trailer["/Root"]["/Metadata"].get_object().get_data().decode()
    assert re.search(r'pdfaid:part(="|>)3', xmp), xmp[:300]
    return [page.extract_text() for page in reader.pages]


@pytest.mark.parametrize("example", EXAMPLES)
@pytest.mark.parametrize("style", STYLES)
def test_every_style_prints_header_footer_numbering_and_sections(
    styled: dict[tuple[str, str], tuple[bytes, bytes]], example: str, style: str
) -> None:
    html, pdf = styled[(example, style)]
    text = html.decode("utf-8")
    pages = _pdf_text(pdf)
    # running header (study id and the run) and footer on every page but a title page
    body = pages[1:] if style == "submission" else pages
    assert all("Study XY-123 (fictional)" in p for p in body), style
    assert all("Confidential: test only" in p for p in pages)
    assert all(f"page {i + 1} of {len(pages)}" in p for i, p in enumerate(pages))
    for kind in ("Table", "Figure"):
        label = f"Supplementary {kind} S14.2." if style == "journal" else f"{kind} 14.2."
        assert f"{label}1." in text and f"{label}2." in text
    for section in ("summary", "checks", "caveats", "reproducibility"):
        assert f'id="{section}"' in text
    assert ("Contents" in text) == (style != "journal")
    assert ("Sign-off" in text) == (style == "submission")
    if style == "submission":
        assert "Prepared by" in pages[0] and "Reviewed by" in pages[-1]
    for caution in (
        "not for decisions about an individual",
        "statistical analysis plan take precedence",
    ):
        assert caution in text


@pytest.mark.skipif(shutil.which("pdftoppm") is None, reason="poppler (pdftoppm) is not installed")
def test_the_submission_title_page_is_a_page_of_its_own(
    styled: dict[tuple[str, str], tuple[bytes, bytes]], tmp_path: Path
) -> None:
    from PIL import Image

    _, pdf = styled[("clinic_visits", "submission")]
    (tmp_path / "r.pdf").write_bytes(pdf)
    subprocess.run(
        [
            "pdftoppm",
            "-f",
            "1",
            "-l",
            "2",
            "-r",
            "30",
            "-gray",
            "-png",
            str(tmp_path / "r.pdf"),
            str(tmp_path / "p"),
        ],
        check=True,
        timeout=120,
    )
    import numpy as np

    def load(path: Path) -> np.ndarray:
        with Image.open(path) as img:
            return np.asarray(img.convert("L"))

    first, second = (load(p) for p in sorted(tmp_path.glob("p-*.png")))

    def ink(img: np.ndarray, top: float, bottom: float) -> float:
        h = img.shape[0]
        return float(np.mean(img[int(top * h) : int(bottom * h)] < 128))

    # title page: the upper third is empty (the title sits lower); page 2 starts at once
    assert ink(first, 0.08, 0.22) < 0.001 < ink(second, 0.08, 0.22)


def _study(tmp_path: Path, report_extra: str = "", files: dict[str, str] | None = None) -> Path:
    shutil.copy(ROOT / "specs" / "clinic_visits.csv", tmp_path / "clinic_visits.csv")
    text = (ROOT / "specs" / "clinic_visits.yaml").read_text()
    text = text.replace("report:\n", f"report:\n{report_extra}", 1)
    for name, content in (files or {}).items():
        (tmp_path / name).write_text(content)
    (tmp_path / "s.yaml").write_text(text)
    return tmp_path / "s.yaml"


def test_a_template_of_ones_own_extends_the_default_by_blocks(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # the README's worked example
    template = (
        '{% extends "default" %}\n'
        "{% block heading %}<header><h1>{{ title }}</h1>"
        '<p class="sponsor">Prepared for the steering committee</p></header>'
        "{% endblock %}\n"
        "{% block end %}<p>End of appendix {{ report_id }}.</p>{% endblock %}\n"
    )
    spec = _study(
        tmp_path,
        "  template: committee.html.j2\n  stylesheet: extra.css\n"
        "  sections: [summary, mean, caveats, reproducibility]\n",
        {"committee.html.j2": template, "extra.css": ".sponsor { color: #225; }\n"},
    )
    assert main(["run", str(spec), "--out", str(tmp_path / "runs"), "--quiet"]) == 0
    run = tmp_path / "runs" / "clinic-visits" / "v001"
    html = (run / "report.html").read_text("utf-8")
    assert "Prepared for the steering committee" in html and "End of appendix" in html
    assert ".sponsor { color: #225; }" in html
    sections = [line.split('"')[1] for line in html.splitlines() if line.startswith("<section id=")]
    assert sections == ["summary", "mean", "caveats", "reproducibility"]
    record = (run / "record.json").read_text()
    assert '"role": "template"' in record and '"role": "stylesheet"' in record
    # a changed template makes verify fail, naming it
    (tmp_path / "committee.html.j2").write_text(template + "<!-- edited -->\n")
    assert main(["verify", str(run), "--quiet"]) == 1
    out = capsys.readouterr().out
    assert "CHANGED: input files differ from those the run used (committee.html.j2)" in out


def test_caveats_and_reproducibility_cannot_be_left_out(tmp_path: Path) -> None:
    spec = _study(tmp_path, "  sections: [summary, mean, reproducibility]\n")
    with pytest.raises(SpecError, match=r"report\.sections must keep caveats"):
        load_spec(spec)


@pytest.mark.parametrize(
    ("field", "name", "content", "message"),
    [
        ("logo", "logo.png", "not an image", "must be a PNG or SVG file"),
        (
            "stylesheet",
            "x.css",
            "body { background: url(http://example.org/x.png) }",
            "refers to other files or URLs",
        ),
        ("stylesheet", "y.css", "@import 'other.css';", "refers to other files or URLs"),
        (
            "stylesheet",
            "e.css",
            "p { background: \\75 rl(http://example.org/x.png) }",
            "refers to other files or URLs",
        ),
        ("stylesheet", "i.css", "@\\69mport 'other.css';", "refers to other files or URLs"),
        ("stylesheet", "z.css", "</style><p>injected</p>", "contains '<'"),
        ("template", "missing.j2", None, "does not exist"),
    ],
)
def test_bad_style_files_are_refused_before_anything_is_written(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    field: str,
    name: str,
    content: str | None,
    message: str,
) -> None:
    spec = _study(tmp_path, f"  {field}: {name}\n", {name: content} if content else {})
    assert main(["run", str(spec), "--out", str(tmp_path / "runs"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert f"report.{field} '{name}'" in err and message in err, err
    assert not any((tmp_path / "runs").rglob("v0*"))


HOSTILE = {
    "internals": (
        "{{ ''.__class__.__mro__[1].__subclasses__() }}",
        "did something a sandboxed template may not",
    ),
    "globals": (
        "{{ self._TemplateReference__context }}",
        "did something a sandboxed template may not",
    ),
    "include": ('{% include "/etc/passwd" %}', "refers to '/etc/passwd', which is neither"),
    "loop": (
        "{% for i in range(100000) %}{% for j in range(100000) %}{% endfor %}{% endfor %}",
        "did not finish within 3 s",
    ),
    "huge": ("{% for i in range(100000) %}{{ 'x' * 2000 }}{% endfor %}", "output passed"),
    "repeat": ("{{ 'x' * 10000000000 }}", "may not build values longer than"),
    "fetch": ('<img src="http://example.org/track.png">', "refers to something outside"),
    "script": ("<script>alert(1)</script>", "contains active content"),
    "handler": ('<p onclick="x()">hi</p>', "contains active content"),
    # each of these passed the earlier check by regular expression (a '>' inside a quoted
    # attribute ended the match early, or a character reference hid the scheme); the
    # parser sees them
    "quoted handler": (
        '<p title=">" onmouseover="alert(1)">hi</p>',
        "contains active content (an event handler, onmouseover)",
    ),
    "quoted script link": (
        '<a title=">" href="javascript:alert(1)">x</a>',
        "refers to something outside itself",
    ),
    "quoted image": (
        '<img alt=">" src="http://example.org/x.png">',
        "refers to something outside itself",
    ),
    "referenced scheme": (
        '<a href="&#106;avascript:alert(1)">x</a>',
        "refers to something outside itself",
    ),
    "refresh": (
        '<meta http-equiv="refresh" content="0; url=http://example.org/">',
        "<meta http-equiv> is not allowed",
    ),
    "svg animate": (
        '<svg><a><animate attributeName="href" to="javascript:alert(1)"/></a></svg>',
        "element a report may not hold: <animate>",
    ),
    "svg set": (
        '<svg><set attributeName="href" to="javascript:alert(1)"/></svg>',
        "element a report may not hold: <set>",
    ),
    "escaped url": (
        "<style>p { background: \\75 rl(http://example.org/x.png) }</style>",
        "refers outside the page: url(http://example.org/x.png)",
    ),
    "escaped import": ("<style>@\\69mport 'x.css';</style>", "refers to other files (@import)"),
    "image set": (
        "<p style=\"background-image: image-set('x.png' 1x)\">x</p>",
        "refers outside the page: image-set(x.png)",
    ),
    "local font": (
        '<style>@font-face { src: \\75 rl("file:///etc/hostname") }</style>',
        "refers outside the page: url(file:///etc/hostname)",
    ),
}


def test_a_page_without_the_content_security_policy_is_refused() -> None:
    # the CSP makes a browser refuse whatever a check might miss; every page carries it
    from reportgen.report.markup import CSP, UnsafeMarkup, check_page

    page = '<html><head><meta charset="utf-8">{}</head><body><p>x</p></body></html>'
    check_page(page.format(f'<meta http-equiv="Content-Security-Policy" content="{CSP}">'))
    with pytest.raises(UnsafeMarkup, match="must carry the report's Content-Security-Policy"):
        check_page(page.format(""))
    assert f'content="{CSP}"' in (ROOT / "templates" / "default" / "report.html.j2").read_text()


@pytest.mark.parametrize("case", sorted(HOSTILE))
def test_hostile_templates_are_refused_with_a_message(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, analysed: dict[str, Any], case: str
) -> None:
    # Rendered as a run renders them (render_html: the sandboxed child process), from the
    # session's analysis of the example.
    from dataclasses import replace

    from reportgen.report.html import render_html
    from reportgen.report.styles import load_style

    from .conftest import RECORD_VIEW

    monkeypatch.setattr(sandbox, "TEMPLATE_SECONDS", 3.0)
    monkeypatch.setattr(sandbox, "MAX_OUTPUT_BYTES", 50 * 2**20)
    body, message = HOSTILE[case]
    spec = load_spec(
        _study(
            tmp_path,
            "  template: evil.j2\n",
            {"evil.j2": '{% extends "default" %}{% block end %}' + body + "{% endblock %}"},
        )
    )
    result, figures = analysed["clinic_visits"]
    with pytest.raises(TemplateError) as refused:
        render_html(replace(result, spec=spec), 1, RECORD_VIEW, figures, load_style(spec))
    assert "report.template 'evil.j2'" in str(refused.value)
    assert message in str(refused.value), refused.value


def test_a_hostile_template_stops_the_run_and_leaves_no_run(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The whole command: the refusal is exit 2 with the message, and no version is left.
    body, message = HOSTILE["script"]
    spec = _study(
        tmp_path,
        "  template: evil.j2\n",
        {"evil.j2": '{% extends "default" %}{% block end %}' + body + "{% endblock %}"},
    )
    assert main(["run", str(spec), "--out", str(tmp_path / "runs"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "report.template 'evil.j2'" in err and message in err, err
    runs = tmp_path / "runs" / "clinic-visits"
    assert not runs.exists() or list(runs.iterdir()) == []
