"""The mean's band: its centre (robust bias correction) and the variance of that centre.

The centre is the local quadratic fit at the mean's bandwidth (robust bias correction with
the bias estimated at the same bandwidth; :func:`mean_band`). Its variance over subjects is
estimated by the jackknife, leaving out one subject at a time (:func:`local_fits`,
:func:`jackknife_deviations`, summed over the data's parts by ``plan.Partitioned.jackknife``), or,
above ``JACKKNIFE_MAX_SUBJECTS``, by the cluster-robust sandwich (:func:`mean_covariance`).

Why the jackknife: the sandwich sum_i l' u_i u_i' l uses each subject's residuals from a
fit that includes it, so where the local fit leans on a few subjects' readings (few
readings at one end of the domain) those residuals are too small and the variance falls
short: measured over 100 seeds, its standard error was up to 36% short over the last third
of a design with few late readings (benchmarks/MEAN_BAND.md). Leaving the subject out
removes that (the jackknife form of the cluster-robust variance, "CR3": Bell & McCaffrey
2002, Survey Methodology 28:169-181; MacKinnon, Nielsen & Webb 2023, J. Econometrics
232:272-299; from memory). Each subject's deviation is exact, not linearised: the fit
without subject i at time x is e1' (S - S_i)^-1 (T - T_i), with S, T the local design
moments and sums at x, so the deviation is -e1' (S - S_i)^-1 (T_i - S_i beta(x)).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.special import ndtri
from scipy.stats import t as student_t

from .arrays import FloatArray, IntArray
from .design import PairStats, Sample
from .smoothing import (
    BinGrid,
    Kernel,
    equivalent_kernel_1d,
    equivalent_kernel_quadratic_1d,
    get_kernel,
    local_linear_binned_1d,
)

# Up to this many subjects the mean's variance is the jackknife's; above it the sandwich's.
# With many subjects no one subject carries the local fit and the two agree, while the
# jackknife's cost grows with the readings. Measured on the design with few late readings
# (benchmarks/MEAN_VARIANCE.md): at 10,000 subjects the jackknife's widened standard error
# is within 1% of the sandwich's everywhere and adds 0.3 s to a 0.4 s fit; at 20,000,
# within 0.1%, adding 0.7 s; at 100,000, 2.8 s.
JACKKNIFE_MAX_SUBJECTS = 10_000
# the subjects handled at once in a part (memory: about 80 x this x the grid size bytes)
_CHUNK = 4096
# a local design whose determinant is below this share of its diagonal's product is
# singular (the same tolerance as ``smoothing``'s local fits)
_SINGULAR_RTOL = 1e-9


def mean_covariance(pstats: PairStats, weights: FloatArray) -> FloatArray:
    """Cluster-robust covariance of a linear smoother of the readings on the grid,
    (n_grid, n_grid), from its equivalent-kernel weights on the covariance bins.

    With weights l(x), the estimate's deviation is sum_i l(x)' u_i over subjects (u_i: the
    subject's binned residuals), so its covariance is estimated by L (sum_i u_i u_i') L':
    the sandwich estimator with subjects as clusters (Liang & Zeger 1986, Biometrika
    73:13-22; applied to a linear smoother).
    """
    out: FloatArray = weights @ pstats.cross @ weights.T
    return 0.5 * (out + out.T)


def mean_band(
    pstats: PairStats,
    counts: FloatArray,
    sums: FloatArray,
    mbins: BinGrid,
    cbins: BinGrid,
    grid: FloatArray,
    h: float,
    kernel: Kernel,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """The mean's band by robust bias correction: (its centre on the grid, its sandwich
    covariance, the grid times where the local quadratic fit is used).

    A band around the local linear mean leaves out its smoothing bias, largest where the
    mean bends and readings are few. Robust bias correction (Calonico, Cattaneo & Farrell
    2018, JASA 113:767-779) subtracts an estimate of that bias and widens the band for the
    estimate's own variance; with the bias estimated at the same bandwidth (their rho = 1)
    the bias-corrected estimate and its variance are those of the local quadratic fit at
    that bandwidth (from memory), so the band is centred on the local quadratic fit, with
    its cluster-robust variance. Where the quadratic fit is undefined (too few distinct
    times in the window), the local linear fit and its variance are used.
    """
    linear = local_linear_binned_1d(grid, mbins.centers, counts, sums, h, kernel)
    quad = equivalent_kernel_quadratic_1d(grid, mbins.centers, counts, h, kernel) @ sums
    cbin_counts = pstats.diag.counts.sum(axis=0)
    lw = equivalent_kernel_1d(grid, cbins.centers, cbin_counts, h, kernel)
    qw = equivalent_kernel_quadratic_1d(grid, cbins.centers, cbin_counts, h, kernel)
    bad = ~(np.isfinite(quad) & np.all(np.isfinite(qw), axis=1))
    weights = np.where(bad[:, None], lw, qw)
    centre = np.where(bad, linear, quad)
    return centre, mean_covariance(pstats, weights), ~bad


@dataclass(frozen=True)
class LocalFits:
    """The local polynomial fits behind the band's centre at each grid time, on binned
    readings: what each subject's jackknife deviation needs.

    Attributes
    ----------
    grid : ndarray of shape (n_grid,)
    bins : BinGrid
        The bins the readings are summed on.
    h : float
    kernel : str
    quadratic : ndarray of bool, shape (n_grid,)
        Local quadratic at that time (else local linear, as in :func:`mean_band`).
    moments : ndarray of shape (n_grid, 5)
        sum_b counts_b K((c_b - x) / h) u^k, k = 0..4, with u = (c_b - x) / h.
    coef : ndarray of shape (n_grid, 3)
        The local fit's coefficients in powers of u (the third 0 for a linear fit).
    """

    grid: FloatArray
    bins: BinGrid
    h: float
    kernel: str
    quadratic: np.ndarray
    moments: FloatArray
    coef: FloatArray

    def weights(self) -> list[FloatArray]:
        """K((c_b - x) / h) u^k for k = 0..4, each (n_grid, n_bins)."""
        return _kernel_powers(self.grid, self.bins, self.h, self.kernel)


def _kernel_powers(grid: FloatArray, bins: BinGrid, h: float, kernel: str) -> list[FloatArray]:
    d = (bins.centers[None, :] - grid[:, None]) / h
    w = get_kernel(kernel)(d)
    return [w * d**k for k in range(5)]


def local_fits(
    grid: FloatArray,
    bins: BinGrid,
    counts: FloatArray,
    sums: FloatArray,
    h: float,
    kernel: str,
    quadratic: np.ndarray,
) -> LocalFits:
    """The local fits at each grid time from the binned counts and sums of all readings."""
    w = _kernel_powers(grid, bins, h, kernel)
    moments = np.stack([wk @ counts for wk in w], axis=1)
    rhs = np.stack([wk @ sums for wk in w[:3]], axis=1)
    coef = _solve_local(moments, rhs, quadratic)
    return LocalFits(grid, bins, h, kernel, quadratic, moments, coef)


def _solve_local(moments: FloatArray, rhs: FloatArray, quadratic: np.ndarray) -> FloatArray:
    """The local fits' coefficients (..., n_grid, 3) from their moments (..., n_grid, 5) and
    sums (..., n_grid, 3): quadratic where ``quadratic`` (n_grid,), else linear (third 0);
    ``nan`` where the local design is singular."""
    coef = np.zeros(rhs.shape)
    for p, cols in ((3, quadratic), (2, ~quadratic)):
        design = _design(moments[..., cols, :], p)
        ok = np.abs(np.linalg.det(design)) > 0
        found = np.full((*design.shape[:-2], p), np.nan)
        if np.any(ok):
            found[ok] = np.linalg.solve(design[ok], rhs[..., cols, :p][ok][..., None])[..., 0]
        coef[..., cols, :p] = found
    return coef


def _design(moments: FloatArray, p: int) -> FloatArray:
    """The (..., p, p) local design matrices [m_(j+k)] from moments (..., 5)."""
    return np.stack([moments[..., j : j + p] for j in range(p)], axis=-2)


def _first_of_inverse(m: FloatArray, g: FloatArray, p: int) -> tuple[FloatArray, np.ndarray]:
    """e1' M^-1 g for symmetric M given by its moments m (..., 5) (M = [m_(j+k)], p x p,
    p = 2 or 3), and where M is singular; by cofactors, so that a singular M in one
    place does not stop the rest."""
    if p == 2:
        det = m[..., 0] * m[..., 2] - m[..., 1] ** 2
        top = m[..., 2] * g[..., 0] - m[..., 1] * g[..., 1]
        scale = m[..., 0] * m[..., 2]
    else:
        a, b, c, d, f = (m[..., k] for k in range(5))  # [[a b c] [b c d] [c d f]]
        c00 = c * f - d * d
        c01 = c * d - b * f
        c02 = b * d - c * c
        det = a * c00 + b * c01 + c * c02
        top = c00 * g[..., 0] + c01 * g[..., 1] + c02 * g[..., 2]
        scale = a * c * f
    singular = ~(det > _SINGULAR_RTOL * scale)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(singular, 0.0, top / np.where(singular, 1.0, det))
    return out, singular


def subject_moments(
    fits: LocalFits, sample: Sample, weights: list[FloatArray] | None = None
) -> tuple[FloatArray, FloatArray]:
    """Each subject's local design moments S_i (n_subjects, n_grid, 5) and sums T_i
    (n_subjects, n_grid, 3) at each grid time, from its linearly binned readings."""
    n, bins = sample.n_subjects, fits.bins
    left, frac = bins.locate(sample.t)
    rows = np.concatenate([sample.subject, sample.subject])
    cols = np.concatenate([left, left + 1])
    share = np.concatenate([1.0 - frac, frac])
    shape = (n, bins.n_bins)
    counts = sparse.csr_matrix((share, (rows, cols)), shape=shape)
    sums = sparse.csr_matrix((share * np.concatenate([sample.y, sample.y]), (rows, cols)), shape)
    w = fits.weights() if weights is None else weights
    m = np.stack([np.asarray(counts @ wk.T) for wk in w], axis=-1)
    t = np.stack([np.asarray(sums @ wk.T) for wk in w[:3]], axis=-1)
    return m, t


def jackknife_deviations(
    fits: LocalFits, sample: Sample, weights: list[FloatArray] | None = None
) -> tuple[FloatArray, np.ndarray]:
    """Each subject's jackknife deviation of the fit at each grid time, (n_subjects, n_grid):
    the fit without the subject minus the fit with all, and the grid times where leaving
    some subject out leaves the local fit undefined (n_grid,). ``weights``: the fits'
    :meth:`LocalFits.weights` when the caller holds them."""
    n, g = sample.n_subjects, fits.grid.size
    m, t = subject_moments(fits, sample, weights)
    # T_i - S_i beta: the subject's kernel-weighted residuals from the local fit
    beta = fits.coef
    local = t - np.stack(
        [np.einsum("ngk,gk->ng", m[..., j : j + 3], beta) for j in range(3)], axis=-1
    )
    out = np.empty((n, g))
    undefined = np.zeros(g, dtype=bool)
    for p, cols_p in ((3, fits.quadratic), (2, ~fits.quadratic)):
        if not np.any(cols_p):
            continue
        first, singular = _first_of_inverse(
            fits.moments[None, cols_p] - m[:, cols_p], local[:, cols_p], p
        )
        out[:, cols_p] = -first
        undefined[cols_p] = np.any(singular, axis=0) | ~np.isfinite(fits.coef[cols_p, 0])
    return out, undefined


@dataclass(frozen=True)
class JackknifeSums:
    """Per group: sum_i d_i d_i' (n_groups, n_grid, n_grid), sum_i d_i and sum_i d_i^4
    (n_groups, n_grid), subjects (n_groups,) and the grid times where the jackknife is
    undefined (n_groups, n_grid), summed over parts."""

    cross: FloatArray
    total: FloatArray
    fourth: FloatArray
    n: FloatArray
    undefined: np.ndarray

    def __add__(self, other: JackknifeSums) -> JackknifeSums:
        return JackknifeSums(
            self.cross + other.cross,
            self.total + other.total,
            self.fourth + other.fourth,
            self.n + other.n,
            self.undefined | other.undefined,
        )

    def degrees_of_freedom(self, group: int = 0) -> FloatArray:
        """Effective degrees of freedom of the jackknife variance at each grid time
        (n_grid,), by :func:`effective_degrees_of_freedom`."""
        return effective_degrees_of_freedom(np.diag(self.cross[group]), self.fourth[group])

    def covariance(self, fallback: FloatArray, level: float, group: int = 0) -> FloatArray:
        """The band's covariance of one group's fit over the grid: the jackknife's,
        (n - 1)/n sum_i (d_i - dbar)(d_i - dbar)', with each time's standard error widened
        by :func:`small_sample_factor` at its :meth:`degrees_of_freedom`; rows and columns
        from ``fallback`` (the sandwich's) where it is undefined (``undefined``: no band is
        drawn there)."""
        n = float(self.n[group])
        mean = self.total[group] / n
        raw = (n - 1.0) / n * (self.cross[group] - n * np.outer(mean, mean))
        factor = small_sample_factor(self.degrees_of_freedom(group), level)
        out: FloatArray = 0.5 * (raw + raw.T) * np.outer(factor, factor)
        bad = self.undefined[group]
        out[bad, :] = fallback[bad, :]
        out[:, bad] = fallback[:, bad]
        return out


def effective_degrees_of_freedom(second: FloatArray, fourth: FloatArray) -> FloatArray:
    """Effective degrees of freedom of a jackknife variance, 3 (sum_i d_i^2)^2 / sum_i d_i^4,
    from ``second`` = sum_i d_i^2 and ``fourth`` = sum_i d_i^4 (any shape; inf where
    ``fourth`` is 0).

    A sum of n independent squares d_i^2 of variances s_i^2 has about the variance of a
    scaled chi-square with (sum s_i^2)^2 / sum s_i^4 degrees of freedom (Satterthwaite
    1946, Biometrics Bulletin 2:110-114); for normal d_i, E d_i^4 = 3 s_i^4 gives the
    estimate above. It is n for n equal contributions and near 1 where one subject carries
    the fit."""
    with np.errstate(divide="ignore", invalid="ignore"):
        out: FloatArray = np.where(fourth > 0, 3.0 * second**2 / fourth, np.inf)
    return out


def small_sample_factor(df: FloatArray, level: float) -> FloatArray:
    """t quantile at ``df`` over the normal quantile, at a two-sided ``level`` (n_grid,):
    the factor that widens a standard error with ``df`` degrees of freedom so that normal
    multipliers apply to it (1 for infinite ``df``)."""
    q = 0.5 + 0.5 * level
    out: FloatArray = student_t.ppf(q, np.where(np.isfinite(df), df, 1e12)) / ndtri(q)
    return out


def _chunks(n: int) -> list[IntArray]:
    """Consecutive rows 0 .. n - 1 in chunks of ``_CHUNK`` subjects."""
    return [np.arange(s, min(s + _CHUNK, n), dtype=np.intp) for s in range(0, n, _CHUNK)]


def jackknife_sums(sample: Sample, group: IntArray, fits: tuple[LocalFits, ...]) -> JackknifeSums:
    """The jackknife sums of a sample's subjects (``group``: each subject's group, an index
    into ``fits``, the groups' local fits), in chunks of subjects."""
    k, g = len(fits), fits[0].grid.size
    cross, total, fourth = np.zeros((k, g, g)), np.zeros((k, g)), np.zeros((k, g))
    n = np.bincount(group, minlength=k).astype(np.float64)
    undefined = np.zeros((k, g), dtype=bool)
    for j in range(k):
        members = np.flatnonzero(group == j).astype(np.intp)
        weights = fits[j].weights()
        for rows in _chunks(members.size):
            d, bad = jackknife_deviations(fits[j], sample.subset(members[rows]), weights)
            cross[j] += d.T @ d
            total[j] += d.sum(axis=0)
            fourth[j] += np.sum(d**4, axis=0)
            undefined[j] |= bad
    return JackknifeSums(cross, total, fourth, n, undefined)


# --- the simultaneous band's multiplier: bootstrap-t over resamples of subjects -------------

# Resamples of subjects behind the mean's simultaneous multiplier. (B + 1) x level is a whole
# number at the usual levels (0.9, 0.95, 0.99), so the multiplier is the order statistic
# whose Monte Carlo level is exact for exchangeable statistics (the rule of Monte Carlo
# tests; Davison & Hinkley 1997, Bootstrap Methods and their Application, ch. 4-5; from
# memory). The cost: one pass over the readings per resample (benchmarks/MEAN_VARIANCE.md).
MEAN_RESAMPLES = 199


def resample_counts(n: int, count: int, seed: int) -> np.ndarray:
    """How often each of ``n`` subjects is drawn in each of ``count`` resamples of n with
    replacement, (count, n) int32; seeded (a stream of its own)."""
    rng = np.random.default_rng([seed, 2])
    out = np.empty((count, n), dtype=np.int32)
    for b in range(count):
        out[b] = np.bincount(rng.integers(0, n, n), minlength=n)
    return out


@dataclass(frozen=True)
class ResampledMoments:
    """Each resample's local design moments (B, n_grid, 5) and sums (B, n_grid, 3), the
    sums over its subjects of :func:`subject_moments`, added over parts."""

    moments: FloatArray
    sums: FloatArray

    def __add__(self, other: ResampledMoments) -> ResampledMoments:
        return ResampledMoments(self.moments + other.moments, self.sums + other.sums)


def resample_moments(fits: LocalFits, sample: Sample, draws: np.ndarray) -> ResampledMoments:
    """Pass 1 of the bootstrap-t: the local moments and sums of each resample (``draws``:
    how often each of the sample's subjects is drawn in each resample, (B, n_subjects))."""
    b, g = draws.shape[0], fits.grid.size
    moments, sums = np.zeros((b, g * 5)), np.zeros((b, g * 3))
    weights = fits.weights()
    for rows in _chunks(sample.n_subjects):
        m, t = subject_moments(fits, sample.subset(rows), weights)
        w = draws[:, rows].astype(np.float64)
        moments += w @ m.reshape(rows.size, -1)
        sums += w @ t.reshape(rows.size, -1)
    return ResampledMoments(moments.reshape(b, g, 5), sums.reshape(b, g, 3))


def resample_fits(fits: LocalFits, found: ResampledMoments) -> tuple[FloatArray, np.ndarray]:
    """Each resample's local fit (B, n_grid, 3) at the main fit's bandwidth, quadratic where
    it is, as :func:`local_fits` fits the data, and where its local design is singular
    (B, n_grid; the coefficients 0 there)."""
    coef = _solve_local(found.moments, found.sums, fits.quadratic)
    singular = ~np.isfinite(coef[..., 0])
    return np.where(singular[..., None], 0.0, coef), singular


@dataclass(frozen=True)
class ResampledSpread:
    """Per resample: the jackknife sums sum w d, sum w d^2, sum w d^4 (B, n_grid, 3) of its
    subjects (``_kernels.resample_spread``), and where a deviation is undefined (B, n_grid),
    added over parts."""

    sums: FloatArray
    undefined: np.ndarray

    def __add__(self, other: ResampledSpread) -> ResampledSpread:
        return ResampledSpread(self.sums + other.sums, self.undefined | other.undefined)


def resample_spread(
    fits: LocalFits,
    sample: Sample,
    draws: np.ndarray,
    found: ResampledMoments,
    coef: FloatArray,
) -> ResampledSpread:
    """Pass 2 of the bootstrap-t: each resample's jackknife sums over the sample's subjects,
    with the resample's own local fits ``coef`` (:func:`resample_fits`)."""
    from ._kernels import resample_spread as kernel

    b, g = draws.shape[0], fits.grid.size
    out, undefined = np.zeros((b, g, 3)), np.zeros((b, g), dtype=bool)
    weights = fits.weights()
    for rows in _chunks(sample.n_subjects):
        m, t = subject_moments(fits, sample.subset(rows), weights)
        found_sums, bad = kernel(
            m,
            t,
            np.ascontiguousarray(draws[:, rows]),
            found.moments,
            coef,
            fits.quadratic,
            _SINGULAR_RTOL,
        )
        out += found_sums
        undefined |= bad
    return ResampledSpread(out, undefined)


@dataclass(frozen=True)
class BootstrapT:
    """The bootstrap-t statistics of the mean's simultaneous band.

    ``statistics`` (B,): each resample's largest studentized deviation of its band centre
    from the full data's over the times where a band is drawn, ``inf`` where the resample's
    fit or jackknife is undefined at one of them (counted in ``undefined``).
    ``multiplier``: their (B + 1) x level-th smallest (``inf`` when too many are undefined).
    """

    statistics: FloatArray
    multiplier: float
    undefined: int


def bootstrap_t(
    centre: FloatArray,
    banded: np.ndarray,
    coef: FloatArray,
    singular: np.ndarray,
    spread: ResampledSpread,
    n: int,
    level: float,
) -> BootstrapT:
    """The bootstrap-t multiplier of the mean's simultaneous band.

    Each resample's band centre and standard error are computed as the full data's are: the
    jackknife over its subjects (a subject drawn w times is w subjects), each time's
    standard error widened by :func:`small_sample_factor` at its degrees of freedom. The
    multiplier is the level quantile of max_t |centre*(t) - centre(t)| / se*(t) over the
    times ``banded``, so the band centre +- multiplier x se holds the whole mean with the
    level's probability to the bootstrap's accuracy, with the noise of the standard error
    itself (few subjects at a thin end) and a non-normal spread counted (the studentized
    bootstrap for simultaneous bands: Hall 1993, J. R. Statist. Soc. B 55:291-304; from
    memory).
    """
    first, second, fourth = spread.sums[..., 0], spread.sums[..., 1], spread.sums[..., 2]
    raw = (n - 1.0) / n * (second - first**2 / n)
    df = effective_degrees_of_freedom(second, fourth)
    with np.errstate(divide="ignore", invalid="ignore"):
        se = np.sqrt(np.maximum(raw, 0.0)) * small_sample_factor(df, level)
        dev = np.abs(coef[..., 0] - centre)[:, banded] / se[:, banded]
    bad = np.any((singular | spread.undefined)[:, banded] | ~np.isfinite(dev), axis=1)
    largest = np.max(dev, axis=1, initial=0.0, where=np.isfinite(dev))
    statistics = np.where(bad, np.inf, largest)
    k = int(np.ceil((statistics.size + 1) * level - 1e-9))
    multiplier = float(np.sort(statistics)[k - 1]) if k <= statistics.size else np.inf
    return BootstrapT(statistics, multiplier, int(bad.sum()))
