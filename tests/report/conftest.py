from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from reportgen.runner import run_spec

ROOT = Path(__file__).resolve().parents[2]
EXAMPLES = ("clinic_visits", "pump_service")
SAMPLE_EPOCH = "1764547200"  # the fixed timestamp the committed sample runs were made with


@pytest.fixture(scope="session")
def regenerated(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Both example specs run afresh (copied with their data) with the sample timestamp."""
    mp = pytest.MonkeyPatch()
    mp.setenv("SOURCE_DATE_EPOCH", SAMPLE_EPOCH)
    base = tmp_path_factory.mktemp("examples")
    runs = {}
    try:
        for name in EXAMPLES:
            for suffix in (".yaml", ".csv"):
                shutil.copy(ROOT / "specs" / f"{name}{suffix}", base / f"{name}{suffix}")
            shutil.copy(ROOT / "specs" / "fleet_logo.svg", base / "fleet_logo.svg")
            runs[name] = run_spec(base / f"{name}.yaml", base / "runs")
    finally:
        mp.undo()
    return runs
