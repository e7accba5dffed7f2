"""`run --engine dask` against a scheduler of its own (worker processes), on both invented
examples: the tables, the HTML and the results digest are those of the local engine's run
on the same machine, whether the scheduler is named by Dask's DASK_SCHEDULER_ADDRESS or
--scheduler.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path

import pytest

from reportgen.errors import EngineError
from tests.helpers import ROOT, cli

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def scheduler() -> Iterator[str]:
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0"
    ) as cluster:
        yield cluster.scheduler_address


@pytest.mark.parametrize(
    ("example", "named_by"), [("clinic_visits", "environment"), ("pump_service", "option")]
)
def test_an_example_on_a_cluster_is_the_local_run(
    example: str,
    named_by: str,
    scheduler: str,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    regenerated: dict[str, Path],
) -> None:
    # the local run: the session's run of the example, with the same time stamp
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1764547200")  # the same stamp in both HTMLs
    args = [
        "run",
        str(ROOT / "specs" / f"{example}.yaml"),
        "--out",
        str(tmp_path / "dask"),
        "--engine",
        "dask",
        "--quiet",
    ]
    if named_by == "environment":
        monkeypatch.setenv("DASK_SCHEDULER_ADDRESS", scheduler)
    else:
        monkeypatch.delenv("DASK_SCHEDULER_ADDRESS", raising=False)
        args += ["--scheduler", scheduler]
    done = cli(*args)
    assert done.returncode == 0, done.stdout + done.stderr
    run = next((tmp_path / "dask").glob("*/v001"))
    sample = regenerated[example]
    tables = sorted(p.name for p in (sample / "tables").iterdir())
    assert sorted(p.name for p in (run / "tables").iterdir()) == tables
    for name in tables:
        assert (run / "tables" / name).read_bytes() == (sample / "tables" / name).read_bytes(), name
    assert (run / "report.html").read_bytes() == (sample / "report.html").read_bytes()
    record = json.loads((run / "record.json").read_text())
    assert record["run"]["engine"] == f"dask (scheduler {scheduler}, 2 workers)"
    expected = json.loads((sample / "record.json").read_text())["results_sha256"]
    assert record["results_sha256"] == expected


def test_workers_of_other_versions_are_refused() -> None:
    from reportgen.analysis.engine import check_versions, versions

    here = versions()
    check_versions({"tcp://a:1": dict(here)}, here)  # the same: accepted
    older = {**here, "numba": "0.1.0"}
    with pytest.raises(EngineError, match=r"tcp://b:2 runs numba 0\.1\.0 \(here "):
        check_versions({"tcp://a:1": dict(here), "tcp://b:2": older}, here)


def test_a_scheduler_without_workers_is_an_error(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    distributed = pytest.importorskip("distributed")
    from reportgen.analysis import engine
    from reportgen.runs.writer import run_spec

    monkeypatch.setattr(engine, "WAIT_FOR_WORKERS", 1.0)
    with distributed.LocalCluster(n_workers=0, processes=False, dashboard_address=":0") as cluster:
        with pytest.raises(EngineError, match="has no workers"):
            run_spec(
                ROOT / "specs" / "clinic_visits.yaml",
                tmp_path / "runs",
                engine="dask",
                scheduler=cluster.scheduler_address,
            )
    assert not (tmp_path / "runs").exists()


def test_a_cluster_that_fails_during_the_run_is_an_error(scheduler: str) -> None:
    from distributed.comm.core import CommClosedError

    from reportgen.analysis.engine import open_engine

    with (
        pytest.raises(EngineError, match="the Dask cluster failed during the run"),
        open_engine("dask", scheduler),
    ):
        raise CommClosedError("the scheduler went away")


def test_worker_processes_read_a_folder_as_this_process_does(
    scheduler: str, tmp_path: Path, pump_folder_run: tuple[Path, Path]
) -> None:
    # The pump example (groups) split by pump into three Parquet files: the workers read,
    # check and clean the files; the tables are those of the local engine's run.
    import shutil

    import pandas as pd

    shared, local = pump_folder_run
    done = cli(
        "run",
        str(shared),
        "--out",
        str(tmp_path / "dask"),
        "--engine",
        "dask",
        "--quiet",
        "--scheduler",
        scheduler,
    )
    assert done.returncode == 0, done.stdout + done.stderr
    on_dask = next((tmp_path / "dask").glob("*/v001"))
    for path in sorted((local / "tables").iterdir()):
        assert (on_dask / "tables" / path.name).read_bytes() == path.read_bytes(), path.name
    # a file that a worker cannot use stops the run with the file named, nothing written
    shutil.copytree(shared.parent / "pumps", tmp_path / "pumps")
    spec = tmp_path / "pumps.yaml"
    shutil.copy(shared, spec)
    part = pd.read_parquet(tmp_path / "pumps" / "part-1.parquet")
    part.drop(columns="vibration").to_parquet(tmp_path / "pumps" / "part-1.parquet")
    done = cli(
        "run",
        str(spec),
        "--out",
        str(tmp_path / "refused"),
        "--engine",
        "dask",
        "--scheduler",
        scheduler,
    )
    assert done.returncode == 2, done.stdout + done.stderr
    assert "part-1.parquet" in done.stderr and "Traceback" not in done.stderr
    assert not any((tmp_path / "refused").rglob("v0*"))


# A run whose cluster dies under it: the engine is opened, then (a hook run just after the
# engine connected, so that the loss falls between two passes every time) the last worker
# or the scheduler is killed. The run must end by itself with one line and exit 2, and
# leave no folder. LOST_AFTER is set to 3 s in the run's process to keep the test short.
_KILL_AFTER_CONNECT = """
import os, signal, sys
import reportgen.analysis.engine as engine
engine.LOST_AFTER = 3.0
opened = engine.OnDask.__init__
def kill_then_go_on(self, client):
    opened(self, client)
    os.kill(int(os.environ["VICTIM"]), signal.SIGKILL)
engine.OnDask.__init__ = kill_then_go_on
from reportgen.cli import main
sys.exit(main(sys.argv[1:]))
"""


@pytest.mark.parametrize("victim", ["the last worker", "the scheduler"])
def test_a_cluster_lost_mid_run_ends_the_run_cleanly(victim: str, tmp_path: Path) -> None:
    import os
    import socket
    import subprocess
    import sys
    import time

    pytest.importorskip("distributed")
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    address = f"tcp://127.0.0.1:{port}"
    quiet = {"stdout": subprocess.DEVNULL, "stderr": subprocess.DEVNULL}
    scheduler = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "distributed.cli.dask_scheduler",
            "--host",
            "127.0.0.1",
            "--port",
            str(port),
            "--dashboard-address",
            ":0",
        ],
        **quiet,
    )
    worker = subprocess.Popen(  # no nanny: a killed worker is not started again
        [
            sys.executable,
            "-m",
            "distributed.cli.dask_worker",
            address,
            "--no-nanny",
            "--nthreads",
            "1",
            "--dashboard-address",
            ":0",
        ],
        **quiet,
    )
    spec = str(ROOT / "specs" / "clinic_visits.yaml")
    try:
        out = tmp_path / "runs"
        env = {
            **os.environ,
            "VICTIM": str((worker if victim == "the last worker" else scheduler).pid),
        }
        started = time.monotonic()
        done = subprocess.run(
            [
                sys.executable,
                "-c",
                _KILL_AFTER_CONNECT,
                "run",
                spec,
                "--out",
                str(out),
                "--quiet",
                "--engine",
                "dask",
                "--scheduler",
                address,
            ],
            env=env,
            capture_output=True,
            text=True,
            timeout=240,
        )
        took = time.monotonic() - started
    finally:
        for p in (worker, scheduler):
            p.kill()
            p.wait()
    assert done.returncode == 2, done.stderr[-2000:]
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in done.stderr, done.stderr[-2000:]
    expected = (
        "lost its workers: none for 3 s"
        if victim == "the last worker"
        else "the connection to the scheduler was lost"
    )
    assert expected in lines[0] and "nothing was written" in lines[0]
    assert not list(out.glob("*/*")), list(out.glob("*/*"))  # no version, no .building
    assert took < 120
