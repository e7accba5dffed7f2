"""Groups of subjects (arms, cohorts, sites) under one common fit.

Two things per group, both from the common fit's choices:

* the group's mean curve: the local linear smoother of the group's readings at the common
  mean bandwidth, with its cluster-robust pointwise standard error (the same estimator as
  the common mean, applied to the group's subjects);
* the group's average scores on the retained components.

And one test of "the groups have equal mean scores" on all retained components together:
Pillai's trace of a one-way MANOVA, V = trace(H T^-1) (H: between-group, T: total sums of
squares and cross-products of the scores; Pillai 1955, Ann. Math. Stat. 26:117-121),
with its p-value from random permutations of the group labels over subjects (seeded). T
does not change under a permutation, so each permutation costs one pass of group sums.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..errors import EstimationError
from ._kernels import interpolate_columns
from .design import Sample, assign_folds, mean_stats, pair_stats
from .fit import FPCAFit, _mean_covariance
from .smoothing import BinGrid, FloatArray, get_kernel, local_linear_binned_1d

IntArray = NDArray[np.intp]
PERMUTATIONS = 1999
MIN_PERMUTATIONS = 199
# Permutation x subject cells (~70 ns each): 1999 permutations up to 10^5 subjects, fewer
# beyond (199 at 10^6: about 14 s); the report states the number used.
CELL_BUDGET = 2 * 10**8
_BLOCK = 2_000_000  # permutation x subject cells per block (memory ~ 8 bytes each x 2)


@dataclass(frozen=True)
class GroupComparison:
    """Per-group means and scores, and the permutation test of equal mean scores.

    Attributes
    ----------
    labels : tuple of str
        The groups, sorted.
    n_subjects : ndarray of shape (G,)
    means, mean_se : ndarray of shape (G, n_grid)
        Each group's mean curve on the fit's grid and its pointwise standard error (nan
        where the group's readings do not define the smoother).
    score_means : ndarray of shape (G, K)
    statistic : float
        Pillai's trace of the retained scores by group.
    p_value : float
        (1 + #{permutations with a statistic >= the observed}) / (1 + permutations).
    permutations : int
    seed : int
    """

    labels: tuple[str, ...]
    n_subjects: IntArray
    means: FloatArray
    mean_se: FloatArray
    score_means: FloatArray
    statistic: float
    p_value: float
    permutations: int
    seed: int


def pillai_trace(scores: FloatArray, group: IntArray, n_groups: int) -> float:
    """trace(H T^-1) for the rows of ``scores`` in groups ``group`` (codes 0 .. G-1)."""
    z = _whitened(scores)
    return float(_statistics(z, group[None, :], n_groups)[0])


def _whitened(scores: FloatArray) -> FloatArray:
    """Centred scores times T^-1/2, so that trace(H T^-1) is a sum of squared group sums."""
    centred = scores - scores.mean(axis=0)
    total = centred.T @ centred
    values, vectors = np.linalg.eigh(total)
    if values.size == 0 or not values[0] > 1e-12 * max(float(values[-1]), 1e-300):
        raise EstimationError("the scores do not vary in every retained component; the "
                              "group test needs a total covariance that can be inverted")
    result: FloatArray = centred @ (vectors / np.sqrt(values))
    return result


def _statistics(z: FloatArray, groups: IntArray, n_groups: int) -> FloatArray:
    """Pillai's trace for each row of ``groups`` (permutations x subjects)."""
    n_perm = groups.shape[0]
    counts = np.bincount(groups[0], minlength=n_groups).astype(np.float64)
    index = (groups + n_groups * np.arange(n_perm)[:, None]).ravel()
    out = np.zeros(n_perm)
    for k in range(z.shape[1]):
        sums = np.bincount(index, np.tile(z[:, k], n_perm), n_perm * n_groups)
        sums = sums.reshape(n_perm, n_groups)
        out += np.sum(sums * sums / counts, axis=1)
    return out


def permutation_count(n_subjects: int, requested: int = PERMUTATIONS) -> int:
    """The permutations to run: ``requested``, fewer for very many subjects (never < 199)."""
    affordable = CELL_BUDGET // max(n_subjects, 1)
    return int(min(requested, max(MIN_PERMUTATIONS, affordable)))


def permutation_test(scores: FloatArray, group: IntArray, n_groups: int,
                     permutations: int = PERMUTATIONS, seed: int = 0) -> tuple[float, float]:
    """Pillai's trace and its permutation p-value (labels permuted over subjects)."""
    z = _whitened(scores)
    observed = float(_statistics(z, group[None, :], n_groups)[0])
    rng = np.random.default_rng(seed)
    per_block = max(1, _BLOCK // max(group.size, 1))
    exceed, done = 0, 0
    while done < permutations:
        b = min(per_block, permutations - done)
        perms = rng.permuted(np.broadcast_to(group, (b, group.size)), axis=1)
        stats = _statistics(z, perms, n_groups)
        exceed += int(np.count_nonzero(stats >= observed * (1 - 1e-12)))
        done += b
    return observed, (1 + exceed) / (1 + permutations)


def group_mean(sample: Sample, fit: FPCAFit) -> tuple[FloatArray, FloatArray]:
    """A group's mean on the fit's grid and its cluster-robust standard error."""
    opts = fit.options
    lo, hi = float(fit.grid[0]), float(fit.grid[-1])
    kernel = get_kernel(opts.kernel)
    folds = assign_folds(sample.n_subjects, 1, opts.seed)
    mbins = BinGrid(lo, hi, opts.mean_bins)
    total = mean_stats(sample, mbins, folds, 1).total()
    h = fit.mean_bandwidth
    fine = local_linear_binned_1d(mbins.centers, mbins.centers, total.counts[0],
                                  total.sums[0], h, kernel)
    mean = local_linear_binned_1d(fit.grid, mbins.centers, total.counts[0], total.sums[0], h,
                                  kernel)
    filled = np.where(np.isfinite(fine), fine, np.interp(mbins.centers, fit.grid, fit.mean))
    resid = sample.y - interpolate_columns(sample.t, filled[:, None], lo, mbins.width)[:, 0]
    cbins = BinGrid(lo, hi, opts.covariance_bins)
    pstats = pair_stats(sample, resid, cbins, folds, 1)
    cov = _mean_covariance(pstats, cbins, fit.grid, h, kernel)
    se = np.sqrt(np.maximum(np.diag(cov), 0.0))
    return mean, np.where(np.isfinite(mean), se, np.nan)


def compare_groups(fit: FPCAFit, subject: IntArray, t: FloatArray, y: FloatArray,
                   subject_group: np.ndarray, permutations: int = PERMUTATIONS
                   ) -> GroupComparison:
    """Group means and the test of equal mean scores.

    ``subject`` holds codes into ``fit.subjects`` (one per reading); ``subject_group`` the
    group label of each of ``fit.subjects``.
    """
    labels, code = np.unique(np.asarray(subject_group, dtype=str), return_inverse=True)
    code = code.astype(np.intp)
    g = labels.size
    if g < 2:
        raise EstimationError("a group comparison needs two or more groups")
    reading_group = code[subject]
    means, ses = [], []
    for k in range(g):
        rows = reading_group == k
        local = np.unique(subject[rows], return_inverse=True)[1]
        sample = Sample.from_arrays(local.astype(np.intp), t[rows], y[rows])
        mean, se = group_mean(sample, fit)
        means.append(mean)
        ses.append(se)
    counts = np.bincount(code, minlength=g)
    score_means = np.stack([fit.score_values[code == k].mean(axis=0) for k in range(g)])
    permutations = permutation_count(code.size, permutations)
    statistic, p_value = permutation_test(fit.score_values, code, g, permutations,
                                          fit.options.seed)
    return GroupComparison(tuple(str(x) for x in labels), counts.astype(np.intp),
                           np.stack(means), np.stack(ses), score_means, statistic, p_value,
                           permutations, fit.options.seed)
