"""Fixtures for every test: a fixed time for runs and no progress lines (as in CI), a copy
of the first example to run, and both examples run once for the whole session (the
committed sample runs' timestamp), to be read or copied by any test that needs a run."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from reportgen.runs.writer import run_spec
from tests.helpers import ROOT, pump_folder

EXAMPLES = ("clinic_visits", "pump_service")
SAMPLE_EPOCH = "1764547200"  # the fixed timestamp the committed sample runs were made with


def pytest_collection_modifyitems(items: list[pytest.Item]) -> None:
    """The whole-command tests first (a stable sort): with the suite on several workers, a
    long file handed out last would leave the other workers idle while it runs."""
    items.sort(key=lambda item: 0 if item.get_closest_marker("slow") else 1)


@pytest.fixture(autouse=True)
def _isolated_env(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1764547200")
    monkeypatch.setenv("CI", "true")


@pytest.fixture
def study(tmp_path: Path) -> Path:
    """A copy of the first example spec and its data in a temporary folder."""
    for name in ("clinic_visits.yaml", "clinic_visits.csv"):
        shutil.copy(ROOT / "specs" / name, tmp_path / name)
    return tmp_path / "clinic_visits.yaml"


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


@pytest.fixture(scope="session")
def pump_folder_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """The second example split by pump into three Parquet files (its spec), and its run on
    the local engine: the reference of the runs of the same folder on a cluster."""
    base = tmp_path_factory.mktemp("pump-folder")
    spec = pump_folder(base)
    return spec, run_spec(spec, base / "local")
