"""Reading the data file and the data checks (each reported as pass, warn or fail)."""

from __future__ import annotations

import hashlib
import io
import os
import stat
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError
from .spec import Spec

SCALE_DAYS = {"hours": 1 / 24, "days": 1.0, "weeks": 7.0, "months": 365.25 / 12,
              "years": 365.25}


@dataclass(frozen=True)
class Check:
    name: str
    status: str  # pass | warn | fail
    detail: str


@dataclass(frozen=True)
class Dataset:
    """Cleaned long table (columns subject, time, value) and what the checks found."""

    frame: pd.DataFrame
    checks: tuple[Check, ...]
    path: Path
    relpath: str
    n_bytes: int
    sha256: str
    rows_read: int

    @property
    def failed(self) -> list[Check]:
        return [c for c in self.checks if c.status == "fail"]


def read_file(spec: Spec) -> tuple[bytes, Path]:
    """The data file's bytes, read once (read-only); refuses directories and devices."""
    path = spec.data_path
    shown = spec.data["file"]
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise DataError(f"data.file {shown!r} does not exist (looked for {str(path)!r})") from None
    except (OSError, ValueError) as e:  # ValueError: an embedded NUL byte in the path
        reason = getattr(e, "strerror", None) or str(e)
        raise DataError(f"data.file {shown!r} cannot be read: {reason}") from e
    if stat.S_ISDIR(st.st_mode):
        raise DataError(f"data.file {shown!r} is a directory; give a .csv or .parquet file")
    if not stat.S_ISREG(st.st_mode):
        raise DataError(f"data.file {shown!r} is not a regular file (device, pipe or socket)")
    try:
        with open(path, "rb") as fh:
            return fh.read(), path
    except OSError as e:
        raise DataError(f"data.file {shown!r} cannot be read: {e.strerror}") from e


def _parse(raw: bytes, spec: Spec, path: Path) -> pd.DataFrame:
    fmt = spec.data["format"]
    if fmt == "auto":
        fmt = "parquet" if path.suffix.lower() in (".parquet", ".pq") else "csv"
    shown = spec.data["file"]
    if not raw.strip():
        raise DataError(f"data.file {shown!r} is empty")
    try:
        if fmt == "parquet":
            return pd.read_parquet(io.BytesIO(raw))
        return pd.read_csv(io.BytesIO(raw), dtype={spec.data["subject"]: str},
                           keep_default_na=True)
    except Exception as e:  # pandas/pyarrow raise many types for malformed files
        first = str(e).splitlines()[0] if str(e) else type(e).__name__
        raise DataError(f"data.file {shown!r} cannot be parsed as {fmt}: {first}") from e


def _times(series: pd.Series, spec: Spec) -> tuple[np.ndarray, list[int]]:
    """Numeric times; dates converted with time_origin and time_scale. Returns bad rows too."""
    if spec.data.get("time_origin"):
        origin = pd.Timestamp(spec.data["time_origin"])
        stamps = pd.to_datetime(series, errors="coerce")
        bad = np.flatnonzero(stamps.isna().to_numpy() & series.notna().to_numpy()).tolist()
        days = (stamps - origin) / pd.Timedelta(days=1)
        scale = SCALE_DAYS[spec.data.get("time_scale", "days")]
        return (days / scale).to_numpy(dtype=np.float64, na_value=np.nan), bad
    numeric = pd.to_numeric(series, errors="coerce")
    bad = np.flatnonzero(numeric.isna().to_numpy() & series.notna().to_numpy()).tolist()
    return numeric.to_numpy(dtype=np.float64, na_value=np.nan), bad


def _describe_row(frame: pd.DataFrame, row: int, column: str) -> str:
    return f"row {row + 2} of the file (column {column!r}, value {frame[column].iloc[row]!r})"


def load_dataset(spec: Spec) -> Dataset:
    """Read the file and run every check. Fails (DataError) only after all checks ran."""
    raw, path = read_file(spec)
    frame = _parse(raw, spec, path)
    d, c = spec.data, spec.checks
    checks: list[Check] = []
    cols = [d["subject"], d["time"], d["value"]]
    missing_cols = [x for x in cols if x not in frame.columns]
    if missing_cols:
        have = ", ".join(map(str, frame.columns[:20]))
        raise DataError(f"data: column(s) {', '.join(map(repr, missing_cols))} not found in "
                        f"{d['file']!r}; the file has: {have}")
    checks.append(Check("columns present", "pass", f"{', '.join(cols)} found"))
    if len(frame) == 0:
        raise DataError(f"data.file {d['file']!r} has a header but no rows")

    rows_read = len(frame)
    t, bad_t = _times(frame[d["time"]], spec)
    y = pd.to_numeric(frame[d["value"]], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    bad_y = np.flatnonzero(np.isnan(y) & frame[d["value"]].notna().to_numpy())
    if bad_t or bad_y.size:
        parts = []
        if bad_t:
            parts.append(f"{len(bad_t)} time value(s) are not "
                         f"{'dates' if d.get('time_origin') else 'numbers'}, first at "
                         + _describe_row(frame, int(bad_t[0]), d["time"]))
        if bad_y.size:
            parts.append(f"{bad_y.size} value(s) are not numbers, first at "
                         + _describe_row(frame, int(bad_y[0]), d["value"]))
        checks.append(Check("columns typed", "fail", "; ".join(parts)))
        return _finish(frame, checks, raw, path, spec, rows_read)
    checks.append(Check("columns typed", "pass", "time and value are numeric"))

    subj = frame[d["subject"]].astype("string")
    with np.errstate(all="ignore"):
        if d["transform"] == "log":
            bad_log = np.flatnonzero(y <= 0)
            y = np.log(y)
        elif d["transform"] == "log10":
            bad_log = np.flatnonzero(y <= 0)
            y = np.log10(y)
        else:
            bad_log = np.zeros(0, dtype=int)
    if bad_log.size:
        checks.append(Check("log transform", "fail",
                            f"{bad_log.size} value(s) are zero or negative, first at "
                            + _describe_row(frame, int(bad_log[0]), d["value"])))
        return _finish(frame, checks, raw, path, spec, rows_read)

    na = ~np.isfinite(t) | ~np.isfinite(y) | subj.isna().to_numpy()
    n_na = int(na.sum())
    if n_na == 0:
        checks.append(Check("missing values", "pass", "no missing or non-finite values"))
    elif c["missing"] == "fail" or n_na == len(frame):
        first = int(np.flatnonzero(na)[0])
        checks.append(Check("missing values", "fail",
                            f"{n_na} of {len(frame)} rows have a missing or non-finite subject, "
                            f"time or value (first at row {first + 2} of the file)"))
        return _finish(frame, checks, raw, path, spec, rows_read)
    else:
        checks.append(Check("missing values", "warn",
                            f"{n_na} of {len(frame)} rows dropped (missing or non-finite)"))
    long = pd.DataFrame({"subject": subj.to_numpy()[~na], "time": t[~na], "value": y[~na]})

    long, dup_check = _duplicates(long, c["duplicates"])
    checks.append(dup_check)
    checks.extend(_range_checks(long, c, d))
    long = _apply_out_of_range(long, c)
    checks.extend(_design_checks(long, c))
    return _finish(long, checks, raw, path, spec, rows_read)


def _duplicates(long: pd.DataFrame, rule: str) -> tuple[pd.DataFrame, Check]:
    dup = long.duplicated(["subject", "time"], keep=False)
    n_dup = int(dup.sum())
    if n_dup == 0:
        return long, Check("duplicate readings", "pass", "no subject has two readings at one time")
    if rule == "fail":
        row = long[dup].iloc[0]
        return long, Check("duplicate readings", "fail",
                           f"{n_dup} readings share a (subject, time) with another, e.g. "
                           f"subject {row.subject!r} at time {row.time:g}")
    if rule == "average":
        merged = long.groupby(["subject", "time"], sort=False)["value"].mean().reset_index()
        return merged, Check("duplicate readings", "warn",
                             f"{n_dup} readings at a shared (subject, time) were averaged into "
                             f"{n_dup - (len(long) - len(merged))}")
    return long, Check("duplicate readings", "warn",
                       f"{n_dup} readings share a (subject, time); kept as they are")


def _range_checks(long: pd.DataFrame, c: dict[str, Any], d: dict[str, Any]) -> list[Check]:
    out = []
    if c.get("value_range") is not None:
        lo, hi = c["value_range"]
        bad = (long.value < lo) | (long.value > hi)
        n = int(bad.sum())
        status = "pass" if n == 0 else ("fail" if c["out_of_range"] == "fail" else "warn")
        action = {"warn": "kept", "drop": "dropped", "fail": "refused"}[c["out_of_range"]]
        out.append(Check("values in declared range", status,
                         f"all values within [{lo:g}, {hi:g}]" if n == 0 else
                         f"{n} values outside [{lo:g}, {hi:g}] ({action})"))
    if c.get("domain") is not None:
        lo, hi = c["domain"]
        n = int(((long.time < lo) | (long.time > hi)).sum())
        out.append(Check("times in declared domain", "pass" if n == 0 else "fail",
                         f"all times within [{lo:g}, {hi:g}]" if n == 0 else
                         f"{n} readings at times outside [{lo:g}, {hi:g}]"))
    return out


def _apply_out_of_range(long: pd.DataFrame, c: dict[str, Any]) -> pd.DataFrame:
    if c.get("value_range") is not None and c["out_of_range"] == "drop":
        lo, hi = c["value_range"]
        return long[(long.value >= lo) & (long.value <= hi)].reset_index(drop=True)
    return long


def pair_coverage(long: pd.DataFrame, cells: int = 10) -> float:
    """Share of the cells of a cells x cells partition of the time-pair square that hold
    at least one pair (t_ij, t_il), j != l, of some subject."""
    t = long.time.to_numpy()
    lo, hi = float(t.min()), float(t.max())
    if not hi > lo:
        return 0.0
    cell = np.minimum(((t - lo) / (hi - lo) * cells).astype(int), cells - 1)
    codes = pd.factorize(long.subject)[0]
    n = int(codes.max()) + 1
    table = np.bincount(codes * cells + cell, minlength=n * cells).reshape(n, cells)
    table = table.astype(np.float64)
    pairs = table.T @ table - np.diag(table.sum(axis=0))  # pair counts per cell pair
    return float((pairs > 0.5).mean())


def _design_checks(long: pd.DataFrame, c: dict[str, Any]) -> list[Check]:
    out = []
    per = long.groupby("subject").size()
    n_subj = int(per.size)
    if n_subj < c["min_subjects"]:
        out.append(Check("enough subjects", "fail",
                         f"{n_subj} subjects; the spec asks for at least {c['min_subjects']}"))
    else:
        out.append(Check("enough subjects", "pass", f"{n_subj} subjects, {len(long)} readings"))
    single = int((per == 1).sum())
    multi = n_subj - single
    status = "pass" if single <= n_subj / 2 else "warn"
    if multi < 2:
        status = "fail"
    out.append(Check("subjects with one reading", status,
                     f"{single} of {n_subj} subjects have a single reading (allowed; they "
                     f"inform the mean, and get scores); {multi} have two or more"))
    if multi >= 2:
        cover = pair_coverage(long)
        ok = cover >= c["min_pair_coverage"]
        out.append(Check("time-pair coverage", "pass" if ok else "warn",
                         f"{cover:.0%} of the 10 x 10 cells of the time-pair square hold pairs"
                         + ("" if ok else "; the covariance elsewhere is extrapolated")))
    return out


def _finish(frame: pd.DataFrame, checks: list[Check], raw: bytes, path: Path, spec: Spec,
            rows_read: int) -> Dataset:
    return Dataset(frame, tuple(checks), path, spec.data["file"], len(raw),
                   hashlib.sha256(raw).hexdigest(), rows_read)


def require_passed(dataset: Dataset) -> None:
    """Raise DataError listing every failed check."""
    failed = dataset.failed
    if failed:
        detail = "; ".join(f"{c.name}: {c.detail}" for c in failed)
        raise DataError(f"data checks failed for {dataset.relpath!r}: {detail}")
