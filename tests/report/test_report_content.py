"""The report: sections, figures, alt text, escaping, no network references, PDF/A."""

from __future__ import annotations

import io
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pypdf
import pytest

from reportgen.inputs.spec import load_spec
from reportgen.runs.writer import build_outputs

from .conftest import ROOT

pytestmark = pytest.mark.render

SECTIONS = [
    "summary",
    "checks",
    "mean",
    "covariance",
    "components",
    "scores",
    "trajectories",
    "residuals",
    "sensitivity",
    "caveats",
    "reproducibility",
]
FIGURES = 15


class _Collector(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.sections: list[str] = []
        self.figures = 0
        self.images: list[str | None] = []
        self.th = 0
        self.captions = 0

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = dict(attrs)
        if tag == "section":
            self.sections.append(a.get("id") or "")
        elif tag == "figure":
            self.figures += 1
        elif a.get("role") == "img":
            self.images.append(a.get("aria-label"))
        elif tag == "th":
            self.th += 1
        elif tag in ("caption", "figcaption"):
            self.captions += 1


@pytest.mark.parametrize("example", ["clinic_visits", "pump_service"])
def test_sections_figures_alt_text(regenerated: dict[str, Path], example: str) -> None:
    html = (regenerated[example] / "report.html").read_text("utf-8")
    c = _Collector()
    c.feed(html)
    # all present, in the order of the brief; the pump example compares its depots and is
    # in the submission style, which ends with a sign-off block
    grouped = example == "pump_service"
    expected = [*SECTIONS[:6], "groups", *SECTIONS[6:], "signoff"] if grouped else SECTIONS
    n_figures = FIGURES + 2 * grouped
    assert c.sections == expected
    assert c.figures == n_figures and len(c.images) == n_figures
    assert all(label and len(label) > 20 for label in c.images)  # alt text on every figure
    assert c.th > 20 and c.captions >= n_figures + 7
    prefix = "14.2." if grouped else ""  # the pump spec numbers in the study's scheme
    for n in range(1, n_figures + 1):
        assert f"Figure {prefix}{n}." in html
    assert re.search(r"https?:", html) is None  # no network reference at all
    for caution in (
        "not for decisions about an individual",
        "statistical analysis plan take precedence",
        "under the model&#39;s assumptions",
    ):
        assert caution in html
    assert "<script" not in html
    # a printed appendix shows the run's date and the tool's version on its first page,
    # before the first section (every shipped style)
    first = html.index("<section")
    assert -1 < html.find("Run started") < first
    assert -1 < html.find("reportgen 0.") < first


def test_text_from_the_spec_is_escaped(tmp_path: Path) -> None:
    spec_text = (ROOT / "specs" / "clinic_visits.yaml").read_text()
    spec_text = spec_text.replace(
        'title: "Marker trajectories after enrolment (fictional cohort)"',
        'title: "<script>alert(1)</script> & <b>bold</b>"',
    ).replace('authors: ["Example Analyst"]', 'authors: ["<img src=x onerror=alert(2)>"]')
    (tmp_path / "s.yaml").write_text(spec_text)
    (tmp_path / "clinic_visits.csv").write_bytes(
        (ROOT / "specs" / "clinic_visits.csv").read_bytes()
    )
    built = build_outputs(load_spec(tmp_path / "s.yaml"), 1, "2026-01-01T00:00:00Z")
    html = built.files["report.html"].decode()
    assert "<script" not in html and "<img" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt; &amp; &lt;b&gt;bold&lt;/b&gt;" in html


@pytest.mark.parametrize("example", ["clinic_visits", "pump_service"])
def test_pdf_is_pdfa_with_attachments(regenerated: dict[str, Path], example: str) -> None:
    run = regenerated[example]
    reader = pypdf.PdfReader(io.BytesIO((run / "report.pdf").read_bytes()))
    # Reference: pypdf, a general-purpose PDF reader. PDF/A declares itself in the XMP
    # metadata with pdfaid:part and pdfaid:conformance (ISO 19005; from memory).
    xmp = reader.trailer["/Root"]["/Metadata"].get_object().get_data().decode()
    assert re.search(r'pdfaid:part(="|>)3', xmp), xmp[:500]
    assert re.search(r'pdfaid:conformance(="|>)B', xmp)
    attached = {name: data[0] for name, data in reader.attachments.items()}
    assert attached["spec.yaml"] == (run / "spec.yaml").read_bytes()
    assert attached["record.json"] == (run / "record.json").read_bytes()
    assert 6 <= len(reader.pages) <= 20
    first = reader.pages[0].extract_text()
    if example == "pump_service":  # submission style: a title page, then the contents
        assert "Study FLT-2026-07 (fictional)" in first and "Prepared by" in first
        first = reader.pages[1].extract_text()
    assert "Summary" in first and "Contents" in first


@pytest.mark.parametrize("example", ["clinic_visits", "pump_service"])
def test_the_eigenfunctions_used_are_named_with_their_evidence(
    regenerated: dict[str, Path], example: str
) -> None:
    # The generated words against the run's own table (no outside reference: the sentence
    # must quote tables/eigenfunction_source.csv and name the set the model table holds).
    run = regenerated[example]
    html = (run / "report.html").read_text("utf-8")
    src = pd.read_csv(run / "tables" / "eigenfunction_source.csv").iloc[0]
    ef = pd.read_csv(run / "tables" / "eigenfunctions.csv")
    if src.used == "likelihood":
        assert "The eigenfunctions are refined by maximising the marginal Gaussian" in html
        assert "dashed: the smoothing estimates, not used" in html
        assert "smoothing_phi_1" in ef.columns
    else:
        assert "The eigenfunctions are those of the smoothed covariance surface" in html
        assert "dashed: the likelihood estimates, not used" in html
        assert "likelihood_phi_1" in ef.columns
    assert (
        f"{src.held_out_loglik_likelihood:.4f} refined against "
        f"{src.held_out_loglik_smoothing:.4f} from the surface" in html
    )
    model = pd.read_csv(run / "tables" / "model.csv")
    phi = model[model.quantity == "eigenfunction"]
    first = phi[phi.component == 1].value.to_numpy()
    assert np.allclose(first, ef.phi_1.to_numpy(), rtol=1e-9, atol=1e-12)
