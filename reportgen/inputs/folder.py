"""Data given as many Parquet files (a folder or a pattern): each file is read, hashed,
checked and cleaned by a task of its own, wherever the executor runs it (here, or on a
Dask worker that sees the same storage); only small findings come back.

The passes (module-level functions: a cluster ships them by name):

- ``read_and_check`` (kept where it ran): the file's bytes, hashed as read; the parsed table's
  row-level checks as tallies (``data.file_checks``); its cleaned readings;
- ``file_facts``: what the caller gathers of it: its manifest entry, columns, tallies,
  rows, and of its cleaned readings the distinct subject ids (sorted) with their reading
  counts and groups, and the time and value ranges;
- ``file_design_sums``: the design checks' counts, added over the files in a fixed tree;
- ``as_part`` (kept): the cleaned readings as the fit's part, its subjects coded by the
  sorted union of every file's ids.

The caller puts the tallies together check by check (``data.merged_steps``: the texts of
a folder are those of the same rows in one file), checks that no subject's readings lie
in two files, and runs the design checks on the gathered counts. Nothing per reading comes
back; per subject, its id, reading count and group.
"""

from __future__ import annotations

import hashlib
import socket
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..errors import DataError
from ..fpca.executor import Executor, InProcess, tree_sum
from .checks import (
    Check,
    Dataset,
    DesignSums,
    FileChecks,
    Held,
    Tally,
    add_design_sums,
    column_check,
    column_labels,
    design_checks,
    design_sums,
    empty_readings,
    file_checks,
    merged_steps,
    read_path,
)
from .files import Part, list_files
from .files import digest as manifest_digest
from .readers import parse_table, plain
from .spec import Spec


@dataclass(frozen=True)
class Cleaned:
    """A file's cleaned readings, compact: each reading's subject as a code into ``ids``
    (the file's distinct subjects, sorted), its time and value; each subject's group (None
    without groups). About 24 bytes a reading where the cleaned table took about 35 (the
    id's text, per reading); the fit's part then uses these arrays as they are."""

    codes: np.ndarray
    t: np.ndarray
    y: np.ndarray
    ids: pd.Index
    groups: np.ndarray | None

    @classmethod
    def of(cls, long: pd.DataFrame) -> Cleaned:
        codes, ids = pd.factorize(long.subject, sort=True)
        groups = None
        if "group" in long:
            # a subject has one group (the groups check): any of its readings names it
            some = np.empty(len(ids), dtype=np.intp)
            some[codes] = np.arange(len(codes))
            groups = np.asarray(long.group.to_numpy()[some], dtype=object)
        return cls(codes.astype(np.intp), long.time.to_numpy(dtype=np.float64, copy=True),
                   long.value.to_numpy(dtype=np.float64, copy=True), pd.Index(ids), groups)


@dataclass(frozen=True)
class FileRead:
    """One file as its task read it (kept where the task ran): its findings (their
    cleaned table left out) and its cleaned readings (None when none is left)."""

    part: Part
    columns: str
    check: Check  # the columns that the spec names are there
    labels: dict[str, str]
    rows_read: int
    found: FileChecks
    cleaned: Cleaned | None = None
    problem: str = ""  # why the file cannot be used (the rest is then empty)


@dataclass(frozen=True)
class FileFacts:
    """What the caller gathers of one file. ``ids``: the distinct subjects of its cleaned
    readings, sorted (None when none is left), with ``counts`` (readings each) and
    ``groups`` (each one's group, or None)."""

    part: Part
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


def read_and_check(full: str, rel: str, spec: Spec) -> FileRead:
    """Pass: read, hash, parse and check the file at ``full`` (``rel``: its manifest
    path). A file that cannot be used (unreadable, not Parquet, a needed column missing)
    is a finding, not a failed task: the caller raises it, for the first such file in
    manifest order, and no worker logs a task failure for a mistake in the data."""
    try:
        return _read_and_check(full, rel, spec)
    except DataError as e:
        return FileRead(Part(rel, 0, ""), "", Check("", "", ""), {}, 0, FileChecks((), None),
                        None, str(e))


def _read_and_check(full: str, rel: str, spec: Spec) -> FileRead:
    named = f"{spec.data['file']}: {rel}"
    try:
        raw, _ = read_path(Path(full), named)
    except DataError:
        if Path(full).exists():
            raise
        # it was there when the files were listed
        raise DataError(f"data.file {named!r} is not at {full!r} on {socket.gethostname()}, "
                        "where its task ran, although it was listed when the run started: "
                        "it was removed since, or (on a cluster) this worker does not see "
                        "the data at the path that the reportgen process sees") from None
    part = Part(rel, len(raw), hashlib.sha256(raw).hexdigest())
    table = replace(parse_table(raw, "parquet", named), file=rel)
    del raw
    check = column_check(table, spec.data, named)  # first: it names a missing column
    labels = column_labels(table, spec.data)
    found = file_checks(table, spec)
    return FileRead(part, ", ".join(map(str, table.frame.columns)), check, labels,
                    len(table.frame), replace(found, long=None),
                    None if found.long is None else Cleaned.of(found.long))


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
    return FileFacts(read.part, read.columns, read.check, read.labels, read.rows_read,
                     read.found.tallies, ids, counts, groups, t_range, y_range, read.problem)


def file_design_sums(read: FileRead, observed: tuple[float, float],
                     domain: tuple[float, float], spec: Spec, fit: bool) -> DesignSums:
    """Pass: the design checks' counts of a file's cleaned readings."""
    c = read.cleaned
    assert c is not None  # only files with readings are asked
    return design_sums(c.codes, c.t, observed, domain, spec, fit)  # counts: any coding


def as_part(read: FileRead, subjects: np.ndarray) -> Any:
    """Pass (kept): a file's cleaned readings as the fit's part; ``subjects``: the codes of
    its subjects (in the order of their sorted ids) in the whole data set."""
    from ..fpca.design import Sample
    from ..fpca.plan import Part as FitPart

    c = read.cleaned
    assert c is not None
    # in a file sorted by subject and time no array is copied: the part shares them
    return FitPart(Sample.from_arrays(c.codes, c.t, c.y), np.asarray(subjects, dtype=np.intp))


def dataset_from_files(spec: Spec, executor: Executor | None, for_fit: bool) -> Dataset:
    """Every Parquet file that ``data.file`` names, read and checked by its own task on
    ``executor`` (here by default), the findings put together in manifest order."""
    d, shown = spec.data, spec.data["file"]
    if d["format"] not in ("auto", "parquet"):
        raise DataError(f"data.file {shown!r} names a folder or pattern, which is read as "
                        f"Parquet files; data.format says {d['format']}")
    listed = list_files(spec.data_path, shown)
    run_on = executor or InProcess()
    files = run_on.keep(read_and_check, [str(full) for _, full in listed],
                        [(rel,) for rel, _ in listed], (spec,))
    facts = run_on.map(file_facts, files)
    unusable = next((f.problem for f in facts if f.problem), "")
    if unusable:
        raise DataError(unusable)
    first = facts[0]
    for f in facts[1:]:
        if f.columns != first.columns:
            raise DataError(f"data.file {shown!r}: {f.part.path!r} has the columns "
                            f"{f.columns}; the first file, {first.part.path!r}, has "
                            f"{first.columns}")
    rows_read = sum(f.rows_read for f in facts)
    if rows_read == 0:
        raise DataError(f"data.file {shown!r} has a header but no rows")
    parts = tuple(f.part for f in facts)
    checks = [first.check]
    merged, stopped = merged_steps(spec, [f.tallies for f in facts])
    checks += merged
    held = None if stopped else _design(spec, run_on, files, facts, checks, for_fit)
    return Dataset(empty_readings(spec), tuple(checks), spec.data_path, shown,
                   sum(p.n_bytes for p in parts), manifest_digest(parts), rows_read,
                   first.labels, parts, held)


def _design(spec: Spec, run_on: Executor, files: list[Any], facts: list[FileFacts],
            checks: list[Check], for_fit: bool) -> Held | None:
    """After the row-level checks: whether every subject's kept readings lie in one file
    (put first in ``checks``), the design checks over all files (appended), and, with
    ``for_fit`` and no check failed, the files' readings as the fit's parts."""
    kept = [i for i, f in enumerate(facts) if f.ids is not None]
    whole, codes, ids = _subjects([facts[i] for i in kept], len(facts))
    checks.insert(0, whole)
    if whole.status != "pass":
        return None
    n_obs = np.zeros(len(ids), dtype=np.intp)
    for i, c in zip(kept, codes, strict=True):
        n_obs[c] = facts[i].counts
    t_range = (min((facts[i].t_range[0] for i in kept), default=np.nan),
               max((facts[i].t_range[1] for i in kept), default=np.nan))
    constant = bool(kept) and min(facts[i].y_range[0] for i in kept) == max(
        facts[i].y_range[1] for i in kept)
    reads = [files[i] for i in kept]

    def sums(observed: tuple[float, float], domain: tuple[float, float], fit: bool
             ) -> DesignSums:
        found = run_on.map(file_design_sums, reads, shared=(observed, domain, spec, fit))
        return tree_sum(found, add_design_sums)

    checks += design_checks(spec, n_obs, t_range, constant, sums,
                            any(x.status == "fail" for x in checks))
    if not for_fit or any(x.status == "fail" for x in checks):
        return None
    return Held(tuple(run_on.keep(as_part, reads, [(c,) for c in codes])), ids,
                _groups(facts, kept, codes, len(ids)))


def _subjects(facts: list[FileFacts], n_files: int
              ) -> tuple[Check, list[np.ndarray], pd.Index]:
    """Whether every subject's readings lie in one file; each file's subject codes in the
    whole data set (by sorted id); the sorted ids."""
    if not facts:
        return _whole(n_files), [], pd.Index([])
    sizes = [len(f.ids) for f in facts if f.ids is not None]
    union = _sorted_union([f.ids for f in facts if f.ids is not None])
    if union is not None:
        codes, ids = union
        return _whole(n_files), np.split(codes, np.cumsum(sizes)[:-1]), ids
    every = pd.concat([pd.Series(f.ids) for f in facts], ignore_index=True)
    codes, ids = pd.factorize(every, sort=True)
    codes = codes.astype(np.intp)
    count = np.bincount(codes, minlength=len(ids))
    split = count[codes] > 1
    if not split.any():
        return _whole(n_files), np.split(codes, np.cumsum(sizes)[:-1]), ids
    which = np.repeat(np.arange(len(facts)), sizes)
    code = codes[int(np.flatnonzero(split)[0])]  # the first met, in manifest order
    where = [facts[int(f)].part.path for f in which[codes == code]]
    return Check("subjects whole in one file", "fail",
                 f"{int((count > 1).sum())} subject(s) have kept readings in more than one of "
                 f"the {n_files} files, e.g. subject {plain(ids[code])} in "
                 f"{', '.join(where[:3])}; write the data partitioned by subject (all of a "
                 "subject's readings in one file)"), [], ids


def _sorted_union(indexes: list[pd.Index]) -> tuple[np.ndarray, pd.Index] | None:
    """The codes of the files' ids in their sorted union, and that union, when no id is in
    two files and all are text or whole numbers: by one sort of the ids as Arrow arrays.
    (Factorizing them takes a hash table: at 10^7 ids of 10 characters in 64 files, 1.0 GB
    more and 3.8 s, against 0.5 GB and 2.6 s; measured alone.) None otherwise: the caller
    factorizes and names the split subjects."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if len({ix.dtype for ix in indexes}) != 1:
        return None
    pieces: list[Any] = []
    for ix in indexes:  # Arrow text comes as it is held (a chunked array), others copied
        found = pa.array(ix.array)
        pieces += found.chunks if isinstance(found, pa.ChunkedArray) else [found]
    try:  # (a chunked array of chunked arrays would be read value by value: 6 s at 10^7)
        every = pa.chunked_array(pieces, type=pieces[0].type)
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError, TypeError):
        return None
    kind = every.type
    if every.null_count or not (pa.types.is_string(kind) or pa.types.is_large_string(kind)
                                or pa.types.is_integer(kind)):
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
    return Check("subjects whole in one file", "pass",
                 f"{n_files} Parquet files; every subject's kept readings are in one of them")


def _groups(facts: list[FileFacts], kept: list[int], codes: list[np.ndarray], n: int
            ) -> np.ndarray | None:
    """Each subject's group, by code (None without groups)."""
    if not kept or facts[kept[0]].groups is None:
        return None
    out = np.empty(n, dtype=object)
    for i, c in zip(kept, codes, strict=True):
        out[c] = facts[i].groups
    # one string object per group, not per subject (each came back from its file as a
    # string of its own: 71 bytes a subject, measured, where a reference takes 8)
    labels = pd.Categorical(out)
    if np.any(labels.codes < 0):  # a missing group (not one string): as they came
        return out
    return np.asarray(labels.categories, dtype=object)[labels.codes]
