"""The sparse sample as sorted arrays, and its binned summaries per cross-validation fold.

Everything downstream (bandwidth choice, mean, covariance, error variance) works from the
binned sums computed here, once per fit. Sums are kept per fold so that K-fold
cross-validation over subjects costs nothing extra: the training sums of fold ``f`` are the
total minus fold ``f``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._kernels import bin_pairs, bin_readings, order_within_subjects
from .arrays import FloatArray, IntArray
from .smoothing import BinGrid


@dataclass(frozen=True)
class Sample:
    """Readings sorted by subject.

    Attributes
    ----------
    subject : ndarray of shape (n_obs,)
        Subject index 0 .. n_subjects - 1, non-decreasing.
    t, y : ndarray of shape (n_obs,)
        Reading times and values.
    starts : ndarray of shape (n_subjects,)
        Offset of each subject's first reading.
    n_obs : ndarray of shape (n_subjects,)
        Readings per subject.
    """

    subject: IntArray
    t: FloatArray
    y: FloatArray
    starts: IntArray
    n_obs: IntArray

    @property
    def n_subjects(self) -> int:
        return int(self.starts.size)

    def reading_index(self, rows: IntArray) -> tuple[IntArray, IntArray, IntArray]:
        """Indices of the readings of the subjects at ``rows`` (in that order), the offset of
        each of those subjects in them, and their reading counts."""
        sizes = self.n_obs[rows].astype(np.intp)
        offsets = (np.cumsum(sizes) - sizes).astype(np.intp)  # empty for no rows
        index = np.repeat(self.starts[rows] - offsets, sizes) + np.arange(int(sizes.sum()))
        return index, offsets, sizes

    def subset(self, rows: IntArray) -> Sample:
        """The readings of the subjects at ``rows`` (in that order), recoded 0 .. len - 1."""
        index, offsets, sizes = self.reading_index(rows)
        codes = np.repeat(np.arange(rows.size), sizes)
        return Sample(codes, self.t[index], self.y[index], offsets, sizes)

    @classmethod
    def from_arrays(cls, subject: IntArray, t: FloatArray, y: FloatArray) -> Sample:
        """Sort by subject index, and each subject's readings by (time, value); index the
        subjects. Each sort is skipped when the arrays are in order already.

        The order of the readings decides the order in which every sum adds them, so a
        fixed order makes the results depend on the readings, not on the order of the
        rows that hold them. ``subject`` holds integer codes 0 .. n_subjects - 1, every
        code present.
        """
        subject = np.asarray(subject, dtype=np.intp)
        t = np.asarray(t, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        if subject.size > 1 and np.any(subject[1:] < subject[:-1]):
            order = np.argsort(subject, kind="stable")
            subject, t, y = subject[order], t[order], y[order]
        n_obs = np.bincount(subject)
        starts = (np.cumsum(n_obs) - n_obs).astype(np.intp)
        same = subject[1:] == subject[:-1]
        later = (t[1:] < t[:-1]) | ((t[1:] == t[:-1]) & (y[1:] < y[:-1]))
        if np.any(same & later):
            order = order_within_subjects(starts, t, y)
            t, y = t[order], y[order]
        return cls(subject, t, y, starts, n_obs.astype(np.intp))


def seeded_sample(n_subjects: int, cap: int, seed: int) -> IntArray:
    """All subjects, or a seeded sample of ``cap`` of them (sorted)."""
    if n_subjects <= cap:
        return np.arange(n_subjects, dtype=np.intp)
    rng = np.random.default_rng(seed)
    return np.sort(rng.choice(n_subjects, cap, replace=False)).astype(np.intp)


def assign_folds(n_subjects: int, n_folds: int, seed: int) -> IntArray:
    """Fold label of each subject: a seeded random permutation dealt round-robin.

    Subjects are never split across folds; fold sizes differ by at most one.
    """
    order = np.random.default_rng(seed).permutation(n_subjects)
    folds = np.empty(n_subjects, dtype=np.intp)
    folds[order] = np.arange(n_subjects) % n_folds
    return folds


@dataclass(frozen=True)
class BinnedStats:
    """Binned counts, sums and the sum of squared responses, per fold.

    ``counts`` and ``sums`` have shape (n_folds, *bins); ``sumsq`` and ``n`` have shape
    (n_folds,). For the covariance the "responses" are the raw covariances of pairs
    j != l within a subject, and ``n`` counts those pairs.
    """

    counts: FloatArray
    sums: FloatArray
    sumsq: FloatArray
    n: FloatArray

    def total(self) -> BinnedStats:
        return BinnedStats(
            self.counts.sum(axis=0, keepdims=True),
            self.sums.sum(axis=0, keepdims=True),
            self.sumsq.sum(keepdims=True),
            self.n.sum(keepdims=True),
        )

    def training(self) -> BinnedStats:
        """Sums with each fold left out in turn (fold f's training data)."""
        t = self.total()
        return BinnedStats(
            t.counts - self.counts, t.sums - self.sums, t.sumsq - self.sumsq, t.n - self.n
        )


def mean_stats(sample: Sample, grid: BinGrid, folds: IntArray, n_folds: int) -> BinnedStats:
    """Binned pooled readings per fold (input of the mean smoother), in one pass."""
    counts, sums, sumsq, n = bin_readings(
        sample.t, sample.y, sample.subject, folds, grid.lower, grid.width, grid.n_bins, n_folds
    )
    return BinnedStats(counts, sums, sumsq, n)


@dataclass(frozen=True)
class PairStats:
    """Binned raw covariances of a sample, per fold.

    Attributes
    ----------
    offdiag : BinnedStats
        Pairs j != l of a subject: counts and sums of r_ij r_il, shape (n_folds, G, G).
    diag : BinnedStats
        Single readings: counts and sums of r_ij^2, shape (n_folds, G).
    cross : ndarray of shape (G, G)
        sum over subjects of u_i u_i^T with u_i the binned residuals of subject i
        (off-diagonal sums plus the diagonal terms): the "meat" of the cluster-robust
        variance of a linear smoother of the readings.
    """

    offdiag: BinnedStats
    diag: BinnedStats
    cross: FloatArray


def pair_stats(
    sample: Sample,
    resid: FloatArray,
    grid: BinGrid,
    folds: IntArray,
    n_folds: int,
) -> PairStats:
    """Bin all within-subject pairs of residuals, per fold, in one pass over the readings.

    Each unordered pair j < l of a subject is visited once and spread over the four bins
    around (t_j, t_l) with bilinear weights; the ordered pairs are that sum plus its
    transpose. Work is sum_i n_i^2 / 2 pairs, with no per-subject bin vectors.
    """
    sums, counts, own, dcounts, dsums, sumsq, r4, n_read = bin_pairs(
        sample.starts, sample.t, resid, folds, grid.lower, grid.width, grid.n_bins, n_folds
    )
    n_pairs = np.bincount(folds, (sample.n_obs * (sample.n_obs - 1)).astype(np.float64), n_folds)
    offdiag = BinnedStats(counts, sums, sumsq, n_pairs)
    diag = BinnedStats(dcounts, dsums, r4, n_read)
    # sum_i u_i u_i^T with u_i the subject's binned residuals: pairs plus the readings' own
    return PairStats(offdiag, diag, sums.sum(axis=0) + own)


def subject_support(sample: Sample, grid: FloatArray, h: float) -> IntArray:
    """How many subjects have a reading within ``h`` of each grid time, (n_grid,).

    Each reading covers the grid times x with |x - t| < h; a subject counts once at x
    however many of its readings cover it (the union of its readings' intervals, counted
    with one difference array: readings are sorted by time within a subject).
    """
    t = sample.t
    start = np.searchsorted(grid, t - h, side="right")
    stop = np.searchsorted(grid, t + h, side="left")
    same = np.zeros(t.size, dtype=bool)
    same[1:] = sample.subject[1:] == sample.subject[:-1]
    before = np.concatenate([[0], stop[:-1]])
    begin = np.where(same, np.maximum(start, before), start)
    counted = (begin < stop).astype(np.int64)
    size = grid.size + 1
    delta = np.bincount(begin, counted, size) - np.bincount(stop, counted, size)
    out: IntArray = np.cumsum(delta)[: grid.size].round().astype(np.int64)
    return out
