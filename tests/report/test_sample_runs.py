"""The committed sample runs regenerate byte for byte (HTML, tables and figures)."""

from __future__ import annotations

from pathlib import Path

import pytest

from .conftest import ROOT

SAMPLES = ROOT / "sample_runs"


@pytest.mark.parametrize(("example", "report_id"), [("clinic_visits", "clinic-visits"),
                                                     ("pump_service", "pump-service")])
def test_sample_run_regenerates_identically(regenerated: dict[str, Path], example: str,
                                            report_id: str) -> None:
    committed = SAMPLES / report_id / "v001"
    fresh = regenerated[example]
    assert fresh.name == "v001"
    names = ["report.html", *sorted(str(p.relative_to(committed))
                                    for p in (committed / "tables").iterdir()),
             *sorted(str(p.relative_to(committed)) for p in (committed / "figures").iterdir())]
    assert len(names) > 15
    for name in names:
        assert (fresh / name).read_bytes() == (committed / name).read_bytes(), name
