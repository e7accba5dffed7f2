"""Reading the data file and the data checks (each reported as pass, warn or fail).

The order of the steps, each one a line of the checks table: the columns; the row
selection (``data.keep_rows``); the types (dates need an origin); the time origin; the log
transform; missing values; duplicates; the declared value range and time domain; the
design (subjects, single readings, pairs). A failed step stops the later ones; the run
refuses the data only after every step that could run has reported.

The row-level steps run file by file (a single file is one file): each step leaves a
``Tally`` (counts and first examples) per file, and a ``_say_*`` function turns the tallies
of every file into the step's check, adding the counts and quoting the first file's
example. So a folder of Parquet files is never held as one raw table, the texts of a
folder and of the same rows in one file agree (tests/cli/test_parts.py), and the per-file
step can move to where the file is (a cluster's workers) without changing a word. The
design steps run on the cleaned readings of all files.
"""

from __future__ import annotations

import hashlib
import os
import stat
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from ..errors import DataError
from .files import Part, is_many
from .readers import Table, detect_format, is_date_column, looks_like_dates, parse_table, plain
from .spec import Spec

if TYPE_CHECKING:
    from ..fpca.executor import Executor
    from ..fpca.feasibility import DesignCounts

SCALE_DAYS = {"hours": 1 / 24, "days": 1.0, "weeks": 7.0, "months": 365.25 / 12,
              "years": 365.25}
DATE_HINT = ("set data.time_origin to an ISO date (a calendar origin), to \"first\" (each "
             "subject's first reading) or to {column: NAME} (each subject's baseline date in "
             "that column), and data.time_scale to days, weeks, months, years or hours")


@dataclass(frozen=True)
class Check:
    name: str
    status: str  # pass | warn | fail
    detail: str


@dataclass(frozen=True)
class Held:
    """The cleaned readings of many files as the fit's parts, left where the files were
    read: the executor's handles (in manifest order), the subject ids (sorted: subject code
    ``i`` is ``ids[i]``; text as Arrow holds it, its characters and an offset, where a
    Python string costs about 60 bytes more) and each subject's group (by code; None
    without groups)."""

    parts: tuple[Any, ...]
    ids: pd.Index
    groups: np.ndarray | None


@dataclass(frozen=True)
class Dataset:
    """Cleaned long table (columns subject, time, value, group when the spec names one)
    and what the checks found. When data.file names many files the table is empty: their
    readings stay where they were read (``held``, when read for a fit)."""

    frame: pd.DataFrame
    checks: tuple[Check, ...]
    path: Path
    relpath: str
    n_bytes: int
    sha256: str
    rows_read: int
    labels: dict[str, str] = field(default_factory=dict)  # role -> label stored in the file
    parts: tuple[Part, ...] = ()  # data.file names many Parquet files: these, in order
    held: Held | None = None  # many files read for a fit: their readings, as parts

    @property
    def failed(self) -> list[Check]:
        return [c for c in self.checks if c.status == "fail"]


def read_file(spec: Spec) -> tuple[bytes, Path]:
    """The data file's bytes, read once (read-only); refuses directories and devices."""
    return read_path(spec.data_path, spec.data["file"])


def read_path(path: Path, shown: str, what: str = "data.file") -> tuple[bytes, Path]:
    """The bytes of ``path`` (``shown`` is how the user named it, ``what`` the field or
    argument that named it)."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise DataError(f"{what} {shown!r} does not exist (looked for {str(path)!r})") from None
    except (OSError, ValueError) as e:  # ValueError: an embedded NUL byte in the path
        reason = getattr(e, "strerror", None) or str(e)
        raise DataError(f"{what} {shown!r} cannot be read: {reason}") from e
    if stat.S_ISDIR(st.st_mode):
        raise DataError(f"{what} {shown!r} is a directory; give a data file")
    if not stat.S_ISREG(st.st_mode):
        raise DataError(f"{what} {shown!r} is not a regular file (device, pipe or socket)")
    try:
        with open(path, "rb") as fh:
            return fh.read(), path
    except OSError as e:
        raise DataError(f"{what} {shown!r} cannot be read: {e.strerror}") from e


def _columns_needed(d: dict[str, Any]) -> list[tuple[str, str]]:
    """(field, column) for every column that the data section names."""
    out = [("data.subject", d["subject"]), ("data.time", d["time"]), ("data.value", d["value"])]
    if d.get("group"):
        out.append(("data.group", d["group"]))
    origin = d.get("time_origin")
    if isinstance(origin, dict):
        out.append(("data.time_origin.column", origin["column"]))
    for i, cond in enumerate(d.get("keep_rows", [])):
        out.append((f"data.keep_rows[{i}].column", cond["column"]))
    return out


def column_check(table: Table, d: dict[str, Any], shown: str) -> Check:
    frame = table.frame
    missing = [(f, c) for f, c in _columns_needed(d) if c not in frame.columns]
    if missing:
        have = ", ".join(map(str, frame.columns))
        hint = ""
        if len(frame.columns) == 1 and table.format == "csv":
            hint = (" (the file has a single column: is it separated by something other than "
                    "commas, semicolons, tabs or vertical bars?)")
        cols = ", ".join(repr(c) for _, c in missing)
        fields = ", ".join(f for f, _ in missing)
        raise DataError(f"column(s) {cols} not found in {shown!r} (named by {fields}){hint}; "
                        f"the file has {len(frame.columns)} column(s): {have}")
    found = [d["subject"], d["time"], d["value"]] + ([d["group"]] if d.get("group") else [])
    parts = []
    for c in found:
        label = table.labels.get(c)
        fmt = table.formats.get(c)
        extra = "; ".join(x for x in (f"label {label!r}" if label else "",
                                      f"format {fmt}" if fmt else "") if x)
        parts.append(f"{c} ({extra})" if extra else c)
    sep = (f"; fields separated by {table.describe_delimiter()}"
           if table.format == "csv" and table.delimiter != "," else "")
    return Check("columns present", "pass", f"{', '.join(parts)} found ({table.format}{sep})")


def _condition_text(cond: dict[str, Any]) -> str:
    col = cond["column"]
    if "equals" in cond:
        return f"{col} equals {plain(cond['equals'])}"
    if "in" in cond:
        return f"{col} in [{', '.join(plain(v) for v in cond['in'])}]"
    lo, hi = cond["between"]
    return f"{col} between {plain(lo)} and {plain(hi)}"


def _as_column_values(series: pd.Series, values: list[Any], where: str) -> pd.Series | list[Any]:
    """The condition's values in the column's type (numbers, dates or text)."""
    if is_date_column(series):
        try:
            return [pd.Timestamp(v) for v in values]
        except (ValueError, TypeError):
            raise DataError(f"{where}: column {series.name!r} holds dates; give ISO dates "
                            f"such as 2024-01-31, not {', '.join(plain(v) for v in values)}"
                            ) from None
    if pd.api.types.is_bool_dtype(series):
        return values
    if pd.api.types.is_numeric_dtype(series):
        bad = [v for v in values if isinstance(v, str) or isinstance(v, bool)]
        if bad:
            raise DataError(f"{where}: column {series.name!r} holds numbers; got "
                            f"{plain(bad[0])}")
        return values
    return [v if isinstance(v, str) else plain(v) for v in values]


def _mask(series: pd.Series, cond: dict[str, Any], where: str) -> np.ndarray:
    if "between" in cond:
        lo, hi = _as_column_values(series, list(cond["between"]), where)
        if isinstance(lo, str) or isinstance(hi, str):
            raise DataError(f"{where}: between needs a column of numbers or dates; "
                            f"{series.name!r} holds text")
        return np.asarray((series >= lo) & (series <= hi), dtype=bool)
    values = [cond["equals"]] if "equals" in cond else list(cond["in"])
    wanted = _as_column_values(series, values, where)
    column = series if (pd.api.types.is_numeric_dtype(series) or is_date_column(series)) \
        else series.astype("string")
    return np.asarray(column.isin(wanted), dtype=bool)


def _select_rows(table: Table, conditions: list[dict[str, Any]]) -> tuple[np.ndarray, Tally]:
    """The rows that meet every condition; the tally counts rows read, rows each condition
    dropped and rows kept."""
    frame = table.frame
    keep = np.ones(len(frame), dtype=bool)
    dropped = []
    for i, cond in enumerate(conditions):
        mask = _mask(frame[cond["column"]], cond, f"data.keep_rows[{i}]")
        dropped.append(int(np.count_nonzero(keep & ~mask)))
        keep &= mask
    return keep, Tally("row selection", (len(frame), *dropped, int(keep.sum())))


def _say_selection(tallies: list[Tally], spec: Spec) -> Check:
    n = _totals(tallies)
    parts = [f"{n[0]} rows read"]
    parts += [f"{_condition_text(cond)}: {dropped} dropped"
              for cond, dropped in zip(spec.data["keep_rows"], n[1:-1], strict=True)]
    parts.append(f"{n[-1]} kept")
    detail = "; ".join(parts) + ("" if n[-1] else " (no row meets every condition)")
    return Check("row selection", "pass" if n[-1] else "fail", detail)


def _describe_row(table: Table, rows: np.ndarray, frame: pd.DataFrame, i: int,
                  column: str) -> str:
    """Where selected row ``i`` was in the file, and its value."""
    return f"{table.where(int(rows[i]))} (column {column!r}, value {plain(frame[column].iloc[i])})"


def _numbers_or_dates(series: pd.Series) -> tuple[str, np.ndarray, np.ndarray]:
    """("dates", days since 1970, bad) or ("numbers", values, bad); bad: unparseable rows."""
    if is_date_column(series) or looks_like_dates(series):
        stamps = pd.to_datetime(series, errors="coerce", format="mixed") \
            if not is_date_column(series) else series
        bad = stamps.isna().to_numpy() & series.notna().to_numpy()
        days = (stamps - pd.Timestamp("1970-01-01")) / pd.Timedelta(days=1)
        return "dates", days.to_numpy(dtype=np.float64, na_value=np.nan), bad
    numeric = pd.to_numeric(series, errors="coerce")
    bad = numeric.isna().to_numpy() & series.notna().to_numpy()
    return "numbers", numeric.to_numpy(dtype=np.float64, na_value=np.nan), bad


def _times(frame: pd.DataFrame, d: dict[str, Any]) -> tuple[str, np.ndarray, np.ndarray, str]:
    """(kind, absolute times, rows that are not times, problem); dates in days."""
    kind, t, bad = _numbers_or_dates(frame[d["time"]])
    origin = d.get("time_origin")
    if kind == "dates" and origin is None:
        return kind, t, bad, f"column {d['time']!r} holds dates; {DATE_HINT}"
    if kind == "numbers" and isinstance(origin, str) and origin != "first":
        if bad.any():
            return kind, t, bad, (f"data.time_origin is a date but column {d['time']!r} "
                                  "holds values that are neither numbers nor dates")
        return kind, t, bad, (f"data.time_origin is a calendar date but column {d['time']!r} "
                              "holds numbers; leave time_origin out (or use first, or "
                              "{column: NAME}) for numeric times")
    return kind, t, bad, ""


def _origin(frame: pd.DataFrame, d: dict[str, Any], kind: str, t: np.ndarray,
            subj: pd.Series) -> tuple[np.ndarray, str]:
    """Per-row origin in the time column's units (days for dates), and a problem."""
    origin = d.get("time_origin")
    if origin is None:
        return np.zeros_like(t), ""
    codes = pd.factorize(subj)[0]
    if origin == "first":
        first = np.full(int(codes.max()) + 1, np.inf)
        np.minimum.at(first, codes, np.where(np.isfinite(t), t, np.inf))
        return first[codes], ""
    if isinstance(origin, str):
        day = (pd.Timestamp(origin) - pd.Timestamp("1970-01-01")) / pd.Timedelta(days=1)
        return np.full_like(t, day), ""
    column = origin["column"]
    base_kind, base, bad = _numbers_or_dates(frame[column])
    if base_kind != kind:
        return base, (f"data.time_origin.column {column!r} holds {base_kind} but the time "
                      f"column {d['time']!r} holds {kind}")
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        return base, (f"data.time_origin.column {column!r}: value "
                      f"{plain(frame[column].iloc[i])} is not one of the {kind}")
    per = pd.DataFrame({"c": codes, "b": base}).dropna().groupby("c")["b"].nunique()
    if (per > 1).any():
        subject = frame[d["subject"]].iloc[int(np.flatnonzero(codes == per.index[
            int(np.flatnonzero(per.to_numpy() > 1)[0])])[0])]
        return base, (f"data.time_origin.column {column!r} holds more than one baseline for "
                      f"subject {plain(subject)}; a baseline is one value per subject")
    return base, ""


def load_dataset(spec: Spec, executor: Executor | None = None, for_fit: bool = False
                 ) -> Dataset:
    """Read the file (or files) and run every check. Fails (DataError) only after all
    checks ran.

    Many files are read, checked and cleaned by tasks on ``executor`` (here, one after
    another, by default); with ``for_fit`` their readings are left there as the fit's parts
    (``Dataset.held``).
    """
    if is_many(spec.data["file"], spec.data_path):
        from .folder import dataset_from_files

        dataset = dataset_from_files(spec, executor, for_fit)
    else:
        raw, path = read_file(spec)
        dataset = dataset_from_bytes(raw, path, spec, design=True)
    _release_arrow_memory()
    return dataset


def _release_arrow_memory() -> None:
    """Hand back to the system what Arrow's allocator keeps after reading: it holds on to
    freed blocks, 0.2 GB after loading 4.5 million readings, for the whole run."""
    import pyarrow

    pyarrow.default_memory_pool().release_unused()


def dataset_from_bytes(raw: bytes, path: Path, spec: Spec, design: bool = True,
                       shown: str | None = None) -> Dataset:
    """The checks on ``raw`` read as the spec's data section says.

    ``design=False`` leaves out the checks on the design (subject counts, pairs): for
    readings of new subjects scored with a stored fit.
    """
    d = spec.data
    shown = shown or d["file"]
    fmt = detect_format(shown, d["format"])
    text = tuple(x for x in (d["subject"], d.get("group")) if x)
    table = parse_table(raw, fmt, shown, text_columns=text)
    if len(table.frame) == 0:
        raise DataError(f"data.file {shown!r} has a header but no rows")
    checks = [column_check(table, d, shown)]
    found = file_checks(table, spec)
    merged, stopped = merged_steps(spec, [found.tallies])
    checks += merged
    long = found.long if found.long is not None and not stopped else empty_readings(spec)
    if design and not stopped:
        codes = pd.factorize(long.subject)[0].astype(np.intp)
        t = long.time.to_numpy(dtype=np.float64)
        y = long.value.to_numpy(dtype=np.float64)
        span = (float(t.min()), float(t.max())) if t.size else (np.nan, np.nan)
        checks += design_checks(
            spec, np.bincount(codes), span, bool(y.size) and float(np.ptp(y)) == 0.0,
            lambda observed, domain, fit: design_sums(codes, t, observed, domain, spec, fit),
            any(x.status == "fail" for x in checks))
    return Dataset(long, tuple(checks), path, shown, len(raw),
                   hashlib.sha256(raw).hexdigest(), len(table.frame), column_labels(table, d))


def column_labels(table: Table, d: dict[str, Any]) -> dict[str, str]:
    """The labels the file stores for the time and value columns."""
    return {role: table.labels[d[role]] for role in ("time", "value")
            if table.labels.get(d[role])}


@dataclass(frozen=True)
class Tally:
    """What one step found in one file, before the files' findings are put together:
    counts, added over the files, and first examples, the first file's (in manifest order)
    that has one. ``sizes``: subjects per group (the groups step); ``file``: the file."""

    step: str
    n: tuple[int, ...] = ()
    first: tuple[str, ...] = ()
    sizes: tuple[tuple[str, int], ...] = ()
    file: str = ""


@dataclass(frozen=True)
class FileChecks:
    """One file's findings and its cleaned readings (None: a step stopped the file, or no
    reading of it was left)."""

    tallies: tuple[Tally, ...]
    long: pd.DataFrame | None


def _totals(tallies: list[Tally]) -> list[int]:
    return [int(x) for x in np.sum([t.n for t in tallies], axis=0)]


def _first(tallies: list[Tally], slot: int) -> str:
    return next((t.first[slot] for t in tallies if t.first[slot]), "")


def file_checks(table: Table, spec: Spec) -> FileChecks:
    """The row-level steps on one parsed file, each leaving a tally.

    A file stops where its own rows make a step fail; it is not stopped by what only all
    files together decide (no row kept, every row missing, one group only): it then
    contributes no readings, and the merged check decides."""
    d = spec.data
    found: list[Tally] = []
    frame, rows = table.frame, np.arange(len(table.frame))
    if len(frame) and d.get("keep_rows"):
        keep, tally = _select_rows(table, d["keep_rows"])
        found.append(tally)
        rows = rows[keep]
        frame = frame.loc[keep].reset_index(drop=True)
    long = _typed(frame, rows, table, spec, found) if len(frame) else None
    if long is not None:
        long = _cleaned(long, table, spec, found)
    return FileChecks(tuple(found), long)


_STEPS_THAT_STOP = {"row selection", "columns typed", "log transform", "missing values",
                    "groups"}


def merged_steps(spec: Spec, tallies: list[tuple[Tally, ...]]) -> tuple[list[Check], bool]:
    """The files' tallies (one tuple per file, in manifest order) put together step by step,
    and whether a failed step stopped the later ones."""
    say = {"row selection": _say_selection, "columns typed": _say_typed,
           "log transform": _say_log, "missing values": _say_missing, "groups": _say_groups,
           "duplicate readings": _say_duplicates}
    steps = ["row selection", "columns typed", "log transform", "missing values", "groups",
             "duplicate readings", "values in declared range",
             *(name for name, _ in data_domains(spec))]
    checks = []
    for step in steps:
        these = [t for file in tallies for t in file if t.step == step]
        check = (say[step](these, spec) if step in say else _say_range(step, these, spec)
                 ) if these else None
        if check is not None:
            checks.append(check)
            if check.status == "fail" and step in _STEPS_THAT_STOP:
                return checks, True
    return checks, False


def empty_readings(spec: Spec) -> pd.DataFrame:
    columns = ["subject", "time", "value"] + (["group"] if spec.data.get("group") else [])
    return pd.DataFrame({c: [] for c in columns})


@dataclass(frozen=True)
class DesignSums:
    """The design checks' counts of some of the readings, added over files: pairs per cell
    pair of the 10 x 10 partition of the time-pair square (over the readings' range), and
    the feasibility test's counts on the fit's domain (None when not asked for)."""

    cells: np.ndarray
    fit: DesignCounts | None


def design_sums(subject: np.ndarray, t: np.ndarray, observed: tuple[float, float],
                domain: tuple[float, float], spec: Spec, fit: bool) -> DesignSums:
    """The counts of these readings (``subject``: codes 0 .. m - 1)."""
    from ..fpca.feasibility import count_design

    cells = 10
    lo, hi = observed
    pairs: np.ndarray = np.zeros((cells, cells))
    if hi > lo and subject.size:
        cell = np.minimum(((t - lo) / (hi - lo) * cells).astype(int), cells - 1)
        n = int(subject.max()) + 1
        table = np.bincount(subject * cells + cell, minlength=n * cells).reshape(n, cells)
        table = table.astype(np.float64)
        pairs = table.T @ table - np.diag(table.sum(axis=0))  # exact: whole numbers
    return DesignSums(pairs, count_design(subject, t, domain, spec.options) if fit else None)


def add_design_sums(a: DesignSums, b: DesignSums) -> DesignSums:
    from ..fpca.feasibility import add_design

    return DesignSums(a.cells + b.cells, add_design(a.fit, b.fit)
                      if a.fit is not None and b.fit is not None else None)


def design_checks(spec: Spec, n_obs: np.ndarray, t_range: tuple[float, float],
                  constant: bool, sums: Callable[[tuple[float, float], tuple[float, float],
                                                  bool], DesignSums],
                  failed: bool) -> list[Check]:
    """The checks on the design of all the readings: ``n_obs`` (readings per subject),
    their time range, whether every value is the same, and ``sums`` (observed range,
    domain, with the feasibility counts) that counts them; ``failed``: an earlier check
    failed (the feasibility test is then left out)."""
    from ..fpca.feasibility import problems_from

    c, out = spec.checks, []
    n_subj = int(n_obs.size)
    if n_subj < c["min_subjects"]:
        out.append(Check("enough subjects", "fail",
                         f"{n_subj} subjects; the spec asks for at least {c['min_subjects']}"))
    else:
        out.append(Check("enough subjects", "pass",
                         f"{n_subj} subjects, {int(n_obs.sum())} readings"))
    single = int((n_obs == 1).sum())
    multi = n_subj - single
    status = "pass" if single <= n_subj / 2 else "warn"
    if multi < 2:
        status = "fail"
    out.append(Check("subjects with one reading", status,
                     f"{single} of {n_subj} subjects have a single reading (allowed; they "
                     f"inform the mean, and get scores); {multi} have two or more"))
    if multi < 2:
        return out
    failed = failed or any(x.status == "fail" for x in out)
    domain = spec.options.fitted_domain(*t_range)
    found = sums(t_range, domain, not failed)
    cover = float((found.cells > 0.5).mean()) if t_range[1] > t_range[0] else 0.0
    ok = cover >= c["min_pair_coverage"]
    out.append(Check("time-pair coverage", "pass" if ok else "warn",
                     f"{cover:.0%} of the 10 x 10 cells of the time-pair square hold pairs"
                     + ("" if ok else "; the covariance elsewhere is extrapolated")))
    if found.fit is not None:
        problems = problems_from(found.fit, n_obs, domain, constant, spec.options)
        out.append(Check("fit feasible", "fail", "; ".join(problems)) if problems else
                   Check("fit feasible", "pass", "the mean, diagonal and covariance smoothers "
                         "are defined on the whole grid at the largest bandwidth the fit "
                         "may use"))
    return out


def _typed(frame: pd.DataFrame, rows: np.ndarray, table: Table, spec: Spec,
           found: list[Tally]) -> pd.DataFrame | None:
    """Times (after the origin) and values as numbers, log transform applied; None when
    this file's rows fail the step."""
    d = spec.data
    kind, t, bad_t, problem = _times(frame, d)
    y = pd.to_numeric(frame[d["value"]], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    bad_y = np.flatnonzero(np.isnan(y) & frame[d["value"]].notna().to_numpy())
    t_first = y_first = origin_problem = ""
    if not problem and bad_t.any():
        first = int(np.flatnonzero(bad_t)[0])
        t_first = (_describe_row(table, rows, frame, first, d["time"])
                   + ("" if kind == "dates" or not looks_like_dates(
                       frame[d["time"]].iloc[[first]]) else f"; {DATE_HINT}"))
    if bad_y.size:
        y_first = _describe_row(table, rows, frame, int(bad_y[0]), d["value"])
    subj = _as_ids(frame[d["subject"]])
    if not (problem or t_first or y_first):
        origin, origin_problem = _origin(frame, d, kind, t, subj)
    known = kind if frame[d["time"]].notna().any() else ""  # an empty column has no kind
    found.append(Tally("columns typed", (0 if problem else int(bad_t.sum()), int(bad_y.size)),
                       (known, problem, t_first, y_first, origin_problem),
                       file=table.file))
    if problem or t_first or y_first or origin_problem:
        return None
    t = t - origin
    if kind == "dates":
        t = t / SCALE_DAYS[d.get("time_scale", "days")]
    if d["transform"] in ("log", "log10"):
        with np.errstate(all="ignore"):
            bad_log = np.flatnonzero(y <= 0)
            y = np.log(y) if d["transform"] == "log" else np.log10(y)
        found.append(Tally("log transform", (bad_log.size,), (
            _describe_row(table, rows, frame, int(bad_log[0]), d["value"])
            if bad_log.size else "",)))
        if bad_log.size:
            return None
    # the ids stay Arrow-backed text: to_numpy() would make a Python string per reading
    # (0.5 s and 0.3 GB at 4.5 million readings, and again to convert them back)
    long = pd.DataFrame({"subject": subj.astype("str").array, "time": t, "value": y})
    if d.get("group"):
        long["group"] = _as_ids(frame[d["group"]]).astype("str").array
    long.attrs["rows"] = rows
    return long


def _say_typed(tallies: list[Tally], spec: Spec) -> Check:
    d = spec.data
    kinds: dict[str, str] = {}
    for t in tallies:
        if t.first[0]:
            kinds.setdefault(t.first[0], t.file)
    if len(kinds) > 1:
        (k1, f1), (k2, f2) = list(kinds.items())[:2]
        return Check("columns typed", "fail",
                     f"column {d['time']!r} holds {k1} in {f1} but {k2} in {f2}; every file "
                     "must hold the same kind of time")
    kind = next(iter(kinds), "numbers")
    n_t, n_y = _totals(tallies)
    parts = []
    problem = _first(tallies, 1)
    if problem:
        parts.append(problem)
    elif n_t:
        parts.append(f"{n_t} time value(s) are not {kind}, first at {_first(tallies, 2)}")
    if n_y:
        parts.append(f"{n_y} value(s) are not numbers, first at {_first(tallies, 3)}")
    origin_problem = _first(tallies, 4)
    if parts or origin_problem:
        return Check("columns typed", "fail", "; ".join(parts) or origin_problem)
    if kind == "dates":
        return Check("columns typed", "pass", _date_detail(d))
    return Check("columns typed", "pass", "time and value are numeric" + (
        "; time counted from each subject's " + (
            "first reading" if d["time_origin"] == "first" else
            f"baseline in column {d['time_origin']['column']!r}")
        if d.get("time_origin") else ""))


def _say_log(tallies: list[Tally], spec: Spec) -> Check | None:
    n = _totals(tallies)[0]
    if n == 0:
        return None
    return Check("log transform", "fail",
                 f"{n} value(s) are zero or negative, first at {_first(tallies, 0)}")


def _as_ids(series: pd.Series) -> pd.Series:
    """Identifiers as text; whole numbers stored as floats (SAS, Stata and SPSS files store
    numeric ids so) read 4601, not 4601.0, as they do from a CSV file."""
    if pd.api.types.is_float_dtype(series):
        values = series.to_numpy(dtype=np.float64, na_value=np.nan)
        finite = values[np.isfinite(values)]
        if finite.size and np.all(finite == np.round(finite)) and \
                np.all(np.abs(finite) < 2**53):
            return series.astype("Int64").astype("string")
    return series.astype("string")


def _date_detail(d: dict[str, Any]) -> str:
    origin = d["time_origin"]
    scale = d.get("time_scale", "days")
    if origin == "first":
        since = "each subject's first reading"
    elif isinstance(origin, dict):
        since = f"each subject's baseline date in column {origin['column']!r}"
    else:
        since = f"{origin}"
    return f"time is dates, counted in {scale} since {since}; value is numeric"


def _cleaned(long: pd.DataFrame, table: Table, spec: Spec, found: list[Tally]
             ) -> pd.DataFrame | None:
    """Missing values, groups, duplicates, value range and domain, in that order; None
    when this file's rows fail a step that stops, or none is left."""
    c = spec.checks
    rows = long.attrs.pop("rows")
    na = (~np.isfinite(long.time.to_numpy()) | ~np.isfinite(long.value.to_numpy())
          | long.subject.isna().to_numpy())
    if "group" in long:
        na |= long.group.isna().to_numpy()
    n_na = int(na.sum())
    found.append(Tally("missing values", (n_na, len(long)), (
        table.where(int(rows[int(np.flatnonzero(na)[0])])) if n_na else "",)))
    if n_na and (c["missing"] == "fail" or n_na == len(long)):
        return None
    long = long.loc[~na].reset_index(drop=True)
    if "group" in long:
        found.append(_group_tally(long))
        if found[-1].first[0]:
            return None
    long, tally = _duplicates(long, c["duplicates"])
    found.append(tally)
    found.extend(_range_tallies(long, spec))
    long = _apply_drops(long, c, spec)
    return long if len(long) else None


def _say_missing(tallies: list[Tally], spec: Spec) -> Check:
    n_na, n = _totals(tallies)
    what = "subject, time, value" + (" or group" if spec.data.get("group") else "")
    if n_na == 0:
        return Check("missing values", "pass", "no missing or non-finite values")
    if spec.checks["missing"] == "fail" or n_na == n:
        return Check("missing values", "fail",
                     f"{n_na} of {n} rows have a missing or non-finite {what} "
                     f"(first at {_first(tallies, 0)})")
    return Check("missing values", "warn",
                 f"{n_na} of {n} rows dropped (missing or non-finite {what})")


def _group_tally(long: pd.DataFrame) -> Tally:
    """A subject in two groups (the first met), and the subjects per group."""
    per = long.groupby("subject", sort=False)["group"].nunique()
    multi = ""
    if (per > 1).any():
        multi = plain(per.index[int(np.flatnonzero(per.to_numpy() > 1)[0])])
    sizes = long.drop_duplicates("subject").groupby("group").size()
    return Tally("groups", first=(multi,),
                 sizes=tuple((str(g), int(n)) for g, n in sizes.items()))


def _say_groups(tallies: list[Tally], spec: Spec) -> Check:
    multi = _first(tallies, 0)
    if multi:
        return Check("groups", "fail", f"subject {multi} is in more than one group; "
                     "a group (arm, cohort, site) is one value per subject")
    sizes: dict[str, int] = {}
    for t in tallies:  # a subject's readings are in one file: its files' counts add up
        for g, n in t.sizes:
            sizes[g] = sizes.get(g, 0) + n
    labels = sorted(sizes)
    if len(labels) < 2:
        return Check("groups", "fail", f"one group only ({plain(labels[0])}); a group "
                     "comparison needs two or more")
    listed = ", ".join(f"{g} ({sizes[g]} subjects)" for g in labels)
    status = "pass" if min(sizes.values()) >= 2 else "warn"
    return Check("groups", status, f"{len(labels)} groups: {listed}")


def duplicate_mask(codes: np.ndarray, t: np.ndarray) -> np.ndarray:
    """The rows whose (subject code, time) another row shares.

    Each row's pair is hashed to 64 bits and the hashes sorted (a vectorised sort of
    integers): rows with a unique hash are unique. The few rows whose hash repeats (true
    duplicates, or a collision: about n^2 / 2^65, 5e-7 at 4.5 million rows) are compared
    exactly. Hashing 4.5 million distinct times in ``DataFrame.duplicated`` took 3 s, a sort
    by (subject, time) 2.4 s; this takes 0.3 s.
    """
    mask = np.zeros(codes.size, dtype=bool)
    bits = (np.asarray(t, dtype=np.float64) + 0.0).view(np.uint64)  # -0.0 + 0.0 is 0.0
    key = (bits * np.uint64(0x9E3779B97F4A7C15)) ^ (
        codes.astype(np.uint64) * np.uint64(0xC2B2AE3D27D4EB4F))
    ordered = np.sort(key)
    repeated = ordered[1:][ordered[1:] == ordered[:-1]]
    if repeated.size == 0:
        return mask
    rows = np.flatnonzero(np.isin(key, repeated))
    rows = rows[np.lexsort((t[rows], codes[rows]))]
    same = (codes[rows][1:] == codes[rows][:-1]) & (t[rows][1:] == t[rows][:-1])
    mask[rows[1:][same]] = True
    mask[rows[:-1][same]] = True
    return mask


def _duplicates(long: pd.DataFrame, rule: str) -> tuple[pd.DataFrame, Tally]:
    """The readings as the rule leaves them; the tally counts the readings that share a
    (subject, time) and, when averaged, the readings they became."""
    dup = duplicate_mask(pd.factorize(long.subject)[0], long.time.to_numpy())
    n_dup = int(dup.sum())
    if n_dup == 0:
        return long, Tally("duplicate readings", (0, 0), ("",))
    if rule == "average":
        keys = ["subject", "time"] + (["group"] if "group" in long else [])
        merged = long.groupby(keys, sort=False)["value"].mean().reset_index()
        return merged, Tally("duplicate readings", (n_dup, n_dup - (len(long) - len(merged))),
                             ("",))
    row = long[dup].iloc[0]
    return long, Tally("duplicate readings", (n_dup, 0),
                       (f"subject {plain(row.subject)} at time {row.time:g}",))


def _say_duplicates(tallies: list[Tally], spec: Spec) -> Check:
    n_dup, into = _totals(tallies)
    rule = spec.checks["duplicates"]
    if n_dup == 0:
        return Check("duplicate readings", "pass", "no subject has two readings at one time")
    if rule == "fail":
        return Check("duplicate readings", "fail",
                     f"{n_dup} readings share a (subject, time) with another, e.g. "
                     f"{_first(tallies, 0)}")
    if rule == "average":
        return Check("duplicate readings", "warn",
                     f"{n_dup} readings at a shared (subject, time) were averaged into {into}")
    return Check("duplicate readings", "warn",
                 f"{n_dup} readings share a (subject, time); kept as they are")


def data_domains(spec: Spec) -> list[tuple[str, tuple[float, float]]]:
    """The time domains the readings must lie in, each with its check's name:
    ``checks.domain`` (the plausible times) and ``model.domain`` (the fitted domain; the
    same as checks.domain when only that is given)."""
    out = []
    declared = spec.checks.get("domain")
    if declared is not None:
        out.append(("times in declared domain", (float(declared[0]), float(declared[1]))))
    fitted = spec.options.domain
    if fitted is not None and (declared is None or tuple(fitted) != out[0][1]):
        out.append(("times in the fitted domain", (float(fitted[0]), float(fitted[1]))))
    return out


def _range_tallies(long: pd.DataFrame, spec: Spec) -> list[Tally]:
    """Values outside checks.value_range, and times outside each domain, counted."""
    c, out = spec.checks, []
    if c.get("value_range") is not None:
        lo, hi = c["value_range"]
        out.append(Tally("values in declared range",
                         (int(((long.value < lo) | (long.value > hi)).sum()),)))
    for name, (lo, hi) in data_domains(spec):
        out.append(Tally(name, (int(((long.time < lo) | (long.time > hi)).sum()),)))
    return out


def _say_range(step: str, tallies: list[Tally], spec: Spec) -> Check:
    c, n = spec.checks, _totals(tallies)[0]
    if step == "values in declared range":
        lo, hi = c["value_range"]
        status = "pass" if n == 0 else ("fail" if c["out_of_range"] == "fail" else "warn")
        action = {"warn": "kept", "drop": "dropped", "fail": "refused"}[c["out_of_range"]]
        return Check(step, status, f"all values within [{lo:g}, {hi:g}]" if n == 0 else
                     f"{n} values outside [{lo:g}, {hi:g}] ({action})")
    lo, hi = dict(data_domains(spec))[step]
    if n == 0:
        return Check(step, "pass", f"all times within [{lo:g}, {hi:g}]")
    if c["out_of_domain"] == "drop":
        return Check(step, "warn", f"{n} readings at times outside [{lo:g}, {hi:g}] (dropped)")
    return Check(step, "fail", f"{n} readings at times outside [{lo:g}, {hi:g}] (refused; set "
                 "checks.out_of_domain: drop to leave them out)")


def _apply_drops(long: pd.DataFrame, c: dict[str, Any], spec: Spec) -> pd.DataFrame:
    keep = np.ones(len(long), dtype=bool)
    if c.get("value_range") is not None and c["out_of_range"] == "drop":
        lo, hi = c["value_range"]
        keep &= ((long.value >= lo) & (long.value <= hi)).to_numpy()
    if c["out_of_domain"] == "drop":
        for _, (lo, hi) in data_domains(spec):
            keep &= ((long.time >= lo) & (long.time <= hi)).to_numpy()
    return long if keep.all() else long.loc[keep].reset_index(drop=True)



def require_passed(dataset: Dataset) -> None:
    """Raise DataError listing every failed check."""
    failed = dataset.failed
    if failed:
        detail = "; ".join(f"{c.name}: {c.detail}" for c in failed)
        raise DataError(f"data checks failed for {dataset.relpath!r}: {detail}")
