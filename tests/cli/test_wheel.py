"""The package as users install it: a wheel built from the checkout, installed into a fresh
virtual environment outside it, renders a report in a house style.

The new environment gets the wheel only (``--no-deps``); its dependencies come from this
environment's site-packages through a ``.pth`` line (no network). Paths named in a ``.pth``
file are not site directories, so the editable install of the checkout found there is not
activated: ``reportgen`` and its templates come from the wheel.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import sysconfig
from pathlib import Path

import pytest

from tests.helpers import ROOT

pytestmark = pytest.mark.slow


def _run(args: list[str], cwd: Path, env: dict[str, str]) -> subprocess.CompletedProcess[str]:
    return subprocess.run(args, cwd=cwd, env=env, capture_output=True, text=True, timeout=600)


@pytest.mark.slow
def test_a_wheel_installed_elsewhere_renders_every_style(tmp_path: Path) -> None:
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    env["SOURCE_DATE_EPOCH"] = "1764547200"
    wheels = tmp_path / "wheels"
    built = _run(
        [
            sys.executable,
            "-m",
            "pip",
            "wheel",
            "--no-deps",
            "--no-build-isolation",
            "-q",
            "-w",
            str(wheels),
            str(ROOT),
        ],
        tmp_path,
        env,
    )
    assert built.returncode == 0, built.stderr[-2000:]
    wheel = next(wheels.glob("reportgen-*.whl"))
    venv = tmp_path / "venv"
    made = _run([sys.executable, "-m", "venv", "--without-pip", str(venv)], tmp_path, env)
    assert made.returncode == 0, made.stderr
    python = venv / "bin" / "python"
    site = Path(
        _run(
            [str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
            tmp_path,
            env,
        ).stdout.strip()
    )
    (site / "deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    installed = _run(
        [
            sys.executable,
            "-m",
            "pip",
            "--python",
            str(python),
            "install",
            "-q",
            "--no-deps",
            "--no-index",
            str(wheel),
        ],
        tmp_path,
        env,
    )
    assert installed.returncode == 0, installed.stderr[-2000:]
    where = _run(
        [
            str(python),
            "-c",
            "import reportgen, reportgen.styles; "
            "print(reportgen.__file__); print(reportgen.styles.__file__)",
        ],
        tmp_path,
        env,
    )
    assert where.returncode == 0, where.stderr
    assert all(str(site) in line for line in where.stdout.split()), where.stdout
    # a study outside the checkout, in each shipped style
    work = tmp_path / "study"
    work.mkdir()
    shutil.copy(ROOT / "specs" / "clinic_visits.csv", work / "clinic_visits.csv")
    spec = (ROOT / "specs" / "clinic_visits.yaml").read_text()
    for style in ("default", "journal", "submission"):
        text = spec.replace("report:\n", f"report:\n  template: {style}\n", 1)
        (work / f"{style}.yaml").write_text(text.replace("id: clinic-visits", f"id: {style}"))
        done = _run(
            [str(venv / "bin" / "reportgen"), "run", f"{style}.yaml", "--out", "runs", "--quiet"],
            work,
            env,
        )
        assert done.returncode == 0, done.stderr[-2000:]
        html = (work / "runs" / style / "v001" / "report.html").read_text("utf-8")
        assert ("Sign-off" in html) == (style == "submission")
        assert ("Supplementary Table S1." in html) == (style == "journal")
