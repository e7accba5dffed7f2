"""Reading the data: one orchestration over one data file or many.

``data.file`` names one file (CSV, Parquet, or a statistical package's format) or many
Parquet files (a folder or a pattern). Either way each file goes through the same passes
(module-level functions: a cluster ships them by name):

- ``read_and_check`` (kept where it ran): the file's bytes, hashed as read; the parsed
  table's row-level checks as tallies (``checks.file_checks``); its cleaned readings;
- ``file_facts``: what the caller gathers of it: its manifest entry, columns, tallies,
  rows, and of its cleaned readings the distinct subject ids (sorted) with their reading
  counts and groups, and the time and value ranges;
- ``file_design_sums``: the design checks' counts, added over the files in a fixed tree;
- ``as_part`` (kept): the cleaned readings as the fit's part, its subjects coded by the
  sorted union of every file's ids.

The caller puts the tallies together check by check (``checks.merged_steps``: the texts of
a folder are those of the same rows in one file), checks that no subject's readings lie
in two files, and runs the design checks on the gathered counts. Nothing per reading comes
back; per subject, its id, reading count and group.

The two readers differ only in where a file's task runs and what it is called. Many files
are read by tasks on the engine (on a cluster, by the workers, which must see the files);
a single file is read here, once, and its readings are placed on the engine as one part.
"""

from __future__ import annotations

import socket
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .._text import plain
from ..errors import DataError
from ..fpca.executor import Executor, InProcess, tree_sum
from .checks import FileChecks, column_check, column_labels, file_checks, merged_steps
from .design_checks import DesignSums, add_design_sums, design_checks, design_sums
from .files import DataFile, digest, is_many, list_files, read_path, sha256_bytes
from .findings import Check, Tally
from .readers import detect_format, parse_table
from .spec import Spec


@dataclass(frozen=True)
class Source:
    """One data file to read: where it is (``full``), its path in the manifest (``rel``;
    "" for a single data file) and how messages name it."""

    full: str
    rel: str
    named: str
    format: str

    @property
    def alone(self) -> bool:
        return not self.rel


@dataclass(frozen=True)
class CleanedReadings:
    """A file's cleaned readings, compact: each reading's subject as a code into ``ids``
    (the file's distinct subjects, sorted), its time and value; each subject's group (None
    without groups): the id's text once per subject, not per reading; the fit's part then
    uses these arrays as they are."""

    codes: np.ndarray
    t: np.ndarray
    y: np.ndarray
    ids: pd.Index
    groups: np.ndarray | None

    @classmethod
    def of(cls, long: pd.DataFrame) -> CleanedReadings:
        codes, ids = pd.factorize(long.subject, sort=True)
        groups = None
        if "group" in long:
            # a subject has one group (the groups check): any of its readings names it
            some = np.empty(len(ids), dtype=np.intp)
            some[codes] = np.arange(len(codes))
            groups = np.asarray(long.group.to_numpy()[some], dtype=object)
        return cls(
            codes.astype(np.intp),
            long.time.to_numpy(dtype=np.float64, copy=True),
            long.value.to_numpy(dtype=np.float64, copy=True),
            pd.Index(ids),
            groups,
        )


@dataclass(frozen=True)
class FileRead:
    """One file as its task read it (kept where the task ran): its findings and its
    cleaned readings (None when none is left)."""

    entry: DataFile
    columns: str
    check: Check  # the columns that the spec names are there
    labels: dict[str, str]
    rows_read: int
    tallies: tuple[Tally, ...]
    cleaned: CleanedReadings | None = None
    problem: str = ""  # why the file cannot be used (the rest is then empty)


@dataclass(frozen=True)
class FileFacts:
    """What the caller gathers of one file. ``ids``: the distinct subjects of its cleaned
    readings, sorted (None when none is left), with ``counts`` (readings each) and
    ``groups`` (each one's group, or None)."""

    entry: DataFile
    columns: str
    check: Check
    labels: dict[str, str]
    rows_read: int
    tallies: tuple[Tally, ...]
    ids: pd.Index | None
    counts: np.ndarray
    groups: np.ndarray | None
    t_range: tuple[float, float]
    y_range: tuple[float, float]
    problem: str = ""


@dataclass(frozen=True)
class PlacedReadings:
    """The cleaned readings as the fit's parts, where the engine keeps them: the handles
    (one part per data file, in manifest order), the subject ids (sorted: subject code
    ``i`` is ``ids[i]``; text as Arrow holds it, where a Python string costs about 60
    bytes more) and each subject's group (by code; None without groups)."""

    executor: Executor
    parts: tuple[Any, ...]
    ids: pd.Index
    groups: np.ndarray | None

    def frame(self) -> pd.DataFrame:
        """Every reading in one table (subject, time, value, and group with groups): for
        readings that are few (new subjects to predict), gathered from the parts."""
        found = self.executor.map(_part_readings, self.parts)
        codes = np.concatenate([f[0] for f in found]).astype(np.intp)
        out = pd.DataFrame(
            {
                "subject": np.asarray(self.ids)[codes],
                "time": np.concatenate([f[1] for f in found]),
                "value": np.concatenate([f[2] for f in found]),
            }
        )
        if self.groups is not None:
            out["group"] = self.groups[codes]
        return out


def _part_readings(part: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pass: a part's readings (subject codes in the whole data set, times, values)."""
    s = part.sample
    return part.subjects[s.subject], s.t, s.y


@dataclass(frozen=True)
class Dataset:
    """What the checks found, and where the cleaned readings are.

    ``files``: the data files when data.file names many (their manifest), () for one.
    ``readings``: the cleaned readings as the fit's parts, when read for a fit and no check
    failed (None otherwise).
    """

    checks: tuple[Check, ...]
    path: Path
    relpath: str
    n_bytes: int
    sha256: str
    rows_read: int
    labels: dict[str, str]  # role -> label stored in the file
    files: tuple[DataFile, ...] = ()
    readings: PlacedReadings | None = None

    @property
    def failed(self) -> list[Check]:
        return [c for c in self.checks if c.status == "fail"]


# --- the passes ------------------------------------------------------------------------------


def read_and_check(source: Source, raw: bytes | None, spec: Spec) -> FileRead:
    """Pass: read (unless ``raw`` holds the bytes already), hash, parse and check a file.
    A file that cannot be used (unreadable, unparsable, a needed column missing) is a
    finding, not a failed task: the caller raises it, for the first such file in manifest
    order, and no worker logs a task failure for a mistake in the data."""
    try:
        return _read_and_check(source, raw, spec)
    except DataError as e:
        return FileRead(
            DataFile(source.rel, 0, ""), "", Check("", "pass", ""), {}, 0, (), None, str(e)
        )


def _read_and_check(source: Source, raw: bytes | None, spec: Spec) -> FileRead:
    if raw is None:
        raw = _read_listed(source)
    entry = DataFile(source.rel, len(raw), sha256_bytes(raw))
    text = tuple(x for x in (spec.data.subject, spec.data.group) if x)
    table = replace(
        parse_table(raw, source.format, source.named, text_columns=text), file=source.rel
    )
    del raw
    if source.alone and len(table.frame) == 0:
        raise DataError(f"data.file {source.named!r} has a header but no rows")
    check = column_check(table, spec.data, source.named)  # first: it names a missing column
    found: FileChecks = file_checks(table, spec)
    return FileRead(
        entry,
        ", ".join(map(str, table.frame.columns)),
        check,
        column_labels(table, spec.data),
        len(table.frame),
        found.tallies,
        None if found.long is None else CleanedReadings.of(found.long),
    )


def _read_listed(source: Source) -> bytes:
    """A listed file's bytes, where its task runs."""
    try:
        return read_path(Path(source.full), source.named)
    except DataError:
        if Path(source.full).exists():
            raise
        # it was there when the files were listed
        raise DataError(
            f"data.file {source.named!r} is not at {source.full!r} on "
            f"{socket.gethostname()}, where its task ran, although it was listed "
            "when the run started: it was removed since, or (on a cluster) this "
            "worker does not see the data at the path that the reportgen process "
            "sees"
        ) from None


def file_facts(read: FileRead) -> FileFacts:
    """Pass: the small findings of a file."""
    c = read.cleaned
    ids, counts, groups = None, np.zeros(0, dtype=np.intp), None
    t_range = y_range = (np.nan, np.nan)
    if c is not None:
        ids, groups = c.ids, c.groups
        counts = np.bincount(c.codes, minlength=len(ids))
        t_range = (float(c.t.min()), float(c.t.max()))
        y_range = (float(c.y.min()), float(c.y.max()))
    return FileFacts(
        read.entry,
        read.columns,
        read.check,
        read.labels,
        read.rows_read,
        read.tallies,
        ids,
        counts,
        groups,
        t_range,
        y_range,
        read.problem,
    )


def file_design_sums(
    read: FileRead,
    observed: tuple[float, float],
    domain: tuple[float, float],
    spec: Spec,
    fit: bool,
) -> DesignSums:
    """Pass: the design checks' counts of a file's cleaned readings."""
    c = read.cleaned
    assert c is not None  # only files with readings are asked
    return design_sums(c.codes, c.t, observed, domain, spec, fit)  # counts: any coding


def as_part(read: FileRead, subjects: np.ndarray) -> Any:
    """Pass (kept): a file's cleaned readings as the fit's part; ``subjects``: the codes of
    its subjects (in the order of their sorted ids) in the whole data set."""
    from ..fpca.design import Sample
    from ..fpca.plan import Part

    c = read.cleaned
    assert c is not None
    # in a file sorted by subject and time no array is copied: the part shares them
    return Part(Sample.from_arrays(c.codes, c.t, c.y), np.asarray(subjects, dtype=np.intp))


# --- the orchestration ----------------------------------------------------------------------


def load_dataset(spec: Spec, executor: Executor | None = None, for_fit: bool = False) -> Dataset:
    """Read the data file (or files) and run every check; with ``for_fit`` and no failed
    check, the cleaned readings are placed on ``executor`` as the fit's parts
    (``Dataset.readings``). Raises DataError for a file that cannot be used; a failed check
    is in ``Dataset.checks`` (``require_passed`` raises it)."""
    run_on = executor or InProcess()
    d = spec.data
    if is_many(d.file, spec.data_path):
        if d.format not in ("auto", "parquet"):
            raise DataError(
                f"data.file {d.file!r} names a folder or pattern, which is read "
                f"as Parquet files; data.format says {d.format}"
            )
        listed = list_files(spec.data_path, d.file)
        sources = [Source(str(full), rel, f"{d.file}: {rel}", "parquet") for rel, full in listed]
        reads = run_on.keep(read_and_check, sources, [(None,)] * len(sources), (spec,))
        dataset = _dataset(spec, reads, run_on, run_on, for_fit, True, spec.data_path, d.file)
    else:
        dataset = load_file(spec, spec.data_path, d.file, run_on, for_fit)
    _release_arrow_memory()
    return dataset


def load_file(
    spec: Spec,
    path: Path,
    shown: str,
    executor: Executor | None = None,
    for_fit: bool = False,
    design: bool = True,
    raw: bytes | None = None,
) -> Dataset:
    """One data file at ``path`` (``shown``: how messages name it; ``raw``: its bytes, when
    read already), read here and checked as ``spec`` says; ``design=False`` leaves out the
    checks on the design (subject counts, pairs): for readings of new subjects scored with
    a stored fit."""
    if raw is None:
        raw = read_path(path, shown)
    source = Source(str(path), "", shown, detect_format(shown, spec.data.format))
    here = InProcess()
    reads = here.keep(read_and_check, [source], [(raw,)], (spec,))
    del raw
    return _dataset(spec, reads, here, executor or here, for_fit, design, path, shown)


def _dataset(
    spec: Spec,
    reads: list[Any],
    read_on: Executor,
    fit_on: Executor,
    for_fit: bool,
    design: bool,
    path: Path,
    shown: str,
) -> Dataset:
    """The files' findings put together in manifest order, the design checks, and with
    ``for_fit`` (and no failed check) the readings placed on ``fit_on`` as parts.
    ``path`` and ``shown``: where data.file is and how messages name it."""
    facts = read_on.map(file_facts, reads)
    unusable = next((f.problem for f in facts if f.problem), "")
    if unusable:
        raise DataError(unusable)
    first = facts[0]
    for f in facts[1:]:
        if f.columns != first.columns:
            raise DataError(
                f"data.file {shown!r}: {f.entry.path!r} has the columns "
                f"{f.columns}; the first file, {first.entry.path!r}, has "
                f"{first.columns}"
            )
    rows_read = sum(f.rows_read for f in facts)
    if rows_read == 0:
        raise DataError(f"data.file {shown!r} has a header but no rows")
    many = bool(first.entry.path)
    checks = [first.check]
    merged, stopped = merged_steps(spec, [f.tallies for f in facts], comparing=design)
    checks += merged
    readings = None
    if not stopped and design:
        readings = _design(spec, read_on, fit_on, reads, facts, checks, for_fit, many)
    elif not stopped and for_fit and not any(c.status == "fail" for c in checks):
        readings = _placed(read_on, fit_on, reads, facts, *_union(facts, many)[1:])
    if many:
        return Dataset(
            tuple(checks),
            path,
            shown,
            sum(f.entry.n_bytes for f in facts),
            digest([f.entry for f in facts]),
            rows_read,
            first.labels,
            tuple(f.entry for f in facts),
            readings,
        )
    return Dataset(
        tuple(checks),
        path,
        shown,
        first.entry.n_bytes,
        first.entry.sha256,
        rows_read,
        first.labels,
        (),
        readings,
    )


def _design(
    spec: Spec,
    read_on: Executor,
    fit_on: Executor,
    reads: list[Any],
    facts: list[FileFacts],
    checks: list[Check],
    for_fit: bool,
    many: bool,
) -> PlacedReadings | None:
    """After the row-level checks: with many files, whether every subject's kept readings
    lie in one file (put first in ``checks``); the design checks over all files
    (appended); and, with ``for_fit`` and no check failed, the readings placed as parts."""
    whole, codes, ids = _union(facts, many)
    if many:
        checks.insert(0, whole)
        if whole.status != "pass":
            return None
    kept = [i for i, f in enumerate(facts) if f.ids is not None]
    n_obs = np.zeros(len(ids), dtype=np.intp)
    for i, c in zip(kept, codes, strict=True):
        n_obs[c] = facts[i].counts
    t_range = (
        min((facts[i].t_range[0] for i in kept), default=np.nan),
        max((facts[i].t_range[1] for i in kept), default=np.nan),
    )
    constant = bool(kept) and min(facts[i].y_range[0] for i in kept) == max(
        facts[i].y_range[1] for i in kept
    )
    with_readings = [reads[i] for i in kept]

    def sums(observed: tuple[float, float], domain: tuple[float, float], fit: bool) -> DesignSums:
        found = read_on.map(file_design_sums, with_readings, shared=(observed, domain, spec, fit))
        return tree_sum(found, add_design_sums)

    checks += design_checks(
        spec, n_obs, t_range, constant, sums, any(x.status == "fail" for x in checks)
    )
    if not for_fit or any(x.status == "fail" for x in checks):
        return None
    return _placed(read_on, fit_on, reads, facts, codes, ids)


def _placed(
    read_on: Executor,
    fit_on: Executor,
    reads: list[Any],
    facts: list[FileFacts],
    codes: list[np.ndarray],
    ids: pd.Index,
) -> PlacedReadings:
    """The files' readings as the fit's parts: made where the files were read, and placed
    on ``fit_on`` when that is elsewhere (a single file read here, fitted on a cluster)."""
    kept = [i for i, f in enumerate(facts) if f.ids is not None]
    parts = read_on.keep(as_part, [reads[i] for i in kept], [(c,) for c in codes])
    if fit_on is not read_on:
        parts = list(fit_on.place(list(parts)))
    return PlacedReadings(fit_on, tuple(parts), ids, _groups(facts, kept, codes, len(ids)))


def require_passed(dataset: Dataset) -> None:
    """Raise DataError listing every failed check."""
    failed = dataset.failed
    if failed:
        detail = "; ".join(f"{c.name}: {c.detail}" for c in failed)
        raise DataError(f"data checks failed for {dataset.relpath!r}: {detail}")


def _release_arrow_memory() -> None:
    """Hand back to the system what Arrow's allocator keeps after reading: it would hold on
    to freed blocks for the whole run."""
    import pyarrow

    pyarrow.default_memory_pool().release_unused()


# --- the subjects of all files ------------------------------------------------------------------


def _union(facts: list[FileFacts], many: bool) -> tuple[Check, list[np.ndarray], pd.Index]:
    """Whether every subject's readings lie in one file; each file's subject codes in the
    whole data set (by sorted id); the sorted ids. One file's ids are sorted already."""
    kept = [f for f in facts if f.ids is not None]
    n_files = len(facts)
    if not kept:
        return _whole(n_files), [], pd.Index([])
    if not many:
        ids = kept[0].ids
        assert ids is not None
        return _whole(n_files), [np.arange(len(ids), dtype=np.intp)], ids
    sizes = [len(f.ids) for f in kept if f.ids is not None]
    union = _sorted_union([f.ids for f in kept if f.ids is not None])
    if union is not None:
        codes, ids = union
        return _whole(n_files), np.split(codes, np.cumsum(sizes)[:-1]), ids
    every = pd.concat([pd.Series(f.ids) for f in kept], ignore_index=True)
    found, ids = pd.factorize(every, sort=True)
    found = found.astype(np.intp)
    count = np.bincount(found, minlength=len(ids))
    split = count[found] > 1
    if not split.any():
        return _whole(n_files), np.split(found, np.cumsum(sizes)[:-1]), ids
    which = np.repeat(np.arange(len(kept)), sizes)
    code = found[int(np.flatnonzero(split)[0])]  # the first met, in manifest order
    where = [kept[int(f)].entry.path for f in which[found == code]]
    return (
        Check(
            "subjects whole in one file",
            "fail",
            f"{int((count > 1).sum())} subject(s) have kept readings in more than one of "
            f"the {n_files} files, e.g. subject {plain(ids[code])} in "
            f"{', '.join(where[:3])}; write the data partitioned by subject (all of a "
            "subject's readings in one file)",
        ),
        [],
        ids,
    )


def _sorted_union(indexes: list[pd.Index]) -> tuple[np.ndarray, pd.Index] | None:
    """The codes of the files' ids in their sorted union, and that union, when no id is in
    two files and all are text or whole numbers: by one sort of the ids as Arrow arrays
    (about half the time and memory of a hash table of them; benchmarks/ENGINES.md). None
    otherwise: the caller factorizes and names the split subjects."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if len({ix.dtype for ix in indexes}) != 1:
        return None
    pieces: list[Any] = []
    for ix in indexes:  # Arrow text comes as it is held (a chunked array), others copied
        found = pa.array(ix.array)
        pieces += found.chunks if isinstance(found, pa.ChunkedArray) else [found]
    try:  # (a chunked array of chunked arrays would be read value by value)
        every = pa.chunked_array(pieces, type=pieces[0].type)
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError, TypeError):
        return None
    kind = every.type
    if every.null_count or not (
        pa.types.is_string(kind) or pa.types.is_large_string(kind) or pa.types.is_integer(kind)
    ):
        return None  # text and whole numbers only: no NaN, no two spellings of one value
    order = pc.sort_indices(every)
    ids = every.take(order)
    del every
    if len(ids) > 1 and pc.any(pc.equal(ids[1:], ids[:-1])).as_py():
        return None
    codes = np.empty(len(ids), dtype=np.intp)
    codes[order.to_numpy()] = np.arange(len(ids), dtype=np.intp)
    return codes, pd.Index(pd.array(ids.to_pandas(), dtype=indexes[0].dtype))


def _whole(n_files: int) -> Check:
    return Check(
        "subjects whole in one file",
        "pass",
        f"{n_files} Parquet files; every subject's kept readings are in one of them",
    )


def _groups(
    facts: list[FileFacts], kept: list[int], codes: list[np.ndarray], n: int
) -> np.ndarray | None:
    """Each subject's group, by code (None without groups)."""
    if not kept or facts[kept[0]].groups is None:
        return None
    out = np.empty(n, dtype=object)
    for i, c in zip(kept, codes, strict=True):
        out[c] = facts[i].groups
    # one string object per group, not per subject (each came back from its file as a
    # string of its own, where a reference takes 8 bytes)
    labels = pd.Categorical(out)
    if np.any(labels.codes < 0):  # a missing group (not one string): as they came
        return out
    interned: np.ndarray = np.asarray(labels.categories, dtype=object)[labels.codes]
    return interned
