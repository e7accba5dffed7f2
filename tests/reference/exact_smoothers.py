"""Unbinned local linear smoothers: the reference that the binned smoothers of
``reportgen.fpca.smoothing`` are checked against (``tests/fpca/test_smoothing.py``) and
timed against (``benchmarks/run.py``). Memory is O(n_eval x n_points): for tests only."""

from __future__ import annotations

import numpy as np

from reportgen.fpca.arrays import FloatArray
from reportgen.fpca.smoothing import (
    _SINGULAR_RTOL,
    Kernel,
    _cofactors,
    _weight_matrices,
    epanechnikov,
)


def local_linear_exact_1d(
    eval_x: FloatArray,
    x: FloatArray,
    y: FloatArray,
    h: float,
    kernel: Kernel = epanechnikov,
    weights: FloatArray | None = None,
) -> FloatArray:
    """Unbinned local linear estimate at ``eval_x`` (O(n_eval x n_obs) memory; for tests)."""
    w, wd, wdd = _weight_matrices(eval_x, np.asarray(x, dtype=np.float64), h, kernel)
    obs_w = np.ones_like(y, dtype=np.float64) if weights is None else weights
    s0, s1, s2 = w @ obs_w, wd @ obs_w, wdd @ obs_w
    t0, t1 = w @ (obs_w * y), wd @ (obs_w * y)
    det = s0 * s2 - s1 * s1
    with np.errstate(divide="ignore", invalid="ignore"):
        est = (s2 * t0 - s1 * t1) / det
    return np.where(det > _SINGULAR_RTOL * s0 * s2, est, np.nan)


def local_linear_exact_2d(
    eval_x: FloatArray,
    x1: FloatArray,
    x2: FloatArray,
    y: FloatArray,
    h: float,
    kernel: Kernel = epanechnikov,
) -> FloatArray:
    """Unbinned local linear surface on ``eval_x x eval_x`` from scattered (x1, x2, y).

    Memory is O(n_eval x n_points); meant for tests and benchmarks, not the hot path.
    """
    w1, wd1, wdd1 = _weight_matrices(eval_x, x1, h, kernel)  # (E, P) along the first axis
    w2, wd2, wdd2 = _weight_matrices(eval_x, x2, h, kernel)
    s00, s10, s01 = w1 @ w2.T, wd1 @ w2.T, w1 @ wd2.T
    s20, s11, s02 = wdd1 @ w2.T, wd1 @ wd2.T, w1 @ wdd2.T
    t00, t10, t01 = (w1 * y) @ w2.T, (wd1 * y) @ w2.T, (w1 * y) @ wd2.T
    c0, c1, c2, det = _cofactors(s00, s10, s01, s20, s11, s02)
    with np.errstate(divide="ignore", invalid="ignore"):
        est = (c0 * t00 + c1 * t10 + c2 * t01) / det
    return np.where(det > _SINGULAR_RTOL * s00 * s20 * s02, est, np.nan)
