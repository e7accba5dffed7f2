"""The example CI workflow (specs/ci-refresh.example.yml) run step by step on a simulated
study: a first version (nothing to compare), a refresh (the change report written, the job
passes), and a refresh that crosses a gate (the report written, the job fails)."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
import yaml

from tests.helpers import ROOT

pytestmark = pytest.mark.slow
WORKFLOW = ROOT / "specs" / "ci-refresh.example.yml"


def _steps() -> list[str]:
    """The workflow's shell steps that a study's job runs (the machine set-up left out:
    package installs are the CI machine's, not the study's)."""
    job = yaml.safe_load(WORKFLOW.read_text())["jobs"]["appendix"]
    steps = [s["run"] for s in job["steps"] if "run" in s]
    return [s for s in steps if "apt-get" not in s and "pip install" not in s]


def _job(study: Path) -> tuple[int, str]:
    """Run the steps in ``study`` as CI would (bash -e, each step in turn; the job stops at
    the first that fails); a fresh workspace keeps only runs/."""
    shutil.rmtree(study / "change-report", ignore_errors=True)
    env = {**os.environ, "PATH": f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}"}
    said = []
    for step in _steps():
        done = subprocess.run(
            ["bash", "-e", "-c", step], cwd=study, env=env, capture_output=True, text=True
        )
        said.append(done.stdout + done.stderr)
        if done.returncode != 0:
            return done.returncode, "\n".join(said)
    return 0, "\n".join(said)


def test_the_workflow_writes_the_change_report_and_fails_on_a_crossed_gate(
    tmp_path: Path,
) -> None:
    study = tmp_path / "study"
    (study / "data").mkdir(parents=True)
    spec = (ROOT / "specs" / "pump_service.yaml").read_text()
    assert "file: pump_service.csv" in spec
    (study / "study.yaml").write_text(
        spec.replace("file: pump_service.csv", "file: data/readings.csv")
    )
    shutil.copy(ROOT / "specs" / "fleet_logo.svg", study / "fleet_logo.svg")
    data = pd.read_csv(ROOT / "specs" / "pump_service.csv", dtype={"pump": str})
    pumps = data.pump.unique()
    late = set(pumps[::6])  # a sixth of the pumps arrive with the refresh
    data[~data.pump.isin(late)].to_csv(study / "data" / "readings.csv", index=False)
    code, said = _job(study)
    assert code == 0 and "first version: nothing to compare" in said, said[-2000:]
    assert not (study / "change-report").exists()
    # the refresh: every pump, one reading corrected
    refreshed = data.copy()
    refreshed.loc[3, "vibration"] = refreshed.loc[3, "vibration"] * 1.1
    refreshed.to_csv(study / "data" / "readings.csv", index=False)
    code, said = _job(study)
    assert code == 0, said[-3000:]
    assert (study / "change-report" / "change.html").is_file()
    assert (study / "change-report" / "SHA256SUMS").is_file()
    assert "compare: within the gates" in said
    # a refresh that triples every reading (log scale: the mean moves by 1.1): the gate is
    # crossed, the job fails, and the change report (the artifact) is there to read
    moved = refreshed.assign(vibration=refreshed.vibration * 3)
    moved.to_csv(study / "data" / "readings.csv", index=False)
    code, said = _job(study)
    assert code == 1 and "gate crossed: largest mean change" in said, said[-3000:]
    assert (study / "change-report" / "change.pdf").is_file()
