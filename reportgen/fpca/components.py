"""Eigen-decomposition of the covariance surface and the choice of the number of components.

The covariance operator ``(G f)(s) = int G(s, t) f(t) dt`` is discretised on the output grid
with trapezoid quadrature weights ``w``; with ``W = diag(w)`` the symmetric matrix
``W^1/2 G W^1/2`` has the operator's eigenvalues, and ``phi = W^-1/2 v`` are eigenfunctions
of unit L2 norm (``sum_k w_k phi(t_k)^2 = 1``). This is the usual Nystrom discretisation
(common practice, no source).

Sign convention: each eigenfunction is signed so that its integral over the domain is
positive; when the integral is numerically zero (below 1e-6 of the L1 norm), so that
``int (t - centre) phi(t) dt`` is positive (the function increases on balance).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ..errors import EstimationError
from . import refusals
from ._kernels import interpolate_columns
from .arrays import FloatArray
from .smoothing import trapezoid_weights

# Eigenvalues below this fraction of the largest are numerically zero (common practice,
# no source): they are dropped with the negative ones.
_ZERO_RTOL = 1e-10
COMPONENT_RULES = ("fve", "aic", "bic", "cv", "fixed")


def evaluate_at(t: FloatArray, grid: FloatArray, funcs: FloatArray) -> FloatArray:
    """Columns of ``funcs`` (functions on ``grid``) at times ``t`` by linear interpolation.

    Times outside the grid take the end values (as ``np.interp``). On a regular grid the
    bracketing index is computed directly (``_kernels.interpolate_columns``).
    """
    t = np.asarray(t, dtype=np.float64)
    step = np.diff(grid)
    if grid.size > 1 and np.allclose(step, step[0], rtol=1e-9, atol=0.0):
        return interpolate_columns(t, np.ascontiguousarray(funcs), float(grid[0]), float(step[0]))
    out = np.empty((t.size, funcs.shape[1]))
    for k in range(funcs.shape[1]):
        out[:, k] = np.interp(t, grid, funcs[:, k])
    return out


@dataclass(frozen=True)
class Eigen:
    """Positive eigenvalues (descending) and unit-norm eigenfunctions on the grid.

    ``n_dropped`` counts eigenvalues that were negative or numerically zero;
    ``dropped_sum`` is the sum of the absolute values of the negative ones.
    """

    values: FloatArray
    functions: FloatArray
    n_dropped: int
    dropped_sum: float


def _orient(grid: FloatArray, weights: FloatArray, phi: FloatArray) -> FloatArray:
    integral = weights @ phi
    slope = weights @ ((grid - grid.mean())[:, None] * phi)
    l1 = weights @ np.abs(phi)
    key = np.where(np.abs(integral) > 1e-6 * l1, integral, slope)
    return phi * np.where(key < 0, -1.0, 1.0)


def eigen_decompose(grid: FloatArray, cov: FloatArray) -> Eigen:
    """Eigen-decompose a covariance surface on ``grid`` (see the module docstring)."""
    w = trapezoid_weights(grid)
    root = np.sqrt(w)
    sym = 0.5 * (cov + cov.T)
    values, vectors = np.linalg.eigh(root[:, None] * sym * root[None, :])
    values, vectors = values[::-1], vectors[:, ::-1]
    top = values[0] if values.size else 0.0
    keep = values > _ZERO_RTOL * max(top, 0.0)
    if top <= 0 or not np.any(keep):
        raise EstimationError(
            "the estimated covariance surface has no positive eigenvalue "
            f"(largest {top:.3g}): the readings show no variation between subjects"
        )
    phi = vectors[:, keep] / root[:, None]
    negative = values[~keep]
    return Eigen(
        values[keep],
        _orient(grid, w, phi),
        int((~keep).sum()),
        float(np.abs(negative[negative < 0]).sum()),
    )


@dataclass(frozen=True)
class ComponentSelection:
    """Every criterion for K = 1 .. max, and the K that the chosen rule picked.

    Attributes
    ----------
    rule : str
        One of ``"fve"``, ``"aic"``, ``"bic"``, ``"cv"``, ``"fixed"``.
    chosen : int
    k : ndarray of shape (n_candidates,)
        1 .. K_max.
    cumulative_fve, aic, bic, cv : ndarray of shape (n_candidates,)
        AIC and BIC from the marginal Gaussian log-likelihood of the readings; cv is the
        mean squared error of predicting each reading from the subject's other readings.
    n_subjects_used : int
        Subjects over which AIC, BIC and cv were computed (a seeded sample when large).
    """

    rule: str
    chosen: int
    k: NDArray[np.intp]
    cumulative_fve: FloatArray
    aic: FloatArray
    bic: FloatArray
    cv: FloatArray
    n_subjects_used: int


def choose(
    rule: str,
    k_max: int,
    cumulative_fve: FloatArray,
    aic: FloatArray,
    bic: FloatArray,
    cv: FloatArray,
    fve_threshold: float,
    n_components: int | None,
) -> int:
    """Apply ``rule`` to the criteria; returns the number of components (>= 1)."""
    if rule == "fixed":
        if n_components is None:
            raise EstimationError('component_rule "fixed" needs n_components')
        if n_components > k_max:
            raise EstimationError(refusals.too_many_components(n_components, k_max))
        return n_components
    if rule == "fve":
        reached = np.flatnonzero(cumulative_fve >= fve_threshold - 1e-12)
        return int(reached[0] + 1) if reached.size else k_max
    crit = {"aic": aic, "bic": bic, "cv": cv}[rule]
    if not np.any(np.isfinite(crit)):
        raise EstimationError(f"component rule {rule!r} could not be evaluated on these data")
    return int(np.nanargmin(crit) + 1)
