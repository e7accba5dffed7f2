"""Groups of subjects (arms, cohorts, sites) under one common fit.

Two things per group, both from the common fit's choices (the means as passes over the
data's parts, ``plan``):

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

from ..errors import EstimationError
from ._kernels import interpolate_columns
from .arrays import FloatArray, IntArray
from .design import BinnedStats, PairStats, Sample, mean_stats, pair_stats, subject_support
from .diagnostics import part_group_sums
from .executor import tree_sum
from .fit import MIN_SUPPORT
from .meanband import local_fits, mean_band
from .plan import Part, Partitioned, add_binned, add_pair_stats
from .result import FPCAFit
from .smoothing import BinGrid, get_kernel, local_linear_binned_1d

PERMUTATIONS = 1999
MIN_PERMUTATIONS = 199
# Permutation x subject cells: 1999 permutations up to 10^5 subjects, fewer beyond (the
# time per cell is in CHOICES.md); the report states the number used.
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
    means, band_centres, mean_se : ndarray of shape (G, n_grid)
        Each group's mean curve on the fit's grid, its band's centre and pointwise
        standard error (``group_means``; the error nan where no band is drawn).
    score_means : ndarray of shape (G, K)
    statistic : float
        Pillai's trace of the retained scores by group.
    p_value : float
        (1 + #{permutations with a statistic >= the observed}) / (1 + permutations).
    permutations : int
    seed : int
    tested : int
        Subjects whose scores the test permuted: every subject, or a seeded sample of
        them (``compare_groups``' ``tested``).
    """

    labels: tuple[str, ...]
    n_subjects: IntArray
    means: FloatArray
    band_centres: FloatArray
    mean_se: FloatArray
    score_means: FloatArray
    statistic: float
    p_value: float
    permutations: int
    seed: int
    tested: int


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
        raise EstimationError(
            "the scores do not vary in every retained component; the "
            "group test needs a total covariance that can be inverted"
        )
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


def permutation_test(
    scores: FloatArray,
    group: IntArray,
    n_groups: int,
    permutations: int = PERMUTATIONS,
    seed: int = 0,
) -> tuple[float, float]:
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


def _by_group(sample: Sample, groups: IntArray, n_groups: int) -> list[Sample]:
    """The readings of each group's subjects (``groups``: each subject's group)."""
    return [sample.subset(np.flatnonzero(groups == k).astype(np.intp)) for k in range(n_groups)]


def group_reading_sums(
    part: Part, groups: IntArray, n_groups: int, mbins: BinGrid
) -> list[BinnedStats]:
    """Pass: each group's binned readings (``groups``: the group of each of the part's
    subjects)."""
    part = part.writable()
    return [
        mean_stats(s, mbins, np.zeros(s.n_subjects, dtype=np.intp), 1)
        for s in _by_group(part.sample, groups, n_groups)
    ]


def group_pair_sums(
    part: Part, groups: IntArray, n_groups: int, fine: FloatArray, mbins: BinGrid, cbins: BinGrid
) -> list[PairStats]:
    """Pass: each group's binned raw covariances against its own mean (``fine``: the
    groups' means on ``mbins``' centres, one row a group)."""
    part = part.writable()
    out = []
    for k, s in enumerate(_by_group(part.sample, groups, n_groups)):
        resid = s.y - interpolate_columns(s.t, fine[k][:, None], mbins.lower, mbins.width)[:, 0]
        out.append(pair_stats(s, resid, cbins, np.zeros(s.n_subjects, dtype=np.intp), 1))
    return out


def group_support(
    part: Part, groups: IntArray, n_groups: int, grid: FloatArray, h: float
) -> IntArray:
    """Pass: each group's subjects with a reading within ``h`` of each grid time,
    (n_groups, n_grid)."""
    part = part.writable()
    return np.stack([subject_support(s, grid, h) for s in _by_group(part.sample, groups, n_groups)])


def group_means(
    data: Partitioned, fit: FPCAFit, groups: IntArray, n_groups: int
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Each group's mean on the fit's grid, its band's centre and standard error, shape
    (n_groups, n_grid) each: the common mean's estimator and band (``fit.mean_band``:
    robust bias correction, cluster-robust over subjects; no band, ``nan``, where fewer
    than ``fit.MIN_SUPPORT`` of the group's subjects have a reading within the bandwidth)
    applied to the group's subjects (``groups``: the group of each subject, by code), in
    three passes over ``data``."""
    opts = fit.options
    lo, hi = float(fit.grid[0]), float(fit.grid[-1])
    kernel = get_kernel(opts.kernel)
    mbins, cbins = BinGrid(lo, hi, opts.mean_bins), BinGrid(lo, hi, opts.covariance_bins)
    each = [(groups[codes],) for codes in data.subjects]
    found = data.executor.map(group_reading_sums, data.parts, each, (n_groups, mbins))
    h = fit.mean_bandwidth
    means, fines, totals = [], [], []
    for k in range(n_groups):
        total = tree_sum([f[k] for f in found], add_binned).total()
        totals.append(total)
        fine = local_linear_binned_1d(
            mbins.centers, mbins.centers, total.counts[0], total.sums[0], h, kernel
        )
        means.append(
            local_linear_binned_1d(
                fit.grid, mbins.centers, total.counts[0], total.sums[0], h, kernel
            )
        )
        fines.append(
            np.where(np.isfinite(fine), fine, np.interp(mbins.centers, fit.grid, fit.mean))
        )
    found_pairs = data.executor.map(
        group_pair_sums, data.parts, each, (n_groups, np.stack(fines), mbins, cbins)
    )
    support = np.sum(
        data.executor.map(group_support, data.parts, each, (n_groups, fit.grid, h)), axis=0
    )
    centres, covs, fits = [], [], []
    for k in range(n_groups):
        pstats = tree_sum([f[k] for f in found_pairs], add_pair_stats)
        counts, sums = totals[k].counts[0], totals[k].sums[0]
        centre, cov, quadratic = mean_band(pstats, counts, sums, mbins, cbins, fit.grid, h, kernel)
        centres.append(centre)
        covs.append(cov)
        fits.append(local_fits(fit.grid, mbins, counts, sums, h, opts.kernel, quadratic))
    drawn = np.isfinite(np.stack(means)) & (support >= MIN_SUPPORT)
    if fit.mean_variance == "jackknife":  # as the common mean's band
        covs, undefined, _ = data.jackknife(fits, covs, opts.band_level, groups)
        drawn &= ~undefined
    ses = np.sqrt(np.maximum(np.stack([np.diag(c) for c in covs]), 0.0))
    return np.stack(means), np.stack(centres), np.where(drawn, ses, np.nan)


def compare_groups(
    data: Partitioned,
    fit: FPCAFit,
    subject_group: np.ndarray,
    permutations: int = PERMUTATIONS,
    tested: tuple[IntArray, FloatArray] | None = None,
) -> GroupComparison:
    """Group means (passes over ``data``, the fit's readings as parts), the average scores
    of each group (a pass over the fit's kept scores) and the test of equal mean scores.
    ``subject_group``: the group label of each of ``fit.subjects``. ``tested``: the codes
    (increasing) and scores of the subjects the permutation test uses (by default every
    subject, whose scores are then gathered)."""
    labels, code = np.unique(np.asarray(subject_group, dtype=str), return_inverse=True)
    code = code.astype(np.intp)
    g = labels.size
    if g < 2:
        raise EstimationError("a group comparison needs two or more groups")
    means, centres, ses = group_means(data, fit, code, g)
    counts = np.bincount(code, minlength=g)
    kept = fit.kept_scores
    sums = kept.map(part_group_sums, [(code[c],) for c in kept.subjects], (g,))
    score_means = tree_sum(sums, np.add) / counts[:, None]
    codes, scores = (
        tested
        if tested is not None
        else (np.arange(fit.n_subjects, dtype=np.intp), fit.score_values)
    )
    permutations = permutation_count(codes.size, permutations)
    statistic, p_value = permutation_test(scores, code[codes], g, permutations, fit.options.seed)
    return GroupComparison(
        tuple(str(x) for x in labels),
        counts.astype(np.intp),
        means,
        centres,
        ses,
        score_means,
        statistic,
        p_value,
        permutations,
        fit.options.seed,
        int(codes.size),
    )
