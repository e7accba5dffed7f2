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
