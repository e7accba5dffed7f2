"""Pair sums without forming pairs equal the sums over explicitly enumerated pairs."""

from __future__ import annotations

import numpy as np

from reportgen.fpca.design import Sample, assign_folds, pair_stats
from reportgen.fpca.smoothing import BinGrid, bin_1d


def test_pair_sums_equal_explicit_pairs() -> None:
    # Reference: the definition of the raw covariances of Yao, Müller & Wang (2005, sec. 2)
    # -- products r_ij r_il over pairs j != l of one subject -- enumerated one by one and
    # spread over the four nearest bins with bilinear weights (Wand 1994).
    rng = np.random.default_rng(0)
    m = rng.integers(1, 6, 50)
    subj = np.repeat(np.arange(50), m)
    t = rng.uniform(0, 1, subj.size)
    r = rng.normal(size=subj.size)
    sample = Sample.from_arrays(subj, t, r)
    grid = BinGrid(0.0, 1.0, 11)
    folds = assign_folds(50, 3, seed=0)
    # the sample holds the readings in its own order, (subject, time): r as it holds them
    stats = pair_stats(sample, sample.y, grid, folds, 3)
    counts, sums, sumsq = np.zeros((3, 11, 11)), np.zeros((3, 11, 11)), np.zeros(3)
    left, frac = grid.locate(t)
    for a in range(subj.size):
        for b in range(subj.size):
            if a == b or subj[a] != subj[b]:
                continue
            f = folds[subj[a]]
            sumsq[f] += (r[a] * r[b]) ** 2
            for ia, wa in ((left[a], 1 - frac[a]), (left[a] + 1, frac[a])):
                for ib, wb in ((left[b], 1 - frac[b]), (left[b] + 1, frac[b])):
                    counts[f, ia, ib] += wa * wb
                    sums[f, ia, ib] += wa * wb * r[a] * r[b]
    np.testing.assert_allclose(stats.offdiag.counts, counts, atol=1e-12)
    np.testing.assert_allclose(stats.offdiag.sums, sums, atol=1e-12)
    np.testing.assert_allclose(stats.offdiag.sumsq, sumsq, rtol=1e-12)
    np.testing.assert_array_equal(stats.offdiag.n, np.bincount(folds, m * (m - 1), 3))
    dcounts, dsums = bin_1d(grid, t, r * r, folds[subj], 3)
    np.testing.assert_allclose(stats.diag.counts, dcounts, atol=1e-12)
    np.testing.assert_allclose(stats.diag.sums, dsums, atol=1e-12)


def test_folds_never_split_a_subject_and_are_balanced() -> None:
    folds = assign_folds(103, 5, seed=4)
    assert folds.shape == (103,)
    sizes = np.bincount(folds)
    assert sizes.max() - sizes.min() <= 1 and sizes.sum() == 103


def test_one_pass_binning_and_interpolation_match_numpy() -> None:
    # Reference: the vectorized numpy binning (bin_1d, two bincounts per weight) and
    # numpy.interp (general-purpose library) on the same readings.
    from reportgen.fpca._kernels import interpolate_columns
    from reportgen.fpca.design import mean_stats

    rng = np.random.default_rng(6)
    subj = np.repeat(np.arange(40), rng.integers(1, 6, 40))
    t = rng.uniform(-0.1, 1.1, subj.size)  # some readings beyond the ends: clipped
    y = rng.normal(size=subj.size)
    grid = BinGrid(0.0, 1.0, 21)
    folds = assign_folds(40, 4, seed=1)
    stats = mean_stats(Sample.from_arrays(subj, t, y), grid, folds, 4)
    counts, sums = bin_1d(grid, t, y, folds[subj], 4)
    np.testing.assert_allclose(stats.counts, counts, atol=1e-12)
    np.testing.assert_allclose(stats.sums, sums, atol=1e-12)
    np.testing.assert_allclose(stats.sumsq, np.bincount(folds[subj], y * y, 4))
    values = np.column_stack([np.sin(grid.centers), grid.centers**2])
    ours = interpolate_columns(t, values, grid.lower, grid.width)
    for k in range(2):
        np.testing.assert_allclose(ours[:, k], np.interp(t, grid.centers, values[:, k]), atol=1e-12)
