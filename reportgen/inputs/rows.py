"""The first row-level steps of the data checks, on one parsed file: the row selection
(``data.keep_rows``), the columns' types and the time origin, and the log transform. Each
leaves a :class:`~reportgen.inputs.findings.Tally`; each has a function that turns the
tallies of every file into its line of the checks table."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from .._text import plain
from ..errors import DataError
from .findings import Check, Tally, first_example, totals
from .readers import Table, is_date_column, looks_like_dates
from .spec import DataSection, RowCondition, Spec

SCALE_DAYS = {"hours": 1 / 24, "days": 1.0, "weeks": 7.0, "months": 365.25 / 12, "years": 365.25}
DATE_HINT = (
    'set data.time_origin to an ISO date (a calendar origin), to "first" (each '
    "subject's first reading) or to {column: NAME} (each subject's baseline date in "
    "that column), and data.time_scale to days, weeks, months, years or hours"
)


# --- row selection --------------------------------------------------------------------------


def _condition_text(cond: RowCondition) -> str:
    if cond.kind == "equals":
        return f"{cond.column} equals {plain(cond.values[0])}"
    if cond.kind == "in":
        return f"{cond.column} in [{', '.join(plain(v) for v in cond.values)}]"
    lo, hi = cond.values
    return f"{cond.column} between {plain(lo)} and {plain(hi)}"


def _as_column_values(series: pd.Series, values: list[Any], where: str) -> pd.Series | list[Any]:
    """The condition's values in the column's type (numbers, dates or text)."""
    if is_date_column(series):
        try:
            return [pd.Timestamp(v) for v in values]
        except (ValueError, TypeError):
            raise DataError(
                f"{where}: column {series.name!r} holds dates; give ISO dates "
                f"such as 2024-01-31, not {', '.join(plain(v) for v in values)}"
            ) from None
    if pd.api.types.is_bool_dtype(series):
        return values
    if pd.api.types.is_numeric_dtype(series):
        bad = [v for v in values if isinstance(v, str) or isinstance(v, bool)]
        if bad:
            raise DataError(f"{where}: column {series.name!r} holds numbers; got {plain(bad[0])}")
        return values
    return [v if isinstance(v, str) else plain(v) for v in values]


def _mask(series: pd.Series, cond: RowCondition, where: str) -> np.ndarray:
    if cond.kind == "between":
        lo, hi = _as_column_values(series, list(cond.values), where)
        if isinstance(lo, str) or isinstance(hi, str):
            raise DataError(
                f"{where}: between needs a column of numbers or dates; {series.name!r} holds text"
            )
        return np.asarray((series >= lo) & (series <= hi), dtype=bool)
    wanted = _as_column_values(series, list(cond.values), where)
    column = (
        series
        if (pd.api.types.is_numeric_dtype(series) or is_date_column(series))
        else series.astype("string")
    )
    return np.asarray(column.isin(wanted), dtype=bool)


def select_rows(table: Table, conditions: tuple[RowCondition, ...]) -> tuple[np.ndarray, Tally]:
    """The rows that meet every condition; the tally counts rows read, rows each condition
    dropped and rows kept."""
    frame = table.frame
    keep = np.ones(len(frame), dtype=bool)
    dropped = []
    for i, cond in enumerate(conditions):
        mask = _mask(frame[cond.column], cond, f"data.keep_rows[{i}]")
        dropped.append(int(np.count_nonzero(keep & ~mask)))
        keep &= mask
    return keep, Tally("row selection", (len(frame), *dropped, int(keep.sum())))


def selection_check(tallies: list[Tally], spec: Spec) -> Check:
    n = totals(tallies)
    parts = [f"{n[0]} rows read"]
    parts += [
        f"{_condition_text(cond)}: {dropped} dropped"
        for cond, dropped in zip(spec.data.keep_rows, n[1:-1], strict=True)
    ]
    parts.append(f"{n[-1]} kept")
    detail = "; ".join(parts) + ("" if n[-1] else " (no row meets every condition)")
    return Check("row selection", "pass" if n[-1] else "fail", detail)


# --- types and time origin ------------------------------------------------------------------


def describe_row(table: Table, rows: np.ndarray, frame: pd.DataFrame, i: int, column: str) -> str:
    """Where selected row ``i`` was in the file, and its value."""
    return f"{table.where(int(rows[i]))} (column {column!r}, value {plain(frame[column].iloc[i])})"


def _numbers_or_dates(series: pd.Series) -> tuple[str, np.ndarray, np.ndarray]:
    """("dates", days since 1970, bad) or ("numbers", values, bad); bad: unparseable rows."""
    if is_date_column(series) or looks_like_dates(series):
        stamps = (
            pd.to_datetime(series, errors="coerce", format="mixed")
            if not is_date_column(series)
            else series
        )
        bad = stamps.isna().to_numpy() & series.notna().to_numpy()
        days = (stamps - pd.Timestamp("1970-01-01")) / pd.Timedelta(days=1)
        return "dates", days.to_numpy(dtype=np.float64, na_value=np.nan), bad
    numeric = pd.to_numeric(series, errors="coerce")
    bad = numeric.isna().to_numpy() & series.notna().to_numpy()
    return "numbers", numeric.to_numpy(dtype=np.float64, na_value=np.nan), bad


def _times(frame: pd.DataFrame, d: DataSection) -> tuple[str, np.ndarray, np.ndarray, str]:
    """(kind, absolute times, rows that are not times, problem); dates in days."""
    kind, t, bad = _numbers_or_dates(frame[d.time])
    origin = d.time_origin
    if kind == "dates" and origin is None:
        return kind, t, bad, f"column {d.time!r} holds dates; {DATE_HINT}"
    if kind == "numbers" and origin is not None and origin.kind == "date":
        if bad.any():
            return (
                kind,
                t,
                bad,
                (
                    f"data.time_origin is a date but column {d.time!r} "
                    "holds values that are neither numbers nor dates"
                ),
            )
        return (
            kind,
            t,
            bad,
            (
                f"data.time_origin is a calendar date but column {d.time!r} "
                "holds numbers; leave time_origin out (or use first, or "
                "{column: NAME}) for numeric times"
            ),
        )
    return kind, t, bad, ""


def _origin(
    frame: pd.DataFrame, d: DataSection, kind: str, t: np.ndarray, subj: pd.Series
) -> tuple[np.ndarray, str]:
    """Per-row origin in the time column's units (days for dates), and a problem."""
    origin = d.time_origin
    if origin is None:
        return np.zeros_like(t), ""
    codes = pd.factorize(subj)[0]
    if origin.kind == "first":
        first = np.full(int(codes.max()) + 1, np.inf)
        np.minimum.at(first, codes, np.where(np.isfinite(t), t, np.inf))
        return first[codes], ""
    if origin.kind == "date":
        day = (pd.Timestamp(origin.value) - pd.Timestamp("1970-01-01")) / pd.Timedelta(days=1)
        return np.full_like(t, day), ""
    column = origin.value
    base_kind, base, bad = _numbers_or_dates(frame[column])
    if base_kind != kind:
        return base, (
            f"data.time_origin.column {column!r} holds {base_kind} but the time "
            f"column {d.time!r} holds {kind}"
        )
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        return base, (
            f"data.time_origin.column {column!r}: value "
            f"{plain(frame[column].iloc[i])} is not one of the {kind}"
        )
    per = pd.DataFrame({"c": codes, "b": base}).dropna().groupby("c")["b"].nunique()
    if (per > 1).any():
        subject = frame[d.subject].iloc[
            int(np.flatnonzero(codes == per.index[int(np.flatnonzero(per.to_numpy() > 1)[0])])[0])
        ]
        return base, (
            f"data.time_origin.column {column!r} holds more than one baseline for "
            f"subject {plain(subject)}; a baseline is one value per subject"
        )
    return base, ""


def as_ids(series: pd.Series) -> pd.Series:
    """Identifiers as text; whole numbers stored as floats (SAS, Stata and SPSS files store
    numeric ids so) read 4601, not 4601.0, as they do from a CSV file."""
    if pd.api.types.is_float_dtype(series):
        values = series.to_numpy(dtype=np.float64, na_value=np.nan)
        finite = values[np.isfinite(values)]
        if finite.size and np.all(finite == np.round(finite)) and np.all(np.abs(finite) < 2**53):
            return series.astype("Int64").astype("string")
    return series.astype("string")


def typed(
    frame: pd.DataFrame, rows: np.ndarray, table: Table, spec: Spec, found: list[Tally]
) -> pd.DataFrame | None:
    """Times (after the origin) and values as numbers, log transform applied; None when
    this file's rows fail the step. ``rows``: each row's place in the parsed file."""
    d = spec.data
    kind, t, bad_t, problem = _times(frame, d)
    y = pd.to_numeric(frame[d.value], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    bad_y = np.flatnonzero(np.isnan(y) & frame[d.value].notna().to_numpy())
    t_first = y_first = origin_problem = ""
    if not problem and bad_t.any():
        first = int(np.flatnonzero(bad_t)[0])
        t_first = describe_row(table, rows, frame, first, d.time) + (
            ""
            if kind == "dates" or not looks_like_dates(frame[d.time].iloc[[first]])
            else f"; {DATE_HINT}"
        )
    if bad_y.size:
        y_first = describe_row(table, rows, frame, int(bad_y[0]), d.value)
    subj = as_ids(frame[d.subject])
    if not (problem or t_first or y_first):
        origin, origin_problem = _origin(frame, d, kind, t, subj)
    known = kind if frame[d.time].notna().any() else ""  # an empty column has no kind
    found.append(
        Tally(
            "columns typed",
            (0 if problem else int(bad_t.sum()), int(bad_y.size)),
            (known, problem, t_first, y_first, origin_problem),
            file=table.file,
        )
    )
    if problem or t_first or y_first or origin_problem:
        return None
    t = t - origin
    if kind == "dates":
        t = t / SCALE_DAYS[d.time_scale]
    if d.transform in ("log", "log10"):
        with np.errstate(all="ignore"):
            bad_log = np.flatnonzero(y <= 0)
            y = np.log(y) if d.transform == "log" else np.log10(y)
        found.append(
            Tally(
                "log transform",
                (bad_log.size,),
                (
                    describe_row(table, rows, frame, int(bad_log[0]), d.value)
                    if bad_log.size
                    else "",
                ),
            )
        )
        if bad_log.size:
            return None
    # the ids stay Arrow-backed text: to_numpy() would make a Python string per reading
    long = pd.DataFrame({"subject": subj.astype("str").array, "time": t, "value": y})
    if d.group:
        long["group"] = as_ids(frame[d.group]).astype("str").array
    long.attrs["rows"] = rows
    return long


def typed_check(tallies: list[Tally], spec: Spec) -> Check:
    d = spec.data
    kinds: dict[str, str] = {}
    for t in tallies:
        if t.first[0]:
            kinds.setdefault(t.first[0], t.file)
    if len(kinds) > 1:
        (k1, f1), (k2, f2) = list(kinds.items())[:2]
        return Check(
            "columns typed",
            "fail",
            f"column {d.time!r} holds {k1} in {f1} but {k2} in {f2}; every file "
            "must hold the same kind of time",
        )
    kind = next(iter(kinds), "numbers")
    n_t, n_y = totals(tallies)
    parts = []
    problem = first_example(tallies, 1)
    if problem:
        parts.append(problem)
    elif n_t:
        parts.append(f"{n_t} time value(s) are not {kind}, first at {first_example(tallies, 2)}")
    if n_y:
        parts.append(f"{n_y} value(s) are not numbers, first at {first_example(tallies, 3)}")
    origin_problem = first_example(tallies, 4)
    if parts or origin_problem:
        return Check("columns typed", "fail", "; ".join(parts) or origin_problem)
    if kind == "dates":
        return Check("columns typed", "pass", _date_detail(d))
    origin = d.time_origin
    return Check(
        "columns typed",
        "pass",
        "time and value are numeric"
        + (
            "; time counted from each subject's "
            + (
                "first reading"
                if origin.kind == "first"
                else f"baseline in column {origin.value!r}"
            )
            if origin is not None
            else ""
        ),
    )


def log_check(tallies: list[Tally], spec: Spec) -> Check | None:
    n = totals(tallies)[0]
    if n == 0:
        return None
    return Check(
        "log transform",
        "fail",
        f"{n} value(s) are zero or negative, first at {first_example(tallies, 0)}",
    )


def _date_detail(d: DataSection) -> str:
    origin = d.time_origin
    assert origin is not None  # dates need an origin (the step fails without one)
    if origin.kind == "first":
        since = "each subject's first reading"
    elif origin.kind == "column":
        since = f"each subject's baseline date in column {origin.value!r}"
    else:
        since = origin.value
    return f"time is dates, counted in {d.time_scale} since {since}; value is numeric"
