"""The sparse sample as sorted arrays, and its binned summaries per cross-validation fold.

Everything downstream (bandwidth choice, mean, covariance, error variance) works from the
binned sums computed here, once per fit. Sums are kept per fold so that K-fold
cross-validation over subjects costs nothing extra: the training sums of fold ``f`` are the
total minus fold ``f``.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from .smoothing import BinGrid, FloatArray, bin_1d

IntArray = NDArray[np.intp]

# Subjects per dense block when accumulating pair sums; a block of U is
# _BLOCK x n_bins doubles (4096 x 101 x 8 B = 3.3 MB), small enough for cache-friendly BLAS.
_BLOCK = 4096


# Readings per chunk for per-reading work outside pair_stats: 2^18 doubles are 2 MB, so
# temporaries stay in cache and are recycled by the allocator instead of being mapped
# afresh (fresh pages of data-sized temporaries cost more than the arithmetic on them).
CHUNK = 1 << 18


def subject_chunks(starts: IntArray, n_total: int, size: int = CHUNK
                   ) -> Iterator[tuple[int, int, int, int]]:
    """Subject-aligned chunks: (first subject, end subject, first reading, end reading)."""
    n_subj = starts.size
    s0 = 0
    while s0 < n_subj:
        s1 = int(np.searchsorted(starts, starts[s0] + size, side="left"))
        s1 = min(max(s1, s0 + 1), n_subj)
        o1 = int(starts[s1]) if s1 < n_subj else n_total
        yield s0, s1, int(starts[s0]), o1
        s0 = s1


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

    @classmethod
    def from_arrays(cls, subject: IntArray, t: FloatArray, y: FloatArray) -> Sample:
        """Sort by subject index (stable; skipped when already sorted) and index the subjects.

        ``subject`` holds integer codes 0 .. n_subjects - 1, every code present.
        """
        subject = np.asarray(subject, dtype=np.intp)
        t = np.asarray(t, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        if subject.size > 1 and np.any(subject[1:] < subject[:-1]):
            order = np.argsort(subject, kind="stable")
            subject, t, y = subject[order], t[order], y[order]
        n_obs = np.bincount(subject)
        starts = np.concatenate(([0], np.cumsum(n_obs)[:-1])).astype(np.intp)
        return cls(subject, t, y, starts, n_obs.astype(np.intp))


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
            self.counts.sum(axis=0, keepdims=True), self.sums.sum(axis=0, keepdims=True),
            self.sumsq.sum(keepdims=True), self.n.sum(keepdims=True),
        )

    def training(self) -> BinnedStats:
        """Sums with each fold left out in turn (fold f's training data)."""
        t = self.total()
        return BinnedStats(
            t.counts - self.counts, t.sums - self.sums, t.sumsq - self.sumsq, t.n - self.n
        )


def mean_stats(sample: Sample, grid: BinGrid, folds: IntArray, n_folds: int) -> BinnedStats:
    """Binned pooled readings per fold (input of the mean smoother), chunk by chunk."""
    counts = np.zeros((n_folds, grid.n_bins))
    sums = np.zeros((n_folds, grid.n_bins))
    sumsq = np.zeros(n_folds)
    n = np.zeros(n_folds)
    for o0 in range(0, sample.t.size, CHUNK):
        o1 = min(o0 + CHUNK, sample.t.size)
        obs_fold = folds[sample.subject[o0:o1]]
        y = sample.y[o0:o1]
        c, sm = bin_1d(grid, sample.t[o0:o1], y, obs_fold, n_folds)
        counts += c
        sums += sm
        sumsq += np.bincount(obs_fold, y * y, n_folds)
        n += np.bincount(obs_fold, minlength=n_folds)
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
    sample: Sample, resid: FloatArray, grid: BinGrid, folds: IntArray, n_folds: int,
) -> PairStats:
    """Bin all within-subject pairs of residuals without forming the pairs.

    With ``u_i = sum_j r_ij b(t_ij)`` and ``v_i = sum_j b(t_ij)``, where ``b(t)`` is the
    vector of linear-binning weights of time ``t``, the binned sums over pairs j != l are
    ``sum_i u_i u_i^T - sum_ij r_ij^2 b b^T`` and the pair counts are
    ``sum_i v_i v_i^T - sum_ij b b^T``. The first terms are one matrix product per block
    of subjects and fold (rows of a block are ordered by fold, so each fold is a slice);
    the second are bincounts over the block's readings.

    Everything per reading is computed block by block (a few thousand subjects at a time):
    the temporaries stay small and in cache, and no array of the size of the data is
    allocated here.
    """
    g = grid.n_bins
    sums = np.zeros((n_folds, g, g))
    counts = np.zeros((n_folds, g, g))
    # b b^T terms per fold and left bin: weights wl^2, f^2 and wl f, unweighted and r^2-weighted
    outer = np.zeros((6, n_folds * g))
    dcounts = np.zeros(n_folds * g + 1)
    dsums = np.zeros(n_folds * g + 1)
    sumsq = np.zeros(n_folds)
    r4 = np.zeros(n_folds)
    n_read = np.zeros(n_folds)
    starts = np.append(sample.starts, sample.subject.size)
    for b0 in range(0, sample.n_subjects, _BLOCK):
        b1 = min(b0 + _BLOCK, sample.n_subjects)
        o0, o1 = starts[b0], starts[b1]
        local_subject = sample.subject[o0:o1] - b0
        left, frac = grid.locate(sample.t[o0:o1])
        wl = 1.0 - frac
        r = resid[o0:o1]
        r2 = r * r
        block_folds = folds[b0:b1]
        obs_fold = block_folds[local_subject]

        order = np.argsort(block_folds, kind="stable")
        rank = np.empty_like(order)
        rank[order] = np.arange(order.size)
        bounds = np.searchsorted(block_folds[order], np.arange(n_folds + 1))
        row = rank[local_subject] * g + left
        index = np.concatenate((row, row + 1))
        w = np.concatenate((wl, frac))
        size = (b1 - b0) * g
        v = np.bincount(index, w, size).reshape(-1, g)
        u = np.bincount(index, w * np.concatenate((r, r)), size).reshape(-1, g)
        for f in range(n_folds):
            uf, vf = u[bounds[f]:bounds[f + 1]], v[bounds[f]:bounds[f + 1]]
            sums[f] += uf.T @ uf
            counts[f] += vf.T @ vf

        cell = obs_fold * g + left
        for k, weight in enumerate((wl * wl, frac * frac, wl * frac)):
            outer[k] += np.bincount(cell, weight, n_folds * g)
            outer[3 + k] += np.bincount(cell, weight * r2, n_folds * g)
        dcounts += np.bincount(cell, wl, n_folds * g + 1)
        dcounts[1:] += np.bincount(cell, frac, n_folds * g)
        dsums += np.bincount(cell, wl * r2, n_folds * g + 1)
        dsums[1:] += np.bincount(cell, frac * r2, n_folds * g)
        # (sum_j r^2)^2 - sum_j r^4 per subject: the squared raw covariances of its pairs
        subj_r2 = np.bincount(local_subject, r2, b1 - b0)
        sumsq += np.bincount(block_folds, subj_r2 * subj_r2, n_folds)
        r4 += np.bincount(obs_fold, r2 * r2, n_folds)
        n_read += np.bincount(obs_fold, minlength=n_folds)
    cross = sums.sum(axis=0)  # u_i u_i^T summed, diagonal terms included

    rows, cols = np.arange(g - 1), np.arange(1, g)

    def outer_terms(k0: int) -> FloatArray:
        ta, tb, tc = (outer[k0 + k].reshape(n_folds, g)[:, :-1] for k in range(3))
        out = np.zeros((n_folds, g, g))
        out[:, rows, rows] += ta
        out[:, cols, cols] += tb
        out[:, rows, cols] += tc
        out[:, cols, rows] += tc
        return out

    counts -= outer_terms(0)
    sums -= outer_terms(3)
    n_pairs = np.bincount(folds, (sample.n_obs * (sample.n_obs - 1)).astype(np.float64), n_folds)
    offdiag = BinnedStats(counts, sums, sumsq - r4, n_pairs)
    # A left bin never is the last one, so the shifted sums stay inside each fold's row.
    diag = BinnedStats(dcounts[:-1].reshape(n_folds, g), dsums[:-1].reshape(n_folds, g), r4,
                       n_read)
    return PairStats(offdiag, diag, cross)
