"""Tables of one row per subject written as Parquet parts (``subjects.tables: parquet``):
one part per data file, each part the rows of that file's subjects; the same rows and
digits as the CSV tables; recorded, listed in SHA256SUMS, verified part by part, and read
by ``compare``.

Data: the invented pump example (specs/pump_service.csv), whole and split by pump into
three Parquet files. The canonical CSV of a part is checked against the CSV table of a run
of the same data; the digests against hashlib's SHA-256 of the bytes; the Parquet parts
are read back with pyarrow.
"""

from __future__ import annotations

import hashlib
import io
import json
import shutil
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest

from reportgen.report.subject_parts import csv_of_part, parquet_bytes
from reportgen.report.tables import to_csv_bytes
from reportgen.runs.writer import run_spec
from tests.helpers import ROOT, cli, pump_folder

pytestmark = pytest.mark.slow

TABLES = ("residuals_by_subject", "scores")
ALL = "  all_trajectories: true\n"


def _with(spec: Path, name: str, settings: str) -> Path:
    path = spec.with_name(name)
    path.write_text(spec.read_text().replace("  count: 6\n", "  count: 6\n" + settings))
    return path


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    base = tmp_path_factory.mktemp("subject-parts")
    folder = pump_folder(base)
    one = base / "one-plain.yaml"
    shutil.copy(ROOT / "specs" / "pump_service.csv", base / "pump_service.csv")
    one.write_text(
        (ROOT / "specs" / "pump_service.yaml").read_text().replace("logo: fleet_logo.svg", "")
    )
    parts = _with(folder, "folder-parts.yaml", "  tables: parquet\n" + ALL)
    return {
        "one csv": run_spec(_with(one, "one.yaml", ALL), base / "one"),
        "one parts": run_spec(
            _with(one, "one-parts.yaml", "  tables: parquet\n" + ALL), base / "one"
        ),
        "folder csv": run_spec(folder, base / "folder"),
        "folder parts": run_spec(parts, base / "folder"),
        "dask parts": run_spec(parts, base / "dask", engine="dask"),
    }


def _manifest(run: Path, table: str) -> dict:
    return json.loads((run / "tables" / table / "parts.json").read_text())


def test_one_file_gives_one_part_equal_to_the_csv_table(runs: dict[str, Path]) -> None:
    csv, parts = runs["one csv"], runs["one parts"]
    for table in (*TABLES, "all_trajectories"):
        assert not (parts / "tables" / f"{table}.csv").exists()
        manifest = _manifest(parts, table)
        assert [p["file"] for p in manifest["parts"]] == ["part-00001.parquet"]
        expected = (csv / "tables" / f"{table}.csv").read_bytes()
        part = parts / "tables" / table / "part-00001.parquet"
        assert csv_of_part(part) == expected
        entry = manifest["parts"][0]
        assert entry["csv_sha256"] == hashlib.sha256(expected).hexdigest()
        assert entry["csv_bytes"] == len(expected)
        assert entry["sha256"] == hashlib.sha256(part.read_bytes()).hexdigest()
        assert entry["rows"] == manifest["rows"] == expected.count(b"\n") - 1


def test_a_folder_gives_one_part_per_file_holding_its_subjects(runs: dict[str, Path]) -> None:
    csv, parts = runs["folder csv"], runs["folder parts"]
    files = sorted((parts.parents[2] / "pumps").iterdir())
    for table in TABLES:
        entries = _manifest(parts, table)["parts"]
        assert len(entries) == len(files) == 3
        frames = [pq.read_table(parts / "tables" / table / e["file"]).to_pandas() for e in entries]
        for frame, file, entry in zip(frames, files, entries, strict=True):
            assert frame.subject.tolist() == sorted(pd.read_parquet(file).pump.unique())
            assert entry["rows"] == len(frame)
        # the files split the sorted ids in thirds: the parts in order are the CSV table
        whole = (csv / "tables" / f"{table}.csv").read_bytes()
        assert to_csv_bytes(pd.concat(frames, ignore_index=True)) == whole
    # every subject's trajectory: a grid's rows each; the shown subjects' as trajectories.csv
    grid = len(pd.read_csv(csv / "tables" / "mean.csv"))
    curves = [
        pq.read_table(parts / "tables" / "all_trajectories" / e["file"]).to_pandas()
        for e in _manifest(parts, "all_trajectories")["parts"]
    ]
    assert [len(c) for c in curves] == [
        e["rows"] * grid for e in _manifest(parts, "scores")["parts"]
    ]
    every = pd.concat(curves, ignore_index=True)
    shown = (parts / "tables" / "trajectories.csv").read_bytes()
    frame = pd.read_csv(io.BytesIO(shown), dtype=str)
    picked = every[every.subject.isin(frame.subject)]
    # the same curves; the bands differ by design: the shown subjects' are corrected (band:
    # auto), the bulk table's plug-in
    same = ["subject", "time", "fitted"]
    assert to_csv_bytes(picked[same]) == to_csv_bytes(frame[same])
    scores = pq.read_table(parts / "tables" / "scores" / "part-00001.parquet")
    assert str(scores.schema.field("subject").type) in ("string", "large_string")
    assert str(scores.schema.field("score_1").type) == "double"
    assert scores.schema.metadata is None  # no pandas metadata: it names the pandas version


def test_the_results_digest_takes_each_parts_csv_digest(runs: dict[str, Path]) -> None:
    """The documented formula (reportgen/tables.py results_digest), recomputed with
    hashlib from the run's files."""
    run = runs["folder parts"]
    h = hashlib.sha256()
    items: dict[str, tuple[int, bytes | str]] = {}
    for path in (run / "tables").glob("*.csv"):
        data = path.read_bytes()
        items[f"tables/{path.name}"] = (len(data), data)
    tables = sorted(p.name for p in (run / "tables").iterdir() if p.is_dir())
    assert tables == ["all_trajectories", *TABLES]
    for table in tables:
        for e in _manifest(run, table)["parts"]:
            items[f"tables/{table}/{e['file']}"] = (e["csv_bytes"], e["csv_sha256"])
    for name in sorted(items):
        size, content = items[name]
        if isinstance(content, bytes):
            h.update(f"{name}\n{size}\n".encode() + content)
        else:
            h.update(f"{name}\n{size}\n{content}".encode())
    record = json.loads((run / "record.json").read_text())
    assert record["results_sha256"] == h.hexdigest()
    for table in TABLES:
        for e in _manifest(run, table)["parts"]:
            name = f"tables/{table}/{e['file']}"
            assert record["outputs"][name] == e["sha256"]
    sums = (run / "SHA256SUMS").read_text()
    assert "tables/scores/part-00003.parquet" in sums
    assert "tables/scores/parts.json" in sums


def test_the_dask_engine_writes_the_same_parts(runs: dict[str, Path]) -> None:
    here, there = runs["folder parts"], runs["dask parts"]
    for table in (*TABLES, "all_trajectories"):
        for path in sorted((here / "tables" / table).iterdir()):
            assert path.read_bytes() == (there / "tables" / table / path.name).read_bytes()
    records = [json.loads((r / "record.json").read_text()) for r in (here, there)]
    assert records[0]["results_sha256"] == records[1]["results_sha256"]


def test_verify_compares_the_parts_and_finds_a_changed_one(runs: dict[str, Path]) -> None:
    run = runs["folder parts"]
    ok = cli("verify", str(run))
    assert ok.returncode == 0, ok.stdout + ok.stderr
    assert "table scores (parts)" in ok.stdout and "identical (3 part(s))" in ok.stdout
    # one score changed by 1%, its parts.json entry made to match: the numbers differ
    copy = run.with_name("v099")  # beside the run: the recorded spec is found the same way
    shutil.copytree(run, copy)
    part = copy / "tables" / "scores" / "part-00002.parquet"
    frame = pq.read_table(part).to_pandas()
    frame.loc[0, "score_1"] *= 1.01
    part.write_bytes(parquet_bytes(frame))
    manifest = _manifest(copy, "scores")
    manifest["parts"][1]["csv_sha256"] = hashlib.sha256(to_csv_bytes(frame)).hexdigest()
    (copy / "tables" / "scores" / "parts.json").write_text(json.dumps(manifest))
    bad = cli("verify", str(copy))
    assert bad.returncode == 1, bad.stdout + bad.stderr
    assert "part-00002.parquet: 1 cell(s) differ" in bad.stdout
    assert "file tables/scores/part-00002.parquet" in bad.stdout  # and SHA256SUMS says so


def test_compare_reads_the_parts(runs: dict[str, Path]) -> None:
    done = cli("compare", str(runs["folder csv"]), str(runs["folder parts"]))
    assert done.returncode == 0, done.stdout + done.stderr
    assert "200 (+0 / -0; 200 in both)" in done.stdout


def test_the_report_says_where_the_tables_of_subjects_are(runs: dict[str, Path]) -> None:
    html = (runs["folder parts"] / "report.html").read_text()
    assert "tables/scores/, 3 Parquet part(s) listed in tables/scores/parts.json" in html
    assert "tables/scores.csv" not in html
    assert (
        "The trajectory of every subject, with plug-in bands (their simultaneous band the "
        "conservative chi-square bound): tables/all_trajectories/, 3 Parquet part(s)"
    ) in html
    one = (runs["one csv"] / "report.html").read_text()
    assert "conservative chi-square bound): tables/all_trajectories.csv." in one


def test_every_trajectory_needs_the_plugin_band(tmp_path: Path) -> None:
    spec = tmp_path / "pump.yaml"
    shutil.copy(ROOT / "specs" / "pump_service.csv", tmp_path / "pump_service.csv")
    spec.write_text(
        (ROOT / "specs" / "pump_service.yaml")
        .read_text()
        .replace("logo: fleet_logo.svg", "")
        .replace("  count: 6\n", "  count: 6\n" + ALL)
        .replace("model:\n", "model:\n  band: corrected\n")
    )
    done = cli("check", str(spec))
    assert done.returncode == 2, done.stdout + done.stderr
    assert (
        "subjects.all_trajectories writes every subject's trajectory with the plug-in band"
        in done.stderr
        and "Traceback" not in done.stderr
    )


def test_the_parts_go_in_batches_of_bounded_rows() -> None:
    """Consecutive parts, every part once, at least two a batch, and no more rows than
    BATCH_ROWS beyond the first two (common practice, no source)."""
    from reportgen.report.subject_parts import BATCH_ROWS, _batches

    sizes = [31_000] * 5 + [400_000, 10, 10, 10]
    batches = _batches(sizes, 53)
    assert [i for b in batches for i in b] == list(range(len(sizes)))
    assert all(len(b) >= 2 for b in batches[:-1])
    for b in batches:
        if len(b) > 2:
            assert sum(sizes[i] for i in b) * 53 <= BATCH_ROWS
    assert _batches([10] * 9, 2) == [range(0, 9)]
    assert _batches([], 2) == []
