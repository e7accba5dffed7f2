"""Data given as a folder (or pattern) of Parquet files: one table, one manifest, the
numbers of one file (to rounding: the files' sums are added file by file), the same bits on
either engine, and refusals where the files cannot be trusted.

Data: the invented clinic example (specs/clinic_visits.csv) split by subject. The
single-file run is the reference for the numbers; the manifest's digest is checked against
hashlib's SHA-256 of its documented text (reportgen/manifest.py).
"""

from __future__ import annotations

import hashlib
import io
import json
import pickle
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from reportgen.errors import DataError
from reportgen.inputs.files import DataFile as Part
from reportgen.inputs.files import current_digest, digest
from reportgen.runs.writer import run_spec
from tests.helpers import ROOT, cli

pytestmark = pytest.mark.slow

SPEC = (ROOT / "specs" / "clinic_visits.yaml").read_text()


def _split(folder: Path, by_subject: bool = True) -> None:
    """The example's readings in three Parquet files: by subject, or (a layout the plan
    cannot use) by time."""
    data = pd.read_csv(ROOT / "specs" / "clinic_visits.csv", dtype={"patient": str})
    folder.mkdir(parents=True)
    if by_subject:
        ids = sorted(data.patient.unique())
        key = data.patient.map({s: i * 3 // len(ids) for i, s in enumerate(ids)})
    else:
        key = pd.cut(data.week, 3, labels=False)
    for k, part in data.groupby(key):
        part.to_parquet(folder / f"part-{k}.parquet", index=False)


def _spec(folder: Path, named: str) -> Path:
    path = folder / "parts.yaml"
    path.write_text(SPEC.replace("file: clinic_visits.csv", f"file: '{named}'"))
    return path


def _tables(run: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted((run / "tables").iterdir())}


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    base = tmp_path_factory.mktemp("parts")
    _split(base / "readings")
    one = pd.concat(pd.read_parquet(p) for p in sorted((base / "readings").iterdir()))
    one.to_parquet(base / "one.parquet", index=False)
    spec = _spec(base, "readings")
    return {
        "one": run_spec(_spec_one(base), base / "runs"),
        "folder": run_spec(spec, base / "runs"),
        "dask": run_spec(spec, base / "runs", engine="dask"),
    }


def _spec_one(base: Path) -> Path:
    path = base / "one.yaml"
    path.write_text(
        SPEC.replace("file: clinic_visits.csv", "file: one.parquet").replace(
            "id: clinic-visits", "id: one-file"
        )
    )
    return path


def _same_to_rounding(expected: Path, got: Path) -> None:
    """The same table, its numbers to rounding: per-file sums are added in another order
    (common practice, no source)."""
    a, b = pd.read_csv(expected), pd.read_csv(got)
    assert list(a.columns) == list(b.columns) and len(a) == len(b), got.name
    for column in a:
        if pd.api.types.is_float_dtype(a[column]):
            np.testing.assert_allclose(
                b[column], a[column], rtol=1e-8, atol=1e-10, err_msg=f"{got.name}: {column}"
            )
        else:
            assert a[column].tolist() == b[column].tolist(), f"{got.name}: {column}"


def test_a_folder_gives_the_numbers_of_one_file(runs: dict[str, Path]) -> None:
    one, folder = runs["one"] / "tables", runs["folder"] / "tables"
    assert _tables(runs["one"]).keys() == _tables(runs["folder"]).keys()
    for path in sorted(one.iterdir()):
        if path.name == "checks.csv":  # the folder's run has one check more (whole subjects)
            continue
        _same_to_rounding(path, folder / path.name)
    checks = pd.read_csv(runs["folder"] / "tables" / "checks.csv")
    row = checks[checks.check == "subjects whole in one file"]
    assert list(row.status) == ["pass"]


def test_the_dask_engine_gives_the_same_bits(runs: dict[str, Path]) -> None:
    assert _tables(runs["dask"]) == _tables(runs["folder"])
    here, there = (json.loads((runs[k] / "record.json").read_text()) for k in ("folder", "dask"))
    assert here["results_sha256"] == there["results_sha256"]
    assert here["run"]["engine"] == "local"
    assert there["run"]["engine"].startswith("dask (a cluster in this process")
    # verify re-runs the analysis in this process: the Dask run's numbers must come out
    ok = cli("verify", str(runs["dask"]))
    assert ok.returncode == 0, ok.stdout + ok.stderr


def test_engine_options_that_cannot_work_are_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    from reportgen.analysis import engine
    from reportgen.cli import main

    monkeypatch.setattr(engine, "CONNECT_TIMEOUT", "1s")  # the test need not wait 10 s
    spec = str(ROOT / "specs" / "clinic_visits.yaml")
    out = str(tmp_path / "runs")
    assert main(["run", spec, "--out", out, "--scheduler", "tcp://127.0.0.1:8786"]) == 2
    lone = capsys.readouterr().err
    assert "--scheduler is for --engine dask" in lone
    assert (
        main(["run", spec, "--out", out, "--engine", "dask", "--scheduler", "tcp://127.0.0.1:9"])
        == 2
    )  # the discard port: nothing listens there
    away = capsys.readouterr().err
    assert "cannot reach the Dask scheduler at 'tcp://127.0.0.1:9' (--scheduler)" in away
    assert "Traceback" not in lone + away
    assert not (tmp_path / "runs").exists()


def test_the_record_carries_the_manifest_and_its_digest(runs: dict[str, Path]) -> None:
    record = json.loads((runs["folder"] / "record.json").read_text())
    entry = record["inputs"][0]
    folder = runs["folder"].parents[2] / "readings"
    files = sorted(folder.iterdir())
    assert [m["path"] for m in entry["manifest"]] == [p.name for p in files]
    for m, p in zip(entry["manifest"], files, strict=True):
        assert m["sha256"] == hashlib.sha256(p.read_bytes()).hexdigest()
        assert m["bytes"] == p.stat().st_size
    text = "reportgen-manifest-v1\n" + "".join(
        f"{m['path']}\t{m['bytes']}\t{m['sha256']}\n" for m in entry["manifest"]
    )
    assert entry["sha256"] == hashlib.sha256(text.encode()).hexdigest()
    assert entry["bytes"] == sum(m["bytes"] for m in entry["manifest"])
    html = (runs["folder"] / "report.html").read_text()
    assert f"data manifest sha256 (readings, {len(files)} Parquet files" in html
    assert entry["sha256"] in html


def test_the_digest_ignores_listing_order_and_sees_every_change(tmp_path: Path) -> None:
    parts = [Part("b.parquet", 10, "1" * 64), Part("a/c.parquet", 5, "2" * 64)]
    assert digest(parts) == digest(parts[::-1])
    _split(tmp_path / "r")
    before = current_digest(tmp_path / "r", "r")
    assert before == current_digest(tmp_path / "r" / "*.parquet", "r/*.parquet")
    (tmp_path / "r" / "part-0.parquet").rename(tmp_path / "r" / "part-9.parquet")
    renamed = current_digest(tmp_path / "r", "r")
    extra = tmp_path / "r" / "x.parquet"
    extra.write_bytes((tmp_path / "r" / "part-1.parquet").read_bytes())
    added = current_digest(tmp_path / "r", "r")
    assert len({before, renamed, added}) == 3


def test_verify_checks_every_file_of_the_folder(runs: dict[str, Path], tmp_path: Path) -> None:
    ok = cli("verify", str(runs["folder"]))
    assert ok.returncode == 0, ok.stdout + ok.stderr
    copy = tmp_path / "copy"
    import shutil

    shutil.copytree(runs["folder"].parents[2], copy)
    run = copy / runs["folder"].relative_to(runs["folder"].parents[2])
    part = copy / "readings" / "part-1.parquet"
    frame = pd.read_parquet(part)
    frame.loc[0, "marker"] += 1.0
    frame.to_parquet(part, index=False)
    changed = cli("verify", str(run))
    assert changed.returncode == 1
    assert "CHANGED" in changed.stdout and "readings" in changed.stdout


def test_subjects_split_across_files_are_refused(tmp_path: Path) -> None:
    _split(tmp_path / "by_time", by_subject=False)
    spec = _spec(tmp_path, "by_time")
    done = cli("run", str(spec), "--out", str(tmp_path / "runs"))
    assert done.returncode == 2, done.stdout + done.stderr
    assert "subjects whole in one file" in done.stderr
    assert "partitioned by subject" in done.stderr
    assert "Traceback" not in done.stderr
    assert not (tmp_path / "runs").exists() or not any((tmp_path / "runs").rglob("v0*"))


def test_a_file_changed_during_the_run_stops_it(tmp_path: Path) -> None:
    _split(tmp_path / "readings")
    spec = _spec(tmp_path, "readings")
    part = tmp_path / "readings" / "part-2.parquet"

    def meddle(step: str) -> None:
        if step == "figures":  # the data were read and analysed; now a file changes
            frame = pd.read_parquet(part)
            frame.to_parquet(part, index=False, compression="gzip")

    with pytest.raises(DataError, match="changed while the run read it"):
        run_spec(spec, tmp_path / "runs", progress=meddle)
    leftovers = list((tmp_path / "runs").rglob("*"))
    assert [p.name for p in leftovers] == ["clinic-visits"]  # the report's folder, empty


def test_a_glob_names_the_same_files_as_the_folder(tmp_path: Path) -> None:
    _split(tmp_path / "readings")
    done = cli("check", str(_spec(tmp_path, "readings/*.parquet")))
    assert done.returncode == 0, done.stdout + done.stderr
    assert "3 Parquet files" in done.stdout
    nothing = cli("check", str(_spec(tmp_path, "readings/*.csv")))
    assert nothing.returncode == 2 and "names no Parquet files" in nothing.stderr


def test_missing_ids_are_not_a_split_subject(tmp_path: Path) -> None:
    # rows without an id are the missing-values check's matter, in whichever files they are
    from reportgen.inputs.loader import load_dataset
    from reportgen.inputs.spec import load_spec

    _split(tmp_path / "readings")
    for name in ("part-0.parquet", "part-2.parquet"):
        path = tmp_path / "readings" / name
        frame = pd.read_parquet(path)
        frame.loc[1, "patient"] = None
        frame.to_parquet(path, index=False)
    checks = {c.name: c for c in load_dataset(load_spec(_spec(tmp_path, "readings"))).checks}
    assert checks["subjects whole in one file"].status == "pass"
    assert checks["missing values"].status == "warn"
    assert checks["missing values"].detail.startswith("2 of ")


def test_groups_over_files_on_either_engine(
    tmp_path: Path, pump_folder_run: tuple[Path, Path]
) -> None:
    # The other invented example (three depots compared) split by pump into three files:
    # the group means are passes over the files; the committed one-file run is the
    # reference for the numbers, and the Dask engine gives the same bits as the local one.
    spec, here = pump_folder_run
    there = run_spec(spec, tmp_path / "dask", engine="dask")
    assert _tables(here) == _tables(there)
    reference = ROOT / "sample_runs" / "pump-service" / "v001" / "tables"
    for name in ("groups.csv", "group_means.csv", "scores.csv", "residuals_by_subject.csv"):
        _same_to_rounding(reference / name, here / "tables" / name)


def _ordered(frame: pd.DataFrame) -> pd.DataFrame:
    out = frame[["subject", "time", "value"]].astype({"subject": object})
    return out.sort_values(["subject", "time", "value"], ignore_index=True)


def _held_readings(spec: Path) -> pd.DataFrame:
    """The readings of a folder as the fit's parts hold them, with their subjects' ids."""
    from reportgen.inputs.loader import load_dataset
    from reportgen.inputs.spec import load_spec

    held = load_dataset(load_spec(spec), for_fit=True).readings
    assert held is not None
    frames = [
        pd.DataFrame(
            {
                "subject": held.ids[p.subjects[p.sample.subject]],
                "time": p.sample.t,
                "value": p.sample.y,
            }
        )
        for p in held.parts
    ]
    return _ordered(pd.concat(frames, ignore_index=True))


def _checks_of(spec: Path) -> tuple[dict[str, tuple[str, str]], pd.DataFrame]:
    from reportgen.inputs.loader import load_dataset
    from reportgen.inputs.spec import load_spec

    ds = load_dataset(load_spec(spec), for_fit=True)
    readings = ds.readings.frame() if ds.readings is not None else pd.DataFrame()
    return {c.name: (c.status, c.detail) for c in ds.checks}, readings


def _messy(tmp_path: Path, **checks: str) -> tuple[Path, Path]:
    """The example with a row selection, missing values, duplicates, a value out of range
    and a time out of the domain spread over its three files, and the same rows as one
    Parquet file: a spec for each (``checks``: rules changed in the checks section)."""
    _split(tmp_path / "readings")
    paths = sorted((tmp_path / "readings").iterdir())
    for i, path in enumerate(paths):
        frame = pd.read_parquet(path)
        frame["usable"] = np.arange(len(frame)) % 17 != 3  # drops rows 3, 20, ... of each
        if i > 0:
            frame.loc[4 + i, "marker"] = np.nan
        if i == 1:
            frame = pd.concat([frame, frame.iloc[[7, 9]].assign(marker=1.0)], ignore_index=True)
        if i == 2:
            frame.loc[7, "marker"] = 500.0
            frame.loc[8, "week"] = 130.0
        frame.to_parquet(path, index=False)
    pd.concat(pd.read_parquet(p) for p in paths).to_parquet(tmp_path / "one.parquet", index=False)
    specs = []
    for name in ("readings", "one.parquet"):
        spec = yaml.safe_load(SPEC)
        spec["data"].update(file=name, keep_rows=[{"column": "usable", "equals": True}])
        spec["checks"].update(out_of_domain="drop", **checks)
        specs.append(tmp_path / f"{name.split('.')[0]}.yaml")
        specs[-1].write_text(yaml.safe_dump(spec, sort_keys=False))
    return specs[0], specs[1]


@pytest.mark.parametrize("duplicates", ["average", "fail"])
def test_the_checks_over_files_say_what_one_file_says(tmp_path: Path, duplicates: str) -> None:
    # Reference: the same rows read as one file and checked as a whole (the one-file path).
    folder, one = _messy(tmp_path, duplicates=duplicates)
    (here, frame), (there, whole) = _checks_of(folder), _checks_of(one)
    assert here.pop("subjects whole in one file")[0] == "pass"
    assert here == there
    assert here["missing values"][0] == "warn"
    assert here["duplicate readings"][0] == {"average": "warn", "fail": "fail"}[duplicates]
    assert here["values in declared range"][0] == "warn"
    assert here["times in declared domain"][1].endswith("(dropped)")
    if duplicates == "average":  # the files' cleaned readings are the one file's
        pd.testing.assert_frame_equal(_held_readings(folder), _ordered(whole))
        pd.testing.assert_frame_equal(_ordered(frame), _ordered(whole))


def test_a_step_that_fails_in_some_files_fails_over_all(tmp_path: Path) -> None:
    folder, one = _messy(tmp_path, missing="fail")
    (here, _), (there, _) = _checks_of(folder), _checks_of(one)
    # the one file's text, with its row of the first missing value named in its file
    before = len(pd.read_parquet(tmp_path / "readings" / "part-0.parquet"))
    expected = there["missing values"][1].replace(
        f"data row {before + 6} of the table", "data row 6 of part-1.parquet"
    )
    assert here["missing values"] == ("fail", expected)
    assert expected.startswith("2 of ")
    assert "duplicate readings" not in here  # the failed step stopped the later ones


def test_a_group_per_file_is_no_single_group(tmp_path: Path) -> None:
    # The pump example written one depot (its group) per file: each file holds one group,
    # all of them together three; the one-file run's check is the reference.
    data = pd.read_csv(ROOT / "specs" / "pump_service.csv", dtype={"pump": str})
    (tmp_path / "depots").mkdir()
    for depot, part in data.groupby("depot"):
        part.to_parquet(tmp_path / "depots" / f"{depot}.parquet", index=False)
    data.sort_values("depot", kind="stable").to_parquet(tmp_path / "one.parquet", index=False)
    text = (ROOT / "specs" / "pump_service.yaml").read_text()
    for name in ("depots", "one.parquet"):
        (tmp_path / f"{name}.yaml").write_text(
            text.replace("file: pump_service.csv", f"file: {name}")
        )
    here, _ = _checks_of(tmp_path / "depots.yaml")
    there, _ = _checks_of(tmp_path / "one.parquet.yaml")
    assert here["groups"] == there["groups"] and here["groups"][0] == "pass"
    assert here["groups"][1].startswith("3 groups: ")


def test_files_that_disagree_on_the_kind_of_time_are_refused(tmp_path: Path) -> None:
    _split(tmp_path / "readings")
    path = tmp_path / "readings" / "part-1.parquet"
    frame = pd.read_parquet(path)
    frame["week"] = pd.Timestamp("2024-01-01") + pd.to_timedelta(frame.week * 7, unit="D")
    frame.to_parquet(path, index=False)
    here, _ = _checks_of(_spec(tmp_path, "readings"))
    status, detail = here["columns typed"]
    assert status == "fail"
    assert detail.startswith(
        "column 'week' holds numbers in part-0.parquet but dates in part-1.parquet"
    )


def test_reading_many_files_brings_back_nothing_per_reading(tmp_path: Path) -> None:
    # Twice the readings per subject (each one again at 0.999 of its time), the same
    # subjects: what the reading passes bring back (pickled, as a cluster sends it to its
    # client) stays the same size.
    from reportgen.fpca.executor import InProcess
    from reportgen.inputs.loader import load_dataset
    from reportgen.inputs.spec import load_spec

    class Counting(InProcess):
        def __init__(self) -> None:
            self.sent: dict[str, int] = {}

        def map(self, fn, parts, per_part=None, shared=()):  # type: ignore[no-untyped-def]
            out = super().map(fn, parts, per_part, shared)
            self.sent[fn.__name__] = self.sent.get(fn.__name__, 0) + len(pickle.dumps(out))
            return out

    sent = []
    for copies in (1, 2):
        folder = tmp_path / f"copies-{copies}"
        _split(folder)
        for path in folder.iterdir():
            frame = pd.read_parquet(path)
            frame = pd.concat([frame.assign(week=frame.week * 0.999**k) for k in range(copies)])
            frame.to_parquet(path, index=False)
        counting = Counting()
        ds = load_dataset(load_spec(_spec(tmp_path, folder.name)), counting, for_fit=True)
        assert not ds.failed and ds.readings is not None
        assert ds.rows_read == copies * len(pd.read_csv(ROOT / "specs" / "clinic_visits.csv"))
        sent.append(counting.sent)
    few, many = sent
    assert few.keys() == many.keys() == {"file_facts", "file_design_sums"}
    for name in few:  # a few more digits in the counts, nothing per reading
        assert many[name] <= few[name] * 1.02, name


def test_files_left_without_readings_change_no_number(tmp_path: Path) -> None:
    # An empty file and a file whose every row the selection drops, beside the example's
    # three: no part is made of them, so the fit's sums are those of the three files
    # alone, bit for bit; the checks count their rows.
    _split(tmp_path / "readings")
    for path in (tmp_path / "readings").iterdir():
        pd.read_parquet(path).assign(usable=True).to_parquet(path, index=False)
    from reportgen.inputs.spec import load_spec
    from reportgen.runs.writer import build_outputs

    def tables() -> dict[str, bytes]:  # the run's tables, without rendering
        built = build_outputs(load_spec(_selecting(tmp_path, "readings")), 1, "", render=False)
        return {k: v for k, v in built.files.items() if k.startswith("tables/")}

    plain_run = tables()
    frame = pd.read_parquet(tmp_path / "readings" / "part-0.parquet")
    frame.iloc[:0].to_parquet(tmp_path / "readings" / "part-00-empty.parquet", index=False)
    frame.assign(usable=False).to_parquet(tmp_path / "readings" / "part-3.parquet", index=False)
    more = tables()
    assert sorted(more) == sorted(plain_run) and len(more) > 8
    for name, data in plain_run.items():
        if name != "tables/checks.csv":
            assert more[name] == data, name
    checks = pd.read_csv(io.BytesIO(more["tables/checks.csv"])).set_index("check")
    n = len(pd.read_csv(ROOT / "specs" / "clinic_visits.csv"))
    assert checks.loc["row selection", "detail"] == (
        f"{n + len(frame)} rows read; usable equals True: {len(frame)} dropped; {n} kept"
    )
    assert checks.loc["subjects whole in one file", "detail"].startswith("5 Parquet files")


def _selecting(tmp_path: Path, named: str) -> Path:
    spec = yaml.safe_load(SPEC)
    spec["data"].update(file=named, keep_rows=[{"column": "usable", "equals": True}])
    path = tmp_path / "selecting.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


def test_a_file_a_task_cannot_find_is_named_with_the_likely_cause(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Listed by the reportgen process, gone where the task runs (as on a worker that does
    # not mount the data): the error names the file and says what workers need.
    from reportgen.inputs import loader as folder

    _split(tmp_path / "readings")
    listed = folder.list_files

    def also_missing(path: Path, named: str) -> list[tuple[str, Path]]:
        return [*listed(path, named), ("part-9.parquet", tmp_path / "elsewhere" / "p.parquet")]

    monkeypatch.setattr(folder, "list_files", also_missing)
    with pytest.raises(
        DataError,
        match=r"'readings: part-9.parquet' is not at .* this worker "
        "does not see the data",
    ):
        run_spec(_spec(tmp_path, "readings"), tmp_path / "runs")
    assert not (tmp_path / "runs").exists() or not any((tmp_path / "runs").rglob("v0*"))


@pytest.mark.parametrize("engine", ["local", "dask"])
def test_a_file_that_cannot_be_used_is_a_message_not_a_failed_task(
    tmp_path: Path, engine: str
) -> None:
    # The value column missing from one file: one line naming the file, on either engine
    # (a cluster in the process logs to this terminal: no task failure, no traceback).
    _split(tmp_path / "readings")
    path = tmp_path / "readings" / "part-1.parquet"
    pd.read_parquet(path).drop(columns="marker").to_parquet(path, index=False)
    done = cli(
        "run", str(_spec(tmp_path, "readings")), "--out", str(tmp_path / "runs"), "--engine", engine
    )
    assert done.returncode == 2, done.stdout + done.stderr
    assert done.stderr.strip() == (
        "reportgen run: error: column(s) 'marker' not found in 'readings: part-1.parquet' "
        "(named by data.value); the file has 2 column(s): patient, week"
    )


def test_the_union_of_the_files_ids_is_pandas_factorize() -> None:
    # Reference: pandas.factorize(sort=True) of the files' ids put one after another (what
    # the union replaced): the same codes and the same sorted ids, of the same dtype.
    import pandas as pd

    from reportgen.inputs.loader import _sorted_union

    rng = np.random.default_rng(4)
    words = np.array(["b", "a", "ä", "Z", "a1", "a10", "a2", "ß", "b ", "€x", "10", "9"])
    for values in (words, np.array([7, -3, 12, 0, 5, 100, 2, 41])):
        values = values[rng.permutation(values.size)]
        files = [
            pd.Index(np.sort(part)).astype(
                pd.Series(values).convert_dtypes().dtype if values.dtype.kind == "i" else "str"
            )
            for part in np.split(values, [3, 4])
        ]
        codes, ids = _sorted_union(files)  # type: ignore[misc]
        want_codes, want_ids = pd.factorize(
            pd.concat([pd.Series(f) for f in files], ignore_index=True), sort=True
        )
        assert codes.tolist() == want_codes.tolist()
        assert ids.equals(pd.Index(want_ids)) and ids.dtype == files[0].dtype
    # an id in two files, or ids that are not text or whole numbers: the caller factorizes
    assert _sorted_union([pd.Index(["a", "b"]), pd.Index(["b", "c"])]) is None
    assert _sorted_union([pd.Index([0.5, 1.5]), pd.Index([2.5])]) is None
    assert _sorted_union([pd.Index(["a"]), pd.Index([1])]) is None


def test_a_glob_walks_no_link_and_leaves_no_folder(tmp_path: Path) -> None:
    # A link loop and a link to a system folder inside the data folder are not walked (a
    # recursive glob that followed them ran for minutes); a link to a file outside the
    # folder is refused, named (common practice, no source).
    import time

    from reportgen.errors import DataError
    from reportgen.inputs.files import list_files

    _split(tmp_path / "readings")
    (tmp_path / "readings" / "loop").symlink_to(tmp_path / "readings")
    (tmp_path / "readings" / "system").symlink_to("/usr")
    start = time.monotonic()
    listed = list_files(tmp_path / "readings" / "**" / "*.parquet", "readings/**/*.parquet")
    assert time.monotonic() - start < 5
    assert [rel for rel, _ in listed] == ["part-0.parquet", "part-1.parquet", "part-2.parquet"]
    assert [rel for rel, _ in list_files(tmp_path / "readings", "readings")] == [
        rel for rel, _ in listed
    ]
    outside = tmp_path / "elsewhere.parquet"
    shutil.copy(tmp_path / "readings" / "part-0.parquet", outside)
    (tmp_path / "readings" / "part-9.parquet").symlink_to(outside)
    with pytest.raises(DataError, match=r"'part-9\.parquet' is a link to a file outside"):
        list_files(tmp_path / "readings" / "*.parquet", "readings/*.parquet")
