"""Bandwidth choice by GCV or by K-fold cross-validation over subjects, on binned sums.

Both criteria need the fitted values at the data; on binned data each bin centre stands in
for the readings binned to it ("bins treated as points", Fan & Marron 1994, sec. 3), so
one evaluation of a criterion costs O(bins^2) whatever the number of readings.

Candidate bandwidths are spaced geometrically from a lower end that shrinks with the
number of subjects at the usual local linear rate (n^(-1/5) for the mean, n^(-1/6) for
the covariance surface; Fan & Gijbels 1996, sec. 3.2.2 and 7.8) down to no less than two
bin widths, up to half the domain. When the criterion is smallest there, the search goes
on upwards to twice the length of the domain (``EXTEND_TO``), where the local linear fit is
close to a global straight line or plane (a covariance criterion often falls all the way
to half the domain when the true surface is nearly bilinear; benchmarks/CHOICES.md). A
candidate is infeasible
when the local design is singular at any evaluation point or any bin holding data;
infeasible candidates score ``nan`` and are never chosen. After the first pass, the
neighbourhood of the best candidate is searched once more on a finer geometric grid.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from ..errors import EstimationError
from .arrays import FloatArray

if TYPE_CHECKING:  # the binning (compiled kernels) is not needed to choose candidates
    from .design import BinnedStats

# smooth(eval_points or None for the bin centres, counts, sums, h) -> estimate
Smoother = Callable[[FloatArray | None, FloatArray, FloatArray, float], FloatArray]
HatDiagonal = Callable[[FloatArray, float], FloatArray]

N_CANDIDATES = 12
N_REFINE = 6
EXTEND_TO = 2.0  # x the length of the domain


@dataclass(frozen=True)
class BandwidthChoice:
    """A bandwidth and how it was chosen.

    Attributes
    ----------
    value : float
        The bandwidth used.
    method : {"fixed", "gcv", "cv"}
    candidates, criterion : tuple of float
        Every candidate tried and its criterion (``nan`` where infeasible); empty when fixed.
    """

    value: float
    method: str
    candidates: tuple[float, ...] = ()
    criterion: tuple[float, ...] = ()


def candidate_bandwidths(span: float, bin_width: float, n_subjects: int, dim: int) -> FloatArray:
    """Geometric candidate grid from max(2 bin widths, span n^(-1/(4+dim)) / 8) to span / 2."""
    upper = 0.5 * span
    lower = max(2.0 * bin_width, span * max(n_subjects, 1) ** (-1.0 / (4 + dim)) / 8.0)
    lower = min(lower, upper / 4.0)
    return np.geomspace(lower, upper, N_CANDIDATES)


def _sse(stats: BinnedStats, est: FloatArray) -> tuple[FloatArray, bool]:
    """Binned sum of squared errors per fold, and whether ``est`` covers every bin with data."""
    has_data = stats.counts > 0
    defined = bool(np.all(np.isfinite(est) | ~has_data))
    safe = np.where(has_data, est, 0.0)
    axes = tuple(range(1, est.ndim))
    sse = (
        stats.sumsq
        - 2.0 * np.sum(stats.sums * safe, axis=axes)
        + np.sum(stats.counts * safe * safe, axis=axes)
    )
    return sse, defined


def _criterion(
    stats: BinnedStats,
    h: float,
    method: str,
    smooth: Smoother,
    hat: HatDiagonal,
    eval_points: FloatArray,
) -> float:
    total = stats.total()
    if not np.all(np.isfinite(smooth(eval_points, total.counts[0], total.sums[0], h))):
        return np.nan
    if method == "cv":
        train = stats.training()
        est = smooth(None, train.counts, train.sums, h)
        sse, defined = _sse(stats, est)
        return float(sse.sum() / total.n[0]) if defined else np.nan
    est = smooth(None, total.counts, total.sums, h)
    sse, defined = _sse(total, est)
    n = float(total.n[0])
    trace = float(np.nansum(total.counts[0] * hat(total.counts[0], h)))
    if not defined or trace >= n:
        return np.nan
    return float(sse[0] / n / (1.0 - trace / n) ** 2)


def select_bandwidth(
    stats: BinnedStats,
    candidates: FloatArray,
    method: str,
    smooth: Smoother,
    hat: HatDiagonal,
    eval_points: FloatArray,
    what: str,
    extend_to: float = 0.0,
) -> BandwidthChoice:
    """Choose the candidate that minimises the criterion, then refine around it.

    When the minimum is the largest candidate, larger ones are tried up to ``extend_to``.

    Raises
    ------
    EstimationError
        When no candidate gives a defined estimate (the design is too sparse for ``what``).
    """
    tried: dict[float, float] = {}

    def run(hs: FloatArray) -> None:
        for h in hs:
            tried[float(h)] = _criterion(stats, float(h), method, smooth, hat, eval_points)

    run(candidates)
    hs = np.array(sorted(tried))
    scores = np.array([tried[h] for h in hs])
    # A minimum at the top candidate is no minimum: go on upwards, by the grid's own ratio,
    # until the criterion rises or the limit is reached.
    ratio = float(candidates[-1] / candidates[-2]) if candidates.size > 1 else 2.0
    while (
        np.any(np.isfinite(scores))
        and int(np.nanargmin(scores)) == hs.size - 1
        and hs[-1] < extend_to * (1 - 1e-9)
    ):
        run(np.minimum(hs[-1] * ratio ** np.arange(1, 4), extend_to))
        hs = np.array(sorted(tried))
        scores = np.array([tried[h] for h in hs])
    if not np.any(np.isfinite(scores)):
        raise EstimationError(
            f"no bandwidth between {hs[0]:.4g} and {hs[-1]:.4g} gives a defined {what}: the "
            "readings do not cover the time domain densely enough; give a larger fixed "
            "bandwidth or narrow the domain"
        )
    best = int(np.nanargmin(scores))
    lo = hs[max(best - 1, 0)]
    hi = hs[min(best + 1, hs.size - 1)]
    run(np.geomspace(lo, hi, N_REFINE + 2)[1:-1])
    hs = np.array(sorted(tried))
    scores = np.array([tried[h] for h in hs])
    best = int(np.nanargmin(scores))
    return BandwidthChoice(
        float(hs[best]), method, tuple(map(float, hs)), tuple(map(float, scores))
    )
