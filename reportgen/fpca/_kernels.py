"""Compiled single-pass kernels for the per-reading sums (numba).

Each kernel walks the subject-sorted readings once and accumulates into small arrays
(bins x bins x folds), so no temporary of the size of the data is allocated. They replace
dense per-subject bin vectors and BLAS products, which cost about seven times a pandas
groupby over the same rows at 10^6 subjects (see benchmarks/RESULTS.md).

Linear binning as in ``smoothing.BinGrid.locate``: a reading at ``x`` gives weight
``1 - f`` to bin ``i`` and ``f`` to bin ``i + 1``, with ``i`` and ``f`` from
``pos = clip((x - lower) / width, 0, n_bins - 1)``, ``i = min(floor(pos), n_bins - 2)``.
``tests/fpca/test_design.py`` checks the results against explicit enumeration of the pairs.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numba import njit

from .arrays import FloatArray


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
def bin_readings(
    t: FloatArray,
    y: FloatArray,
    subject: np.ndarray,
    folds: np.ndarray,
    lower: float,
    width: float,
    n_bins: int,
    n_folds: int,
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
def bin_pairs(
    starts: np.ndarray,
    t: FloatArray,
    resid: FloatArray,
    folds: np.ndarray,
    lower: float,
    width: float,
    n_bins: int,
    n_folds: int,
) -> tuple[
    FloatArray, FloatArray, FloatArray, FloatArray, FloatArray, FloatArray, FloatArray, FloatArray
]:
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
def subject_sums(
    starts: np.ndarray, resid: FloatArray, phi: FloatArray
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


# Subjects with more readings than this are ordered by two stable sorts, not by insertion.
_INSERTION_MAX = 32


@njit(cache=True, nogil=True)
def order_within_subjects(starts: np.ndarray, t: FloatArray, y: FloatArray) -> np.ndarray:
    """The permutation that orders each subject's readings by (time, value), subjects kept
    in place. Insertion sort for the usual handful of readings, two stable merge sorts
    (value, then time) for a subject with many."""
    n = t.size
    perm = np.arange(n)
    n_subj = starts.size
    for s in range(n_subj):
        a = starts[s]
        b = starts[s + 1] if s + 1 < n_subj else n
        if b - a > _INSERTION_MAX:
            by_value = np.argsort(y[a:b], kind="mergesort")
            by_time = np.argsort(t[a:b][by_value], kind="mergesort")
            perm[a:b] = a + by_value[by_time]
            continue
        for i in range(a + 1, b):
            p = perm[i]
            j = i
            while j > a and (
                t[perm[j - 1]] > t[p] or (t[perm[j - 1]] == t[p] and y[perm[j - 1]] > y[p])
            ):
                perm[j] = perm[j - 1]
                j -= 1
            perm[j] = p
    return perm


@njit(cache=True, nogil=True)
def interpolate_columns(
    t: FloatArray, values: FloatArray, lower: float, width: float
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


# Subjects per block of the likelihood kernel: its scratch arrays (K x K x block) stay in
# the cache, and the innermost loops run over the subjects of a block, so that the compiler
# can use vector instructions (no reduction is reordered: results do not depend on them).
LIKELIHOOD_BLOCK = 64


@njit(cache=True, nogil=True, error_model="numpy")
def likelihood_sums(
    gram_t: FloatArray,
    cross_t: FloatArray,
    rr: FloatArray,
    n_obs: FloatArray,
    lam: FloatArray,
    s2: float,
    derivatives: bool,
) -> tuple[float, FloatArray, FloatArray, bool]:
    """Log-likelihood, score and Fisher information of the reduced-rank model, summed over
    subjects (the formulas are in ``likelihood``'s module docstring).

    ``gram_t`` is (K, K, n) and ``cross_t`` (K, n): subjects last. Per subject, ``H = I + D G
    D / sigma^2`` is factored by Cholesky, and ``Omega = D H^-1 D``, ``xi = Omega c /
    sigma^2``, ``Omega G`` and ``M = (G - G Omega G / sigma^2) / sigma^2`` are formed, a
    block of subjects at a time. Sums over subjects go into one accumulator per position
    in the block and are added up in a fixed order at the end. Returns ``ok = False`` when
    some ``H`` is not positive definite.
    """
    k, n_subj = cross_t.shape
    nb = LIKELIHOOD_BLOCK
    root = np.sqrt(lam)
    chol = np.zeros((k, k, nb))
    linv = np.zeros((k, k, nb))
    omega = np.zeros((k, k, nb))
    og = np.zeros((k, k, nb))
    m = np.zeros((k, k, nb))
    xi = np.zeros((k, nb))
    v = np.zeros(nb)
    cxi = np.zeros(nb)
    acc_logdet = np.zeros(nb)
    acc_quad = np.zeros(nb)
    acc_score = np.zeros((k, nb))
    acc_info = np.zeros((k, k, nb))
    acc_cross = np.zeros((k, nb))
    acc_resid = np.zeros(nb)
    acc_tr = np.zeros(nb)
    acc_tr2 = np.zeros(nb)
    acc_p2 = np.zeros((k, nb))
    score = np.zeros(k + 1)
    info = np.zeros((k + 1, k + 1))
    g = np.zeros((k, k, nb))
    c = np.zeros((k, nb))
    for i0 in range(0, n_subj, nb):
        w = min(nb, n_subj - i0)
        # the block's sums, copied to scratch: the loops below then vectorise
        for a in range(k):
            for i in range(w):
                c[a, i] = cross_t[a, i0 + i]
            for b in range(k):
                for i in range(w):
                    g[a, b, i] = gram_t[a, b, i0 + i]
        # Cholesky factor of H
        for a in range(k):
            for b in range(a + 1):
                f = root[a] * root[b] / s2
                for i in range(w):
                    v[i] = f * g[a, b, i]
                for j in range(b):
                    for i in range(w):
                        v[i] -= chol[a, j, i] * chol[b, j, i]
                if a == b:
                    bad = 0
                    for i in range(w):
                        v[i] += 1.0
                        bad += not v[i] > 0.0
                    if bad:
                        return np.nan, score, info, False
                    for i in range(w):
                        chol[a, a, i] = np.sqrt(v[i])
                        acc_logdet[i] += np.log(v[i])
                else:
                    for i in range(w):
                        chol[a, b, i] = v[i] / chol[b, b, i]
        # L^-1, column by column
        for b in range(k):
            for i in range(w):
                linv[b, b, i] = 1.0 / chol[b, b, i]
            for a in range(b + 1, k):
                for i in range(w):
                    v[i] = 0.0
                for j in range(b, a):
                    for i in range(w):
                        v[i] -= chol[a, j, i] * linv[j, b, i]
                for i in range(w):
                    linv[a, b, i] = v[i] / chol[a, a, i]
        # Omega = D L^-T L^-1 D
        for a in range(k):
            for b in range(a + 1):
                for i in range(w):
                    v[i] = 0.0
                for j in range(a, k):
                    for i in range(w):
                        v[i] += linv[j, a, i] * linv[j, b, i]
                f = root[a] * root[b]
                for i in range(w):
                    omega[a, b, i] = f * v[i]
                    omega[b, a, i] = f * v[i]
        for i in range(w):
            cxi[i] = 0.0
        for a in range(k):
            for i in range(w):
                v[i] = 0.0
            for b in range(k):
                for i in range(w):
                    v[i] += omega[a, b, i] * c[b, i]
            for i in range(w):
                xi[a, i] = v[i] / s2
                cxi[i] += c[a, i] * xi[a, i]
        for i in range(w):
            acc_quad[i] += (rr[i0 + i] - cxi[i]) / s2
        if not derivatives:
            continue
        for i in range(w):
            acc_resid[i] += rr[i0 + i] - 2.0 * cxi[i]
        for a in range(k):
            for i in range(w):
                v[i] = 0.0
            for b in range(k):
                for i in range(w):
                    v[i] += g[a, b, i] * xi[b, i]
            for i in range(w):
                acc_resid[i] += xi[a, i] * v[i]
                r = (c[a, i] - v[i]) / s2
                acc_cross[a, i] += r * r  # w_a^2
        for a in range(k):
            for b in range(k):
                for i in range(w):
                    v[i] = 0.0
                for j in range(k):
                    for i in range(w):
                        v[i] += omega[a, j, i] * g[j, b, i]
                for i in range(w):
                    og[a, b, i] = v[i]
        for a in range(k):
            for i in range(w):
                acc_tr[i] += og[a, a, i]
            for b in range(k):
                for i in range(w):
                    acc_tr2[i] += og[a, b, i] * og[b, a, i]
        for a in range(k):
            for b in range(a + 1):
                for i in range(w):
                    v[i] = 0.0
                for j in range(k):
                    for i in range(w):
                        v[i] += g[a, j, i] * og[j, b, i]
                for i in range(w):
                    x = (g[a, b, i] - v[i] / s2) / s2
                    m[a, b, i] = x
                    m[b, a, i] = x
                    acc_info[a, b, i] += 0.5 * x * x
        for a in range(k):
            # (Phi' S^-2 Phi)_aa = (M_aa - sum_j (Omega G)_ja M_ja / s2) / s2
            for i in range(w):
                v[i] = 0.0
            for j in range(k):
                for i in range(w):
                    v[i] += og[j, a, i] * m[j, a, i]
            for i in range(w):
                acc_score[a, i] -= 0.5 * m[a, a, i]
                acc_p2[a, i] += 0.5 * (m[a, a, i] - v[i] / s2) / s2
    n_tot = 0.0
    for i in range(n_subj):
        n_tot += n_obs[i]
    loglik = -0.5 * (
        n_tot * (np.log(2.0 * np.pi) + np.log(s2)) + np.sum(acc_logdet) + np.sum(acc_quad)
    )
    if derivatives:
        for a in range(k):
            score[a] = 0.5 * np.sum(acc_cross[a]) + np.sum(acc_score[a])
            info[a, k] = np.sum(acc_p2[a])
            info[k, a] = info[a, k]
            for b in range(a + 1):
                info[a, b] = np.sum(acc_info[a, b])
                info[b, a] = info[a, b]
        tr_og = np.sum(acc_tr)
        score[k] = 0.5 * (np.sum(acc_resid) / (s2 * s2) - (n_tot - tr_og / s2) / s2)
        info[k, k] = 0.5 * (n_tot - 2.0 * tr_og / s2 + np.sum(acc_tr2) / (s2 * s2)) / (s2 * s2)
    return loglik, score, info, True


@njit(cache=True, nogil=True, error_model="numpy")
def refine_terms(
    gram: FloatArray,
    cross: FloatArray,
    rr: FloatArray,
    n_obs: FloatArray,
    a: FloatArray,
    s2: float,
    gradient: bool,
) -> tuple[FloatArray, FloatArray, float, bool]:
    """Each subject's log-likelihood under the spline model ``A`` (M x K), sigma^2, and the
    gradient in A and sigma^2 summed over subjects (the formulas are in ``refine``'s module
    docstring). ``gram`` is (n, M, M), ``cross`` (n, M). Per subject, ``H = I + A' G A /
    sigma^2`` is factored by Cholesky and inverted. Returns ``ok = False`` when some ``H``
    is not positive definite.
    """
    n_subj, mb = cross.shape
    k = a.shape[1]
    each = np.zeros(n_subj)
    grad = np.zeros((mb, k))
    g_s2 = 0.0
    ga = np.zeros((mb, k))
    p = np.zeros((k, k))
    c = np.zeros(k)
    chol = np.zeros((k, k))
    hinv = np.zeros((k, k))
    linv = np.zeros((k, k))
    m = np.zeros(k)
    log2pi = np.log(2.0 * np.pi * s2)
    for i in range(n_subj):
        for r in range(mb):
            for j in range(k):
                v = 0.0
                for q in range(mb):
                    v += gram[i, r, q] * a[q, j]
                ga[r, j] = v
        for j in range(k):
            v = 0.0
            for r in range(mb):
                v += cross[i, r] * a[r, j]
            c[j] = v
            for u in range(j + 1):
                v = 0.0
                for r in range(mb):
                    v += a[r, j] * ga[r, u]
                p[j, u] = v
                p[u, j] = v
        logdet = 0.0
        for j in range(k):  # Cholesky of H = I + P / s2
            for u in range(j + 1):
                v = p[j, u] / s2 + (1.0 if j == u else 0.0)
                for q in range(u):
                    v -= chol[j, q] * chol[u, q]
                if j == u:
                    if v <= 0.0:
                        return each, grad, 0.0, False
                    chol[j, j] = np.sqrt(v)
                    logdet += 2.0 * np.log(chol[j, j])
                else:
                    chol[j, u] = v / chol[u, u]
        for j in range(k):  # L^-1 (lower triangular)
            for u in range(k):
                linv[j, u] = 0.0
            linv[j, j] = 1.0 / chol[j, j]
            for u in range(j):
                v = 0.0
                for q in range(u, j):
                    v += chol[j, q] * linv[q, u]
                linv[j, u] = -v / chol[j, j]
        for j in range(k):  # H^-1 = L^-T L^-1
            for u in range(j + 1):
                v = 0.0
                for q in range(j, k):
                    v += linv[q, j] * linv[q, u]
                hinv[j, u] = v
                hinv[u, j] = v
        cm = 0.0
        for j in range(k):
            v = 0.0
            for u in range(k):
                v += hinv[j, u] * c[u]
            m[j] = v / s2
            cm += c[j] * m[j]
        each[i] = -0.5 * (n_obs[i] * log2pi + logdet + (rr[i] - cm) / s2)
        if not gradient:
            continue
        mpm = 0.0
        trace = 0.0
        for j in range(k):
            for u in range(k):
                mpm += m[j] * p[j, u] * m[u]
                trace += p[j, u] * hinv[j, u]
        g_s2 += 0.5 * ((rr[i] - 2.0 * cm + mpm) / (s2 * s2) - (n_obs[i] - trace / s2) / s2)
        for r in range(mb):
            for j in range(k):
                v = cross[i, r] * m[j]
                for u in range(k):
                    v -= ga[r, u] * (hinv[u, j] + m[u] * m[j])
                grad[r, j] += v / s2
    return each, grad, g_s2, True


@njit(cache=True, nogil=True, error_model="numpy")
def resample_spread(
    moments: FloatArray,
    sums: FloatArray,
    draws: np.ndarray,
    total: FloatArray,
    beta: FloatArray,
    quadratic: np.ndarray,
    rtol: float,
) -> tuple[FloatArray, np.ndarray]:
    """The jackknife sums of the mean band's centre inside each resample of subjects.

    ``moments`` (n, g, 5) and ``sums`` (n, g, 3): each subject's kernel-weighted design
    moments and sums at each grid time (``meanband.subject_moments``); ``draws`` (B, n): how
    often each subject is drawn in each resample; ``total`` (B, g, 5) and ``beta`` (B, g, 3):
    each resample's summed moments and local fit. A subject drawn w times is w subjects of
    the resample, each with the deviation -e1' (S - S_i)^-1 (T_i - S_i beta) of leaving one
    copy out (as ``meanband.jackknife_deviations``, 2 x 2 or 3 x 3 by cofactors). Returns
    sum w d, sum w d^2 and sum w d^4 (B, g, 3), and where some deviation is undefined (B, g).
    """
    n, g = moments.shape[0], moments.shape[1]
    n_draws = draws.shape[0]
    out = np.zeros((n_draws, g, 3))
    undefined = np.zeros((n_draws, g), dtype=np.bool_)
    for b in range(n_draws):
        for i in range(n):
            w = draws[b, i]
            if w == 0:
                continue
            for x in range(g):
                m = moments[i, x]
                if m[0] == 0.0:  # no reading within the bandwidth: d = 0
                    continue
                s = total[b, x]
                p = beta[b, x]
                r0 = sums[i, x, 0] - (m[0] * p[0] + m[1] * p[1] + m[2] * p[2])
                r1 = sums[i, x, 1] - (m[1] * p[0] + m[2] * p[1] + m[3] * p[2])
                a = s[0] - m[0]
                bb = s[1] - m[1]
                c = s[2] - m[2]
                if quadratic[x]:
                    r2 = sums[i, x, 2] - (m[2] * p[0] + m[3] * p[1] + m[4] * p[2])
                    dd = s[3] - m[3]
                    f = s[4] - m[4]
                    c00 = c * f - dd * dd
                    c01 = c * dd - bb * f
                    c02 = bb * dd - c * c
                    det = a * c00 + bb * c01 + c * c02
                    top = c00 * r0 + c01 * r1 + c02 * r2
                    scale = a * c * f
                else:
                    det = a * c - bb * bb
                    top = c * r0 - bb * r1
                    scale = a * c
                if not det > rtol * scale:
                    undefined[b, x] = True
                    continue
                d = -top / det
                d2 = d * d
                out[b, x, 0] += w * d
                out[b, x, 1] += w * d2
                out[b, x, 2] += w * d2 * d2
    return out, undefined


KERNELS: tuple[Any, ...] = (
    bin_readings,
    bin_pairs,
    subject_sums,
    interpolate_columns,
    likelihood_sums,
    refine_terms,
    order_within_subjects,
    resample_spread,
)


def compiled_on_disk() -> bool:
    """Whether numba's on-disk cache holds every kernel (its index files exist).

    In a fresh checkout the first fit compiles them (several seconds, once); the command
    line says so before it happens. Reads numba's cache locator (a private attribute);
    when that is unavailable the answer is True, i.e. nothing is said.
    """
    import os

    try:
        paths = [k._cache._cache_file._index_path for k in KERNELS]
    except AttributeError:
        return True
    return all(os.path.exists(p) for p in paths)
