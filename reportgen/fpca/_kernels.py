"""Compiled single-pass kernels for the per-reading sums (numba).

Each kernel walks the subject-sorted readings once and accumulates into small arrays
(bins x bins x folds), so no temporary of the size of the data is allocated. They replace
dense per-subject bin vectors and BLAS products, which cost about seven times a pandas
groupby over the same rows at 10^6 subjects (see benchmarks/RESULTS.md).

Linear binning as in ``smoothing.BinGrid.locate``: a reading at ``x`` gives weight
``1 - f`` to bin ``i`` and ``f`` to bin ``i + 1``, with ``i`` and ``f`` from
``pos = clip((x - lower) / width, 0, n_bins - 1)``, ``i = min(floor(pos), n_bins - 2)``.
``tests/test_design.py`` checks the results against explicit enumeration of the pairs.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .smoothing import FloatArray


@njit(cache=True, nogil=True)
def _locate(x: float, lower: float, width: float, n_bins: int) -> tuple[int, float]:
    pos = (x - lower) / width
    if pos < 0.0:
        pos = 0.0
    elif pos > n_bins - 1.0:
        pos = n_bins - 1.0
    i = int(pos)
    if i > n_bins - 2:
        i = n_bins - 2
    return i, pos - i


@njit(cache=True, nogil=True)
def bin_readings(t: FloatArray, y: FloatArray, subject: np.ndarray, folds: np.ndarray,
                 lower: float, width: float, n_bins: int, n_folds: int
                 ) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Per fold: binned counts and sums of y, sum of y^2 and the number of readings."""
    counts = np.zeros((n_folds, n_bins))
    sums = np.zeros((n_folds, n_bins))
    sumsq = np.zeros(n_folds)
    n = np.zeros(n_folds)
    for j in range(t.size):
        f = folds[subject[j]]
        i, fr = _locate(t[j], lower, width, n_bins)
        yj = y[j]
        counts[f, i] += 1.0 - fr
        counts[f, i + 1] += fr
        sums[f, i] += (1.0 - fr) * yj
        sums[f, i + 1] += fr * yj
        sumsq[f] += yj * yj
        n[f] += 1.0
    return counts, sums, sumsq, n


@njit(cache=True, nogil=True)
def bin_pairs(starts: np.ndarray, t: FloatArray, resid: FloatArray, folds: np.ndarray,
              lower: float, width: float, n_bins: int, n_folds: int
              ) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray, FloatArray,
                         FloatArray, FloatArray, FloatArray]:
    """Binned raw covariances of all within-subject pairs j != l, per fold.

    Returns the pair sums and counts (n_folds, bins, bins), the readings' own terms
    sum r^2 b b^T (bins, bins), the binned squares r^2 and their counts (n_folds, bins),
    the sum over pairs of the squared raw covariances, the sum of r^4 and the number of
    readings (each n_folds).
    """
    g = n_bins
    sums = np.zeros((n_folds, g, g))
    counts = np.zeros((n_folds, g, g))
    own = np.zeros((g, g))
    dcounts = np.zeros((n_folds, g))
    dsums = np.zeros((n_folds, g))
    sumsq = np.zeros(n_folds)
    r4 = np.zeros(n_folds)
    n_read = np.zeros(n_folds)
    n_subj = starts.size
    for s in range(n_subj):
        f = folds[s]
        o0 = starts[s]
        o1 = starts[s + 1] if s + 1 < n_subj else t.size
        s2 = 0.0
        for j in range(o0, o1):
            a, fa = _locate(t[j], lower, width, g)
            wa = 1.0 - fa
            ra = resid[j]
            r2 = ra * ra
            s2 += r2
            r4[f] += r2 * r2
            n_read[f] += 1.0
            dcounts[f, a] += wa
            dcounts[f, a + 1] += fa
            dsums[f, a] += wa * r2
            dsums[f, a + 1] += fa * r2
            own[a, a] += wa * wa * r2
            own[a + 1, a + 1] += fa * fa * r2
            own[a, a + 1] += wa * fa * r2
            own[a + 1, a] += wa * fa * r2
            for k in range(j + 1, o1):  # each unordered pair once; mirrored below
                b, fb = _locate(t[k], lower, width, g)
                wb = 1.0 - fb
                p = ra * resid[k]
                c00, c01, c10, c11 = wa * wb, wa * fb, fa * wb, fa * fb
                counts[f, a, b] += c00
                counts[f, a, b + 1] += c01
                counts[f, a + 1, b] += c10
                counts[f, a + 1, b + 1] += c11
                sums[f, a, b] += c00 * p
                sums[f, a, b + 1] += c01 * p
                sums[f, a + 1, b] += c10 * p
                sums[f, a + 1, b + 1] += c11 * p
        sumsq[f] += s2 * s2
    for f in range(n_folds):
        sums[f] = sums[f] + sums[f].T
        counts[f] = counts[f] + counts[f].T
    return sums, counts, own, dcounts, dsums, sumsq - r4, r4, n_read


@njit(cache=True, nogil=True)
def subject_sums(starts: np.ndarray, resid: FloatArray, phi: FloatArray
                 ) -> tuple[FloatArray, FloatArray]:
    """Per subject: Phi_i' Phi_i, shape (n, K, K), and Phi_i' r_i, shape (n, K)."""
    n_subj, k = starts.size, phi.shape[1]
    gram = np.zeros((n_subj, k, k))
    cross = np.zeros((n_subj, k))
    for s in range(n_subj):
        o1 = starts[s + 1] if s + 1 < n_subj else resid.size
        for j in range(starts[s], o1):
            for a in range(k):
                pa = phi[j, a]
                cross[s, a] += pa * resid[j]
                for b in range(a, k):
                    gram[s, a, b] += pa * phi[j, b]
        for a in range(k):
            for b in range(a + 1, k):
                gram[s, b, a] = gram[s, a, b]
    return gram, cross


@njit(cache=True, nogil=True)
def interpolate_columns(t: FloatArray, values: FloatArray, lower: float, width: float
                        ) -> FloatArray:
    """Columns of ``values`` (on a regular grid from ``lower`` with step ``width``) at ``t``,
    by linear interpolation; times beyond the ends take the end values. Shape (n, K)."""
    n_bins, k = values.shape
    out = np.empty((t.size, k))
    for j in range(t.size):
        i, fr = _locate(t[j], lower, width, n_bins)
        for c in range(k):
            out[j, c] = (1.0 - fr) * values[i, c] + fr * values[i + 1, c]
    return out
