"""`reportgen run` of a folder of Parquet files on a Dask cluster of worker processes.

Run:  .venv/bin/python benchmarks/whole_runs.py [--subjects N] [--files F] [--data FOLDER]
          [--all-trajectories] [--write]

The readings are ``engines.write_files``'s (1 to 8 readings per subject, whole subjects
per file); FOLDER/readings is reused when it is there (10^7 subjects take minutes to
write). For the tables of subjects as CSV files and as Parquet parts (``subjects.tables``),
it starts a LocalCluster of 2 worker processes (one thread each), runs the installed
``reportgen run SPEC --engine dask --scheduler ADDRESS --quiet`` as a process of its own,
and prints the wall time, the peak resident memory of the ``reportgen`` process (the
largest of it and its rendering worker: getrusage of a launcher's children), and each
worker's peak; with --all-trajectories, a third run adds ``subjects.all_trajectories``.
The runs' population tables (mean, components, eigenfunctions) must
come out byte-identical. Not part of the test run; with --write the table goes to
benchmarks/ENGINES.md as a section of its own.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from benchmarks.engines import write_files, write_section  # noqa: E402
from benchmarks.run import machine, table  # noqa: E402

REPORTGEN = str(Path(sys.executable).with_name("reportgen"))
SAME = ("mean.csv", "components.csv", "eigenfunctions.csv")


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def launch(command: list[str]) -> None:
    """Run ``command``; print its exit code, wall time and the peak of its process tree."""
    start = time.perf_counter()
    done = subprocess.run(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    print(
        json.dumps(
            {
                "code": done.returncode,
                "wall": time.perf_counter() - start,
                "peak": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024,
                "error": done.stderr.decode()[-500:],
            }
        )
    )


def run_on_cluster(spec: Path, out: Path) -> dict[str, object]:
    import distributed

    with (
        distributed.LocalCluster(
            n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0"
        ) as cluster,
        distributed.Client(cluster) as client,
    ):
        command = [
            REPORTGEN,
            "run",
            str(spec),
            "--out",
            str(out),
            "--engine",
            "dask",
            "--scheduler",
            cluster.scheduler_address,
            "--quiet",
        ]
        done = subprocess.run(
            [sys.executable, __file__, "--launch", "--", *command],
            capture_output=True,
            text=True,
            check=True,
        )
        found = json.loads(done.stdout.strip().splitlines()[-1])
        found["workers"] = sorted(client.run(_peak_mb).values())
    if found["code"] != 0:
        raise SystemExit(f"reportgen run failed: {found['error']}")
    return found


def main() -> None:
    if sys.argv[1:2] == ["--launch"]:
        launch(sys.argv[3:])
        return
    parser = argparse.ArgumentParser()
    parser.add_argument("--subjects", type=int, default=1_000_000)
    parser.add_argument("--files", type=int, default=32)
    parser.add_argument("--data", type=Path, help="where the readings are (or go)")
    parser.add_argument("--all-trajectories", action="store_true")
    parser.add_argument("--write", action="store_true")
    args = parser.parse_args()
    n, files = args.subjects, args.files
    base = args.data or Path(tempfile.mkdtemp(prefix="reportgen-whole-"))
    readings = base / "readings"
    if not readings.is_dir():
        write_files(readings, n, files, 3)
    rows, runs = [], {}
    settings = {"csv": "tables: csv", "parquet": "tables: parquet"}
    if args.all_trajectories:
        settings["parquet, all_trajectories"] = "tables: parquet, all_trajectories: true"
    for label, setting in settings.items():
        name = f"whole-{len(runs)}"
        spec = base / f"{name}.yaml"
        spec.write_text(
            f"report: {{id: {name}, title: '{n} simulated subjects'}}\n"
            "data: {file: readings, subject: unit, time: t, value: y}\n"
            f"subjects: {{{setting}}}\n"
        )
        out = Path(tempfile.mkdtemp(prefix="reportgen-whole-runs-"))
        found = run_on_cluster(spec, out)
        runs[label] = out / name / "v001"
        size = sum(p.stat().st_size for p in (runs[label] / "tables").rglob("*") if p.is_file())
        rows.append(
            [
                label,
                f"{found['wall']:.1f}",
                f"{found['peak']:,.0f}",
                ", ".join(f"{mb:,.0f}" for mb in found["workers"]),  # type: ignore[attr-defined]
                f"{size / 2**20:,.0f}",
            ]
        )
        print(rows[-1], flush=True)
    same = all(
        (runs["csv"] / "tables" / name).read_bytes() == (run / "tables" / name).read_bytes()
        for name in SAME
        for run in runs.values()
    )
    text = (
        f"Machine: {machine()}\nDate: {time.strftime('%Y-%m-%d')}\n\n"
        f"`reportgen run` (report, PDF and tables) of {n:,} subjects in {files} Parquet "
        "files on a LocalCluster of 2 worker processes (`benchmarks/whole_runs.py`); "
        "`subjects.tables` as CSV files or as Parquet parts. Peak resident memory of the "
        "`reportgen` process (or its rendering worker, whichever is larger) and of each "
        "worker; the size of the run's tables.\n\n"
        + table(["subjects", "wall s", "reportgen peak MB", "worker peaks MB", "tables MB"], rows)
        + f"\n\nPopulation tables ({', '.join(SAME)}) byte-identical between the runs: "
        + ("yes" if same else "NO")
    )
    print(text)
    if args.write:
        write_section(ROOT / "benchmarks" / "ENGINES.md", f"{n:,} subjects, whole runs", text)


if __name__ == "__main__":
    main()
