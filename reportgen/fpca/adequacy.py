"""Does the model fit its readings? Three checks of the model's assumptions.

1. ``variance_by_time``: per bin of reading times, the mean squared deviation of the
   readings from the mean curve, against the model's variance of a single reading
   (``sum_k lambda_k phi_k(t)^2`` plus the left-out components' variance plus sigma^2),
   averaged over the same readings. They differ when the error variance changes over time
   (the model has one), or when the subjects read at some times differ from the rest
   (informative dropout).
2. ``binned_means`` of the residuals (reading minus the subject's fitted curve) over time
   and over fitted value: under the model each has mean 0 at any time and any level; a
   systematic pattern (a U over time) means the components miss part of how subjects
   differ.
3. ``visit_pattern``: Spearman correlation of each subject's score with the time of its
   last reading and with its number of readings. The conditional-expectation scores
   assume that when and how often a subject is read does not depend on its curve (Yao,
   Müller & Wang 2005, sec. 2: the times are independent of the scores and errors);
   subjects who leave early because they are high or low break it.

Every interval is cluster-robust over subjects (a subject's readings in a bin are
correlated) and Bonferroni-adjusted over the bins or tests of a check, so that a check
fires in at most about 5% of studies where the model holds (measured in
``tests/fpca/test_adequacy.py``). A bin with fewer than ``MIN_BIN_SUBJECTS`` subjects gives
no verdict.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtri, stdtr

from .arrays import FloatArray, IntArray

ADEQUACY_BINS = 8
# Familywise level of each check (its bins or tests together). 0.99, not 0.95: a mean of
# squared deviations is skewed, and its normal interval (even on the log scale) is short
# on one side; at 0.95 a correct model fired in 11% of simulated studies, at 0.99 in 4%,
# while a growing error variance was still found in 98% (tests/fpca/test_adequacy.py).
ADEQUACY_LEVEL = 0.99
# a bin needs this many subjects for a verdict: its interval is a cluster-robust one, too
# short with few clusters (the same floor as the bands' support, ``fit.MIN_SUPPORT``)
MIN_BIN_SUBJECTS = 10


@dataclass(frozen=True)
class Binned:
    """A quantity averaged over readings in bins of ``x``, with its interval and what the
    model expects there; ``outside`` marks bins whose interval excludes the expectation."""

    lower_edge: FloatArray
    upper_edge: FloatArray
    readings: IntArray
    subjects: IntArray
    observed: FloatArray
    low: FloatArray
    high: FloatArray
    expected: FloatArray
    judged: np.ndarray  # enough subjects for a verdict
    outside: np.ndarray

    @property
    def fires(self) -> bool:
        return bool(np.any(self.outside))


def _edges(x: FloatArray, bins: int) -> FloatArray:
    """Equal-count bin edges of ``x`` (fewer bins where values repeat)."""
    return np.unique(np.quantile(x, np.linspace(0.0, 1.0, bins + 1)))


def binned_means(
    x: FloatArray,
    value: FloatArray,
    owner: IntArray,
    expected: FloatArray,
    bins: int = ADEQUACY_BINS,
    level: float = ADEQUACY_LEVEL,
    shared: Callable[[IntArray, int], FloatArray] | None = None,
    positive: bool = False,
) -> Binned:
    """Mean of ``value`` per equal-count bin of ``x``, its cluster-robust interval over the
    subjects ``owner`` (Bonferroni over the bins), and the mean of ``expected`` there.

    ``shared(which, nb)`` gives, for the bin of each value (``which``), a variance per bin
    that the bin's readings share (the estimated mean's error, common to all subjects, so
    that no sum over subjects sees it: ``mean_error_variance``); it is added to the
    variance of the bin's mean. ``positive``: the values are squares, whose mean is
    skewed to the right; the interval is then taken on the log scale (delta method),
    which keeps its two tails nearer their level (common practice, no source)."""
    edges = _edges(x, bins)
    if edges.size < 2:
        edges = np.array([float(x.min()), float(x.max())])
    nb = edges.size - 1
    which = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, nb - 1)
    z = float(ndtri(1.0 - (1.0 - level) / (2.0 * nb)))
    out = {name: np.full(nb, np.nan) for name in ("observed", "low", "high", "expected")}
    readings = np.bincount(which, minlength=nb)
    subjects = np.zeros(nb, dtype=np.int64)
    common = np.zeros(nb) if shared is None else shared(which, nb)
    for b in range(nb):  # a handful of bins; the work inside is vectorised
        inside = which == b
        v, own, e = value[inside], owner[inside], expected[inside]
        if v.size == 0:
            continue
        groups, codes = np.unique(own, return_inverse=True)
        subjects[b] = groups.size
        mean = float(np.mean(v))
        per = np.bincount(codes, v - mean, groups.size)
        g = groups.size
        var = float(np.sum(per**2) * g / max(g - 1, 1)) / v.size**2
        var += float(common[b])
        se = float(np.sqrt(var))
        out["observed"][b] = mean
        out["expected"][b] = float(np.mean(e))
        if positive and mean > 0:
            spread = float(np.exp(z * se / mean))
            out["low"][b], out["high"][b] = mean / spread, mean * spread
        else:
            out["low"][b], out["high"][b] = mean - z * se, mean + z * se
    judged = subjects >= MIN_BIN_SUBJECTS
    outside = judged & ((out["expected"] < out["low"]) | (out["expected"] > out["high"]))
    return Binned(
        edges[:-1].copy(),
        edges[1:].copy(),
        readings.astype(np.int64),
        subjects,
        out["observed"],
        out["low"],
        out["high"],
        out["expected"],
        judged,
        outside,
    )


def variance_by_time(
    t: FloatArray,
    deviation: FloatArray,
    owner: IntArray,
    model_variance: FloatArray,
    bins: int = ADEQUACY_BINS,
    level: float = ADEQUACY_LEVEL,
) -> Binned:
    """Check 1: mean of ``deviation**2`` (reading minus the mean curve) per time bin against
    the model's variance of a reading at the same readings."""
    return binned_means(t, deviation**2, owner, model_variance, bins, level, positive=True)


@dataclass(frozen=True)
class VisitPattern:
    """Spearman correlations of each component's score with the last reading time and with
    the number of readings, their two-sided p-values, and which are below the Bonferroni
    threshold (over every test made)."""

    n_subjects: int
    with_last_time: FloatArray
    p_last_time: FloatArray
    with_count: FloatArray
    p_count: FloatArray
    threshold: float

    @property
    def last_time_fires(self) -> np.ndarray:
        return np.asarray(self.p_last_time < self.threshold)

    @property
    def count_fires(self) -> np.ndarray:
        return np.asarray(self.p_count < self.threshold)

    @property
    def fires(self) -> bool:
        return bool(np.any(self.last_time_fires) or np.any(self.count_fires))


def average_ranks(x: np.ndarray) -> np.ndarray:
    """Ranks 1..n of finite values, ties given the average of their ranks: one sort, a
    third of the memory of pandas' rank when no value repeats (benchmarks/RESULTS.md)."""
    if x.size == 0:
        return np.zeros(0)
    order = np.argsort(x)  # ties get one average rank: the sort need not be stable
    xs = x[order]
    new = np.empty(x.size, dtype=bool)
    new[0] = True
    np.not_equal(xs[1:], xs[:-1], out=new[1:])
    del xs
    ranks = np.empty(x.size)
    if new.all():  # no ties, as with continuous values
        ranks[order] = np.arange(1.0, x.size + 1.0)
        return ranks
    first = np.flatnonzero(new)
    last = np.append(first[1:], x.size) - 1
    ranks[order] = np.repeat((first + last) / 2.0 + 1.0, last - first + 1)
    return ranks


def spearman(x: FloatArray, y: FloatArray) -> tuple[float, float]:
    """Spearman's rho, the Pearson correlation of the average ranks (its definition; pandas'
    method="spearman" imports scipy.stats, a second of start-up for one number), and its
    two-sided p-value from the t approximation with n - 2 degrees of freedom (as
    ``scipy.stats.spearmanr``). rho is ``nan`` when either has no spread, the p-value also
    below three values."""
    if x.size > 100_000:  # numpy sorts without the GIL: two cores, half the time
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(2) as pool:
            rx, ry = pool.map(average_ranks, (x, y))
    else:
        rx, ry = average_ranks(x), average_ranks(y)
    rx -= rx.mean()
    ry -= ry.mean()
    den = math.sqrt(float(rx @ rx) * float(ry @ ry))
    if den == 0.0:
        return float("nan"), float("nan")
    rho = float(rx @ ry) / den
    n = x.size
    if n < 3:
        return rho, float("nan")
    if abs(rho) >= 1.0:
        return rho, 0.0
    tstat = rho * math.sqrt((n - 2) / (1.0 - rho * rho))
    return rho, float(2.0 * stdtr(n - 2, -abs(tstat)))


def mean_error_variance(
    which: IntArray,
    nb: int,
    t: FloatArray,
    phi: FloatArray,
    owner: IntArray,
    omega: FloatArray,
    keep: FloatArray,
    sigma2: float,
    grid: FloatArray,
    mean_cov: FloatArray,
) -> FloatArray:
    """Variance, per bin, of the part of the bin's mean leave-one-out residual that comes
    from the estimated mean's error ``delta`` (one draw shared by every subject).

    The leave-one-out residuals of a subject are ``e = D^-1 Sigma^-1 (y - mu)`` with
    ``D = diag(Sigma^-1)`` (``model_checks``), so an error ``delta`` in the mean moves them
    by ``-D^-1 Sigma^-1 delta``: reading j by ``a_j . delta`` with ``a_j = sum_l M_jl
    e(t_l)``, ``M_jl = (1[j = l] - phi_j' Omega phi_l / sigma^2) / keep_j`` and ``e(t)``
    the linear interpolation weights of time t on the grid. A lone reading takes the whole
    error (``a_j = e(t_j)``); a subject with readings all along its curve absorbs a smooth
    error into its scores (the residual moves little). The bin's mean moves by ``abar .
    delta``, of variance ``abar' C abar`` with ``C`` the mean's covariance over the grid.

    ``phi`` (n, K'), ``owner`` (n,) the subject of each reading (0..n_subjects-1),
    ``omega`` (n_subjects, K', K') the scores' error covariances, ``keep`` (n,) ``sigma^2
    (Sigma^-1)_jj``. Vectorised over readings; a loop over the handful of bins only."""
    n_grid = grid.size
    pos = np.clip(np.searchsorted(grid, t, side="right") - 1, 0, n_grid - 2)
    step = grid[pos + 1] - grid[pos]
    frac = np.clip((t - grid[pos]) / np.where(step > 0, step, 1.0), 0.0, 1.0)

    def spread(weight: FloatArray, rows: np.ndarray | slice = slice(None)) -> FloatArray:
        """sum_j weight_j e(t_j) over the readings ``rows``."""
        p, f = pos[rows], frac[rows]
        return np.bincount(p, weight * (1.0 - f), n_grid) + np.bincount(p + 1, weight * f, n_grid)

    n_subjects, k = omega.shape[0], phi.shape[1]
    scaled = phi / (sigma2 * keep)[:, None]
    out = np.zeros(nb)
    for b in range(nb):
        inside = which == b
        count = int(np.count_nonzero(inside))
        if count == 0:
            continue
        direct = spread(1.0 / keep[inside], inside)
        u = np.column_stack(
            [np.bincount(owner[inside], scaled[inside, c], n_subjects) for c in range(k)]
        ).reshape(n_subjects, k)
        v = np.einsum("ikl,il->ik", omega, u)
        through = spread(np.sum(v[owner] * phi, axis=1))
        a = (direct - through) / count
        out[b] = max(float(a @ mean_cov @ a), 0.0)
    return out


def visit_pattern(
    scores: FloatArray,
    last_time: FloatArray,
    count: FloatArray,
    level: float = ADEQUACY_LEVEL,
) -> VisitPattern:
    """Check 3 over subjects: each score against the last reading time and the count."""
    k = scores.shape[1]
    last = [spearman(scores[:, j], last_time) for j in range(k)]
    many = [spearman(scores[:, j], count) for j in range(k)]
    tests = sum(np.isfinite(p) for _, p in last + many)
    return VisitPattern(
        int(scores.shape[0]),
        np.array([r for r, _ in last]),
        np.array([p for _, p in last]),
        np.array([r for r, _ in many]),
        np.array([p for _, p in many]),
        (1.0 - level) / max(int(tests), 1),
    )
