"""Local linear smoothing in one and two dimensions, exact and linearly binned.

The binned smoothers follow the linear-binning scheme of Wand (1994) and Fan & Marron (1994):
each observation spreads a unit of weight over the two (1-D) or four (2-D) nearest bin
centres in proportion to its proximity; the local linear fit is then computed from the
binned counts and sums with one dense kernel matrix, so its cost depends on the number of
bins and not on the number of observations.

All smoothers return ``nan`` at evaluation points where the local design is singular
(fewer than two distinct abscissae in the window in 1-D, three non-collinear points in 2-D);
callers treat a ``nan`` as "this bandwidth is too small for this design".

References
----------
Wand, M. P. (1994). Fast computation of multivariate kernel estimators. JCGS 3, 433-445.
    doi:10.1080/10618600.1994.10474656
Fan, J. and Marron, J. S. (1994). Fast implementations of nonparametric curve estimators.
    JCGS 3, 35-56. doi:10.1080/10618600.1994.10474629
Fan, J. and Gijbels, I. (1996). Local Polynomial Modelling and Its Applications. Chapman & Hall.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from .arrays import FloatArray

Kernel = Callable[[FloatArray], FloatArray]

# A local design is called singular when its determinant is below this fraction of the
# product of its diagonal moments (a scale-free test; common practice, no source).
_SINGULAR_RTOL = 1e-9


def epanechnikov(u: FloatArray) -> FloatArray:
    """Epanechnikov kernel 0.75 (1 - u^2) on [-1, 1] (Fan & Gijbels 1996, sec. 2.2)."""
    return np.where(np.abs(u) < 1.0, 0.75 * (1.0 - u * u), 0.0)


def gaussian(u: FloatArray) -> FloatArray:
    """Standard normal density; the bandwidth is its standard deviation."""
    out: FloatArray = np.exp(-0.5 * u * u) / np.sqrt(2.0 * np.pi)
    return out


KERNELS: dict[str, Kernel] = {"epanechnikov": epanechnikov, "gaussian": gaussian}


def get_kernel(name: str) -> Kernel:
    """Return the kernel function called ``name`` (``"epanechnikov"`` or ``"gaussian"``)."""
    try:
        return KERNELS[name]
    except KeyError:
        allowed = ", ".join(sorted(KERNELS))
        raise ValueError(f"kernel must be one of {allowed}; got {name!r}") from None


@dataclass(frozen=True)
class BinGrid:
    """Equally spaced bin centres ``lower, ..., upper`` (``n_bins`` of them)."""

    lower: float
    upper: float
    n_bins: int

    @property
    def centers(self) -> FloatArray:
        return np.linspace(self.lower, self.upper, self.n_bins)

    @property
    def width(self) -> float:
        return (self.upper - self.lower) / (self.n_bins - 1)

    def locate(self, x: FloatArray) -> tuple[NDArray[np.intp], FloatArray]:
        """Left bin index ``i`` and the share ``f`` that goes to bin ``i + 1`` (linear binning).

        Points outside ``[lower, upper]`` are clipped onto the end bins.
        """
        pos = (np.asarray(x, dtype=np.float64) - self.lower) / self.width
        pos = np.clip(pos, 0.0, self.n_bins - 1.0)
        left = np.minimum(pos.astype(np.intp), self.n_bins - 2)
        return left, pos - left


def bin_1d(
    grid: BinGrid,
    x: FloatArray,
    y: FloatArray,
    group: NDArray[np.intp] | None = None,
    n_groups: int = 1,
) -> tuple[FloatArray, FloatArray]:
    """Linearly binned counts and sums of ``y``, per group.

    Returns
    -------
    counts, sums : ndarray of shape (n_groups, n_bins)
    """
    left, frac = grid.locate(x)
    g = grid.n_bins
    index = left if group is None else group * g + left
    size = n_groups * g
    wl = 1.0 - frac
    counts = np.bincount(index, wl, size) + np.bincount(index + 1, frac, size)
    sums = np.bincount(index, wl * y, size) + np.bincount(index + 1, frac * y, size)
    return counts.reshape(n_groups, g), sums.reshape(n_groups, g)


def _weight_matrices(
    eval_x: FloatArray, centers: FloatArray, h: float, kernel: Kernel
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Kernel weights and their first and second moment versions, shape (n_eval, n_bins)."""
    d = centers[None, :] - np.asarray(eval_x, dtype=np.float64)[:, None]
    w = kernel(d / h)
    wd = w * d
    return w, wd, wd * d


def local_linear_binned_1d(
    eval_x: FloatArray,
    centers: FloatArray,
    counts: FloatArray,
    sums: FloatArray,
    h: float,
    kernel: Kernel = epanechnikov,
) -> FloatArray:
    """Local linear estimate at ``eval_x`` from binned ``counts`` and ``sums``.

    ``counts`` and ``sums`` have shape (..., n_bins); the result has shape (..., n_eval).
    """
    w, wd, wdd = _weight_matrices(eval_x, centers, h, kernel)
    s0, s1, s2 = counts @ w.T, counts @ wd.T, counts @ wdd.T
    t0, t1 = sums @ w.T, sums @ wd.T
    det = s0 * s2 - s1 * s1
    with np.errstate(divide="ignore", invalid="ignore"):
        est = (s2 * t0 - s1 * t1) / det
    return np.where(det > _SINGULAR_RTOL * s0 * s2, est, np.nan)


def hat_diagonal_1d(
    centers: FloatArray, counts: FloatArray, h: float, kernel: Kernel = epanechnikov
) -> FloatArray:
    """Weight that each bin's own data receive in the estimate at that bin (per unit count).

    For the local linear fit at a bin centre ``x`` the weight of an observation at ``x``
    is ``K(0) s2 / (s0 s2 - s1^2)`` (Fan & Gijbels 1996, eq. 3.5 with x_i = x); summed over
    the data it gives the trace of the smoother matrix used by GCV.
    """
    w, wd, wdd = _weight_matrices(centers, centers, h, kernel)
    s0, s1, s2 = counts @ w.T, counts @ wd.T, counts @ wdd.T
    k0 = float(kernel(np.zeros(1))[0])
    with np.errstate(divide="ignore", invalid="ignore"):
        out: FloatArray = k0 * s2 / (s0 * s2 - s1 * s1)
    return out


def _moments_2d(
    eval_x: FloatArray,
    centers: FloatArray,
    counts: FloatArray,
    sums: FloatArray,
    h: float,
    kernel: Kernel,
    symmetric: bool = False,
) -> tuple[FloatArray, ...]:
    """Product-kernel moments S_pq and T_pq on the evaluation grid, each (..., n_eval, n_eval).

    With ``symmetric=True`` (counts and sums symmetric, as binned raw covariances are), the
    moments of the second axis are the transposes of those of the first, which saves three
    of the nine matrix products.
    """
    w, wd, wdd = _weight_matrices(eval_x, centers, h, kernel)
    cw = counts @ w.T  # right factor: second axis
    s00, s10, s20 = w @ cw, wd @ cw, wdd @ cw
    sw = sums @ w.T
    t00, t10 = w @ sw, wd @ sw
    if symmetric:
        s01, s02, t01 = (np.swapaxes(x, -1, -2) for x in (s10, s20, t10))
        s11 = wd @ (counts @ wd.T)
    else:
        cd = counts @ wd.T
        s01, s11, s02 = w @ cd, wd @ cd, w @ (counts @ wdd.T)
        t01 = w @ (sums @ wd.T)
    return s00, s10, s01, s20, s11, s02, t00, t10, t01


def _cofactors(
    s00: FloatArray,
    s10: FloatArray,
    s01: FloatArray,
    s20: FloatArray,
    s11: FloatArray,
    s02: FloatArray,
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """First-row cofactors and determinant of the symmetric 3x3 local design matrix."""
    c0 = s20 * s02 - s11 * s11
    c1 = s11 * s01 - s10 * s02
    c2 = s10 * s11 - s20 * s01
    return c0, c1, c2, s00 * c0 + s10 * c1 + s01 * c2


def local_linear_binned_2d(
    eval_x: FloatArray,
    centers: FloatArray,
    counts: FloatArray,
    sums: FloatArray,
    h: float,
    kernel: Kernel = epanechnikov,
    symmetric: bool = False,
) -> FloatArray:
    """Local linear surface on the square grid ``eval_x x eval_x`` from binned data.

    ``counts`` and ``sums`` have shape (..., n_bins, n_bins); the product kernel
    ``K(.-s)/h) K((.-t)/h)`` uses one bandwidth for both axes (the surface is symmetric).
    The result has shape (..., n_eval, n_eval).
    """
    s00, s10, s01, s20, s11, s02, t00, t10, t01 = _moments_2d(
        eval_x, centers, counts, sums, h, kernel, symmetric
    )
    c0, c1, c2, det = _cofactors(s00, s10, s01, s20, s11, s02)
    with np.errstate(divide="ignore", invalid="ignore"):
        est = (c0 * t00 + c1 * t10 + c2 * t01) / det
    return np.where(det > _SINGULAR_RTOL * s00 * s20 * s02, est, np.nan)


def hat_diagonal_2d(
    centers: FloatArray,
    counts: FloatArray,
    h: float,
    kernel: Kernel = epanechnikov,
    symmetric: bool = False,
) -> FloatArray:
    """2-D analogue of :func:`hat_diagonal_1d`: ``K(0)^2 [M^-1]_00`` at each bin."""
    zeros = np.zeros_like(counts)
    s00, s10, s01, s20, s11, s02, *_ = _moments_2d(
        centers, centers, counts, zeros, h, kernel, symmetric
    )
    c0, _, _, det = _cofactors(s00, s10, s01, s20, s11, s02)
    k0 = float(kernel(np.zeros(1))[0])
    with np.errstate(divide="ignore", invalid="ignore"):
        return k0 * k0 * c0 / det


def design_conditioning_2d(
    eval_x: FloatArray,
    centers: FloatArray,
    counts: FloatArray,
    h: float,
    kernel: Kernel = epanechnikov,
) -> FloatArray:
    """How far from singular the 2-D local linear design is at each diagonal point (x, x).

    The determinant of the 3 x 3 local design matrix over the product of its diagonal
    moments (scale-free; 1 for a design balanced around the point, 0 for a singular one),
    on the diagonal of ``eval_x x eval_x``, shape (n_eval,). Near 0 the local fit rests on
    few, lopsided pairs and its estimate is unstable.
    """
    zeros = np.zeros_like(counts)
    s00, s10, s01, s20, s11, s02, *_ = _moments_2d(eval_x, centers, counts, zeros, h, kernel, True)
    *_, det = _cofactors(s00, s10, s01, s20, s11, s02)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.diagonal(det / (s00 * s20 * s02))
    return np.where(np.isfinite(ratio), ratio, 0.0)


def equivalent_kernel_1d(
    eval_x: FloatArray,
    centers: FloatArray,
    counts: FloatArray,
    h: float,
    kernel: Kernel = epanechnikov,
) -> FloatArray:
    """Weights ``l(x, g)`` with ``estimate(x) = sum_g l(x, g) sums_g``, shape (n_eval, n_bins).

    These are the local linear "equivalent kernel" weights (Fan & Gijbels 1996, eq. 3.5)
    on binned data; rows are ``nan`` where the local design is singular.
    """
    w, wd, wdd = _weight_matrices(eval_x, centers, h, kernel)
    s0, s1, s2 = w @ counts, wd @ counts, wdd @ counts
    det = s0 * s2 - s1 * s1
    ok = det > _SINGULAR_RTOL * s0 * s2
    with np.errstate(divide="ignore", invalid="ignore"):
        weights = (w * s2[:, None] - wd * s1[:, None]) / det[:, None]
    return np.where(ok[:, None], weights, np.nan)


def equivalent_kernel_quadratic_1d(
    eval_x: FloatArray,
    centers: FloatArray,
    counts: FloatArray,
    h: float,
    kernel: Kernel = epanechnikov,
) -> FloatArray:
    """Local quadratic equivalent-kernel weights ``l(x, g)`` (estimate(x) = sum_g l(x, g)
    sums_g), shape (n_eval, n_bins); rows are ``nan`` where the local design is singular.

    With d = c_g - x: l(x, g) = K(d / h) (a0 + a1 u + a2 u^2), u = d / s, a = S^-1 e1 and
    S the 3 x 3 matrix of the weighted moments sum_g counts_g K(d / h) u^(j+k) (Fan &
    Gijbels 1996, sec. 3.1). The basis scale s = min(h, the bins' span) changes nothing
    but the conditioning of S (the fitted value at x does not depend on it).
    """
    d = centers[None, :] - np.asarray(eval_x, dtype=np.float64)[:, None]
    w = kernel(d / h)
    u = d / min(h, max(float(np.ptp(centers)), 1e-300))
    moments = [(w * u**j) @ counts for j in range(5)]
    s = np.stack([np.stack(moments[j : j + 3], axis=-1) for j in range(3)], axis=-2)
    ok = np.linalg.cond(s) < 1.0 / _SINGULAR_RTOL
    a = np.full((s.shape[0], 3), np.nan)
    if np.any(ok):
        e1 = np.zeros((int(ok.sum()), 3, 1))
        e1[:, 0, 0] = 1.0
        a[ok] = np.linalg.solve(s[ok], e1)[..., 0]
    out: FloatArray = w * (a[:, :1] + a[:, 1:2] * u + a[:, 2:3] * u * u)
    return out


def _poly_mul(
    f: dict[tuple[int, int], float], g: dict[tuple[int, int], float]
) -> dict[tuple[int, int], float]:
    out: dict[tuple[int, int], float] = {}
    for (p1, q1), c1 in f.items():
        for (p2, q2), c2 in g.items():
            key = (p1 + p2, q1 + q2)
            out[key] = out.get(key, 0.0) + c1 * c2
    return out


# Basis of the rotated local fit at a diagonal point x, in a = s - x and b = t - x:
# 1, u = (a + b) / 2 (linear along the diagonal), w^2 = (a - b)^2 (quadratic across it).
# The odd term w drops out: the binned raw covariances are symmetric in (s, t).
_ROTATED_BASIS: tuple[dict[tuple[int, int], float], ...] = (
    {(0, 0): 1.0},
    {(1, 0): 0.5, (0, 1): 0.5},
    {(2, 0): 1.0, (1, 1): -2.0, (0, 2): 1.0},
)


def local_quadratic_diagonal_2d(
    eval_x: FloatArray,
    centers: FloatArray,
    counts: FloatArray,
    sums: FloatArray,
    h: float,
    kernel: Kernel = epanechnikov,
) -> FloatArray:
    """Surface value on the diagonal, G(x, x), from a rotated local fit to binned data.

    A covariance surface has a ridge along its diagonal; a local plane through binned
    off-diagonal data underestimates it, which inflates the error variance obtained by
    subtraction. Following Yao, Müller & Wang (2005, sec. 2.2; from memory), the fit is
    linear along the diagonal and quadratic across it (basis 1, u, w^2 with u the
    diagonal and w the orthogonal direction): three coefficients, so it removes the ridge
    bias without the variance of a full six-term quadratic. Moments S_pq (p + q <= 4) are
    computed only at the diagonal points: O(n_eval x n_bins^2).
    """
    x = np.asarray(eval_x, dtype=np.float64)
    w, wd, wdd = _weight_matrices(x, centers, h, kernel)
    d = centers[None, :] - x[:, None]
    powers = [w, wd, wdd, wdd * d, wdd * d * d]
    left_c = [p @ counts for p in powers]  # (E, G): A_p C
    left_s = [p @ sums for p in powers[:3]]

    def moment(poly: dict[tuple[int, int], float], left: list[FloatArray]) -> FloatArray:
        total: FloatArray = sum(
            c * np.sum(left[p] * powers[q], axis=1) for (p, q), c in poly.items()
        )
        return total

    basis = _ROTATED_BASIS
    m = np.stack(
        [np.stack([moment(_poly_mul(f, g), left_c) for g in basis], axis=-1) for f in basis],
        axis=-2,
    )
    rhs = np.stack([moment(f, left_s) for f in basis], axis=-1)
    scale = np.sqrt(np.abs(np.einsum("eii->ei", m)))
    scale[scale == 0] = 1.0
    ms = m / scale[:, :, None] / scale[:, None, :]
    out = np.full(ms.shape[0], np.nan)
    ok = np.linalg.cond(ms) < 1e10
    if np.any(ok):
        sol = np.linalg.solve(ms[ok], (rhs[ok] / scale[ok])[..., None])[..., 0]
        out[ok] = sol[:, 0] / scale[ok, 0]
    return out


def trapezoid_weights(grid: FloatArray) -> FloatArray:
    """Trapezoid quadrature weights for an increasing grid (of any numeric dtype)."""
    grid = np.asarray(grid, dtype=np.float64)
    d = np.diff(grid)
    w = np.zeros_like(grid)
    w[:-1] += d / 2.0
    w[1:] += d / 2.0
    return w
