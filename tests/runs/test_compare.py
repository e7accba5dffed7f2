"""compare: changes are signed (a fall reads as a fall), and the gates take their size."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pandas as pd

from reportgen.inputs.files import sha256_file
from reportgen.inputs.spec import GatesSection
from reportgen.runs.compare import compare_runs
from reportgen.runs.integrity import checksum_list, run_files


def _refreshed(run: Path, to: Path, eigenvalue_factor: float, error_factor: float) -> Path:
    """A copy of ``run`` whose first eigenvalue and error variance are scaled, with its
    record and checksum list kept consistent (what a refresh of the data could give)."""
    shutil.copytree(run, to)
    table = to / "tables" / "components.csv"
    components = pd.read_csv(table)
    components.loc[0, "eigenvalue"] *= eigenvalue_factor
    components.to_csv(table, index=False)
    record = json.loads((to / "record.json").read_text())
    record["spec"]["settings"]["error_variance"] *= error_factor
    record["outputs"]["tables/components.csv"] = sha256_file(table)
    (to / "record.json").write_text(json.dumps(record, indent=2) + "\n")
    names = [n for n in run_files(to) if n != "SHA256SUMS"]
    (to / "SHA256SUMS").write_bytes(checksum_list({n: sha256_file(to / n) for n in names}))
    return to


def test_a_fall_is_signed_and_gated_by_its_size(
    regenerated: dict[str, Path], tmp_path: Path
) -> None:
    # arithmetic on known changes (common practice, no source): 9661 -> 5452 is -43.6%
    run = regenerated["clinic_visits"]
    gates = GatesSection(max_eigenvalue_change=0.4, max_error_variance_change=0.1)
    lower = _refreshed(run, tmp_path / "lower", 0.564, 0.9366)
    found = {f.item: f for f in compare_runs(run, lower, gates)}
    assert "(-43.6%)" in found["eigenvalue 1"].b and found["eigenvalue 1"].crossed
    assert "(-6.3%)" in found["error variance"].b and not found["error variance"].crossed
    higher = _refreshed(run, tmp_path / "higher", 1.2, 1.6)
    found = {f.item: f for f in compare_runs(run, higher, gates)}
    assert "(+20.0%)" in found["eigenvalue 1"].b and not found["eigenvalue 1"].crossed
    assert "(+60.0%)" in found["error variance"].b and found["error variance"].crossed
