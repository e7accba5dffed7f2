"""The committed sample runs regenerate: their tables as numbers on any machine (the rule
``verify`` applies), and byte for byte (HTML, tables and figures) in the environment that
made them (record.json: environment; the HTML names the platform, and another CPU can make
the BLAS libraries choose kernels that move the last digits).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from reportgen.runs.verify import environment_diff, tables_match

from .conftest import ROOT

pytestmark = pytest.mark.render

SAMPLES = ROOT / "sample_runs"
EXAMPLES = [("clinic_visits", "clinic-visits"), ("pump_service", "pump-service")]


@pytest.mark.parametrize(("example", "report_id"), EXAMPLES)
def test_sample_run_tables_reproduce_as_numbers(
    regenerated: dict[str, Path], example: str, report_id: str
) -> None:
    committed = SAMPLES / report_id / "v001"
    fresh = regenerated[example]
    names = sorted(p.name for p in (committed / "tables").iterdir())
    assert len(names) > 8 and sorted(p.name for p in (fresh / "tables").iterdir()) == names
    for name in names:
        ok, how = tables_match(
            (committed / "tables" / name).read_bytes(), (fresh / "tables" / name).read_bytes()
        )
        assert ok, f"{name}: {how}"


@pytest.mark.parametrize(("example", "report_id"), EXAMPLES)
def test_sample_run_regenerates_identically(
    regenerated: dict[str, Path], example: str, report_id: str
) -> None:
    committed = SAMPLES / report_id / "v001"
    differs = environment_diff(json.loads((committed / "record.json").read_text())["environment"])
    if differs:
        pytest.skip(
            "rendered bytes reproduce only in the environment that made the sample "
            f"run, and this one differs ({'; '.join(differs)}); the tables are "
            "compared as numbers above"
        )
    fresh = regenerated[example]
    assert fresh.name == "v001"
    names = [
        "report.html",
        *sorted(str(p.relative_to(committed)) for p in (committed / "tables").iterdir()),
        *sorted(str(p.relative_to(committed)) for p in (committed / "figures").iterdir()),
    ]
    assert len(names) > 15
    for name in names:
        assert (fresh / name).read_bytes() == (committed / name).read_bytes(), name


@pytest.mark.parametrize("report_id", [r for _, r in EXAMPLES])
def test_committed_sample_runs_verify_here(report_id: str) -> None:
    # what an auditor does with the runs shipped in the repository, wherever it is checked
    # out: integrity, inputs (found beside the recorded spec) and numbers all pass
    from tests.helpers import cli

    done = cli("verify", str(SAMPLES / report_id / "v001"), "--quiet")
    assert done.returncode == 0, done.stdout[-2000:] + done.stderr[-2000:]
    assert "inputs: ok" in done.stdout and "numbers: ok" in done.stdout
