"""Long-format pandas frame -> the arrays that the numerical core takes."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .._text import plain
from ..errors import DataError
from .arrays import FloatArray, IntArray


def _numeric(frame: pd.DataFrame, column: str, role: str) -> FloatArray:
    series = frame[column]
    if not pd.api.types.is_numeric_dtype(series) or pd.api.types.is_bool_dtype(series):
        converted = pd.to_numeric(series, errors="coerce")
        bad = converted.isna() & series.notna()
        if bad.any():
            row = int(np.flatnonzero(bad.to_numpy())[0])
            raise DataError(
                f"{role} column {column!r} must be numeric; row {row + 1} holds "
                f"{plain(series.iloc[row])}"
            )
        series = converted
    values = series.to_numpy(dtype=np.float64, na_value=np.nan)
    bad_rows = np.flatnonzero(~np.isfinite(values))
    if bad_rows.size:
        raise DataError(
            f"{role} column {column!r} has {bad_rows.size} missing or non-finite values "
            f"(first at row {bad_rows[0] + 1}); drop them before fitting"
        )
    return values


def arrays_from_frame(
    frame: pd.DataFrame, subject: str, time: str, value: str
) -> tuple[IntArray, FloatArray, FloatArray, np.ndarray]:
    """Subject codes, times, values and subject labels (in the order of the ids' text) from a
    long frame.

    Rows are numbered from 1 in messages, in the frame's order.
    """
    if not isinstance(frame, pd.DataFrame):
        raise DataError(f"expected a pandas DataFrame; got {type(frame).__name__}")
    missing = [c for c in (subject, time, value) if c not in frame.columns]
    if missing:
        raise DataError(
            f"column(s) {missing!r} not found; the frame has {list(map(str, frame.columns))!r}"
        )
    if len(frame) == 0:
        raise DataError("the frame has no rows")
    t = _numeric(frame, time, "time")
    y = _numeric(frame, value, "value")
    ids = frame[subject]
    if ids.isna().any():
        row = int(np.flatnonzero(ids.isna().to_numpy())[0])
        raise DataError(f"subject column {subject!r} is empty at row {row + 1}")
    # Subjects are coded in the order of their ids' text, whatever their type, so that the
    # same ids written as integers or as text get the same codes, hence the same folds,
    # samples and resamples, and the same numbers (as the spec's reader, which reads ids
    # as text). The labels keep the ids as given.
    codes, _ = pd.factorize(ids.astype(str), sort=True)
    first = np.zeros(int(codes.max()) + 1, dtype=np.intp)
    first[codes[::-1]] = np.arange(codes.size - 1, -1, -1)
    return codes.astype(np.intp), t, y, np.asarray(ids.to_numpy()[first])
