"""The PDF gets the figures as SVG images (faster to render): the same PDF as inline SVG."""

from __future__ import annotations

from pathlib import Path

import pytest

import reportgen.report.pdf
from reportgen.report.pdf import render_pdf

pytestmark = pytest.mark.render

ROOT = Path(__file__).resolve().parents[2]


@pytest.mark.parametrize("report", ["clinic-visits", "pump-service"])
def test_figures_as_images_leave_the_pdf_unchanged(
    report: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Reference: weasyprint rendering the same HTML with the SVG figures inline.
    html = (ROOT / "sample_runs" / report / "v001" / "report.html").read_bytes()
    assert html.count(b"<svg ") >= 10
    args = (b"spec", b"{}", "2026-12-01T00:00:00Z")
    as_images = render_pdf(html, *args)
    monkeypatch.setattr(reportgen.report.pdf, "_figures_as_images", lambda text: text)
    inline = render_pdf(html, *args)
    assert as_images == inline
