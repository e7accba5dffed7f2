"""The change report of a refreshed study: the second example cut earlier (a fifth of its
pumps added by the refresh, three removed, one reading corrected) against the refreshed
run; its findings, subjects, page, PDF and checksums; and the uncertainty of a difference
between runs that share subjects."""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from reportgen.cli import main
from reportgen.inputs.files import sha256_file
from reportgen.inputs.spec import GatesSection
from reportgen.runs.compare import BEYOND, WITHIN, Overlap, compare
from reportgen.runs.integrity import parse_checksum_list
from reportgen.runs.writer import run_spec
from tests.helpers import ROOT

pytestmark = pytest.mark.slow
ODD_ID = '0<b>"new"&'  # an added subject (listed first) whose id the page must escape


# each shipped example: its spec, data, subject and value columns
EXAMPLES = {
    "clinic_visits": ("clinic_visits.yaml", "clinic_visits.csv", "patient", "marker"),
    "pump_service": ("pump_service.yaml", "pump_service.csv", "pump", "vibration"),
}


@pytest.fixture(scope="module", params=sorted(EXAMPLES))
def refreshed(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> tuple[Path, Path, dict[str, object]]:
    """(earlier run, refreshed run, what the refresh did) of each shipped example."""
    spec, file, subject, value = EXAMPLES[request.param]
    base = tmp_path_factory.mktemp("refresh")
    for name in (spec, "fleet_logo.svg"):
        shutil.copy(ROOT / "specs" / name, base / name)
    data = pd.read_csv(ROOT / "specs" / file, dtype={subject: str})
    ids = data[subject].unique()
    rng = np.random.default_rng(4)
    later = set(rng.choice(ids, size=len(ids) // 5, replace=False).tolist())
    earlier = data[~data[subject].isin(later)]
    removed = sorted(earlier[subject].unique()[:3].tolist())
    newer = data[~data[subject].isin(removed)].copy()
    renamed = sorted(later)[0]
    newer.loc[newer[subject] == renamed, subject] = ODD_ID
    changed_at = newer.index[newer[subject].isin(earlier[subject].unique())][5]
    newer.loc[changed_at, value] *= 3  # one reading corrected
    earlier.to_csv(base / file, index=False)
    run_a = run_spec(base / spec, base / "runs")
    newer.to_csv(base / file, index=False)
    run_b = run_spec(base / spec, base / "runs")
    corrected = str(newer.loc[changed_at, subject])
    return (
        run_a,
        run_b,
        {
            "added": len(later),
            "removed": removed,
            "corrected": corrected,
            "example": request.param,
            "file": file,
        },
    )


def test_the_refresh_is_found_and_said(
    refreshed: tuple[Path, Path, dict[str, object]], capsys: pytest.CaptureFixture[str]
) -> None:
    # Reference: the refresh as built above (no outside source).
    run_a, run_b, did = refreshed
    found = compare(run_a, run_b, GatesSection())
    assert len(found.added) == did["added"] and list(found.removed) == did["removed"]
    assert ODD_ID in found.added
    assert list(found.inputs_changed) == [did["file"]]
    items = {f.item: f for f in found.findings}
    # every change with an uncertainty is set against it, in words
    for item in ("error variance", "largest mean change", "eigenvalue 1"):
        assert items[item].noise.startswith((WITHIN, BEYOND)), items[item]
    assert found.moved_beyond >= 1
    # a re-chosen mean bandwidth is named beside the mean's change
    h_a, h_b = float(items["mean_bandwidth"].a), float(items["mean_bandwidth"].b)
    named = "the mean's bandwidth changed" in items["largest mean change"].noise
    assert named == (abs(h_b - h_a) > 0.1 * h_a)
    if did["example"] == "pump_service":
        # the corrected reading moves its subject's trajectory: among the largest moves (in
        # the clinic example the refresh re-chooses the mean's bandwidth, 22 -> 42 weeks, and
        # every trajectory moves with the mean: compare says so, beyond the uncertainty)
        assert did["corrected"] in found.moves.subject.head(5).tolist()
    # --json: the findings for machines, the exit code as the text's
    code = main(["compare", str(run_a), str(run_b), "--json"])
    said = json.loads(capsys.readouterr().out)
    assert code == (1 if said["gates_crossed"] else 0)
    assert said["subjects"]["added"] == did["added"] and said["subjects"]["removed"] == 3
    assert {f["item"] for f in said["findings"]} == set(items)


def test_the_change_report_is_self_contained_archival_and_checksummed(
    refreshed: tuple[Path, Path, dict[str, object]], tmp_path: Path
) -> None:
    from pypdf import PdfReader

    from reportgen.report.markup import check_page

    run_a, run_b, _ = refreshed
    out = tmp_path / "change"
    assert main(["compare", str(run_a), str(run_b), "--out", str(out)]) in (0, 1)
    html = (out / "change.html").read_text("utf-8")
    check_page(html)  # nothing outside the page, the report's Content-Security-Policy
    assert ODD_ID not in html and "0&lt;b&gt;&#34;new&#34;&amp;" in html  # escaped
    for words in ("Runs compared", "Findings", "Subjects", "Inputs that changed", "Cautions"):
        assert words in html
    assert "not for decisions about an individual" in html.replace("Nothing here is", "not")
    # PDF/A declares itself in the XMP metadata (ISO 19005; from memory); read with pypdf
    reader = PdfReader(out / "change.pdf")
    xmp = reader.trailer["/Root"]["/Metadata"].get_object().get_data().decode()
    assert re.search(r'pdfaid:part(="|>)3', xmp), xmp[:300]
    assert re.search(r'pdfaid:conformance(="|>)B', xmp)
    attached = {name: data[0] for name, data in reader.attachments.items()}
    assert attached["change.json"] == (out / "change.json").read_bytes()
    # every file is in SHA256SUMS with its digest (the sha256sum format)
    listed, bad = parse_checksum_list((out / "SHA256SUMS").read_bytes())
    assert not bad
    files = sorted(
        str(p.relative_to(out)) for p in out.rglob("*") if p.is_file() and p.name != "SHA256SUMS"
    )
    assert sorted(listed) == files
    assert all(listed[name] == sha256_file(out / name) for name in files)
    # the same comparison written again gives the same bytes
    again = tmp_path / "again"
    main(["compare", str(run_a), str(run_b), "--out", str(again)])
    assert (again / "SHA256SUMS").read_bytes() == (out / "SHA256SUMS").read_bytes()
    # an existing folder is refused, and left as it was
    before = (out / "SHA256SUMS").read_bytes()
    assert main(["compare", str(run_a), str(run_b), "--out", str(out)]) == 2
    assert (out / "SHA256SUMS").read_bytes() == before


def test_the_change_report_loads_offline(
    refreshed: tuple[Path, Path, dict[str, object]], tmp_path: Path
) -> None:
    from tests.report.test_browser import CHROMIUM, _load

    if CHROMIUM is None:
        pytest.skip("chromium is not installed (.ci/run installs the Debian package)")
    run_a, run_b, _ = refreshed
    out = tmp_path / "change"
    main(["compare", str(run_a), str(run_b), "--out", str(out)])
    requests, log, shot = _load((out / "change.html").read_bytes(), tmp_path)
    assert shot.is_file() and shot.stat().st_size > 20_000, log[-2000:]
    assert len(requests) == 1, requests
    assert [line for line in log.splitlines() if ":CONSOLE(" in line] == []


@pytest.mark.parametrize(
    ("n_a", "n_b", "common"), [(400, 400, 400), (400, 500, 400), (300, 300, 0)]
)
def test_the_uncertainty_of_a_difference_counts_shared_subjects_once(
    n_a: int, n_b: int, common: int
) -> None:
    # Reference: numpy simulation of the means of two samples that share ``common``
    # subjects (the estimate as an average over subjects); Var(mean_A - mean_B) against
    # the formula from the two runs' own variances. Same subjects: no sampling difference.
    rng = np.random.default_rng(0)
    draws = 20_000
    pool = rng.normal(size=(draws, n_a + n_b - common))
    mean_a = pool[:, :n_a].mean(axis=1)
    mean_b = pool[:, n_a - common : n_a - common + n_b].mean(axis=1)
    measured = float(np.var(mean_a - mean_b))
    formula = float(Overlap(n_a, n_b, common).difference_variance(1.0 / n_a, 1.0 / n_b))
    assert formula == pytest.approx(measured, rel=0.05, abs=1e-12)
