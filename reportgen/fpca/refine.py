"""Eigenfunctions refined by the marginal likelihood of the reduced-rank model.

The smoothing estimates of the eigenfunctions come from the covariance surface; a mode that
carries little variance next to a dominant one is estimated poorly there (its shape is a
small difference of large smoothed numbers). Here the eigenfunctions are re-estimated with
the eigenvalues and the error variance, by maximising the Gaussian likelihood of the
readings themselves (James, Hastie & Sugar 2000, Biometrika 87:587-602; Peng & Paul 2009,
JCGS 18:995-1015), over a cubic B-spline basis, started from the smoothing estimates.

With ``b(t)`` the spline basis made orthonormal on the domain (``b = B J^-1/2``, ``J`` the
basis functions' Gram matrix by the grid's trapezoid rule) and ``A`` an M x K matrix, the
model for subject i's residuals is

    r_i ~ N(0, F_i F_i' + sigma^2 I),   F_i = b(T_i) A,

so the covariance function is ``b(s)' A A' b(t)``; its eigenfunctions are ``b(t)' theta_k``
with ``A A' = sum_k lambda_k theta_k theta_k'``. With ``G_i = b(T_i)' b(T_i)``,
``h_i = b(T_i)' r_i``, ``P_i = A' G_i A``, ``c_i = A' h_i``, ``H_i = I + P_i / sigma^2`` and
``m_i = H_i^-1 c_i / sigma^2`` (the conditional mean of the standardised scores)::

    log L_i = -1/2 [n_i log 2 pi + n_i log sigma^2 + log det H_i + (s_i - c_i' m_i) / sigma^2]
    d log L / dA       = sum_i (h_i m_i' - G_i A (H_i^-1 + m_i m_i')) / sigma^2
    d log L / d sigma^2 = 1/2 sum_i (|r_i - F_i m_i|^2 / sigma^4 - tr Sigma_i^-1)

(from d log L = -1/2 [tr(S^-1 dS) - r' S^-1 dS S^-1 r] with ``S^-1 F = F H^-1 / sigma^2``
and ``S^-1 r = (r - F m) / sigma^2``; the same stationarity condition as the EM algorithm
of James, Hastie & Sugar). ``tests/fpca/test_refine.py`` checks the log-likelihood against
scipy's dense multivariate normal and the gradient against finite differences. The
maximisation is scipy's L-BFGS-B over ``(A, log sigma^2)``.

Whether the refined eigenfunctions are used is decided by the data: K-fold cross-validation
over subjects of the held-out log-likelihood, the refined model fitted on each training
part against the smoothing eigenfunctions with their eigenvalues and error variance refitted
on the same part (:func:`held_out_gain`); the refined ones are kept when they are better by
more than one standard error of the mean per-subject difference. The smoothing
eigenfunctions themselves come from all subjects, so the comparison leans towards keeping
them.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy.interpolate import BSpline
from scipy.optimize import minimize

from ..errors import EstimationError
from ._kernels import refine_terms, subject_sums
from .arrays import FloatArray, IntArray
from .design import Sample, assign_folds, seeded_sample
from .likelihood import LikelihoodFit, SubjectSums, maximise
from .options import FPCAOptions
from .result import FunctionSource, frozen
from .scores import sample_terms
from .smoothing import trapezoid_weights

# Cubic B-splines with this many basis functions on the domain, equally spaced knots
# (James, Hastie & Sugar 2000 used natural cubic splines with about ten knots on their
# examples; from memory). The held-out likelihood decides whether the refinement is kept,
# so a basis too rich for the data is rejected rather than used.
N_BASIS = 10
DEGREE = 3
MAX_ITER = 500
# sigma^2 is kept within [e^-40, 1] times the start's variance of a reading (e^-40 ~ 4e-18:
# below it the error is nil at double precision, and no error exceeds the whole variance)
LOG_VARIANCE_FLOOR = -40.0


@dataclass(frozen=True)
class Basis:
    """Cubic B-splines on the domain ``[lo, hi]`` mapped to ``[0, 1]``, orthonormal there by
    the trapezoid rule on the grid (so that nothing depends on the time's unit: a function
    of unit norm on the domain is ``b(u)' theta / sqrt(hi - lo)``)."""

    spline: BSpline
    root_inverse: FloatArray  # J^-1/2, M x M
    lo: float
    hi: float

    @classmethod
    def on(cls, grid: FloatArray, n_basis: int = N_BASIS) -> Basis:
        lo, hi = float(grid[0]), float(grid[-1])
        inner = np.linspace(0.0, 1.0, n_basis - DEGREE + 1)
        knots = np.concatenate([[0.0] * DEGREE, inner, [1.0] * DEGREE])
        spline = BSpline(knots, np.eye(n_basis), DEGREE, extrapolate=False)
        unit = (grid - lo) / (hi - lo)
        raw = _design(spline, unit)
        gram = raw.T @ (trapezoid_weights(unit)[:, None] * raw)
        vals, vecs = np.linalg.eigh(gram)
        root_inverse = (vecs / np.sqrt(vals)) @ vecs.T
        return cls(spline, root_inverse, lo, hi)

    @property
    def size(self) -> int:
        return int(self.root_inverse.shape[0])

    @property
    def length(self) -> float:
        return self.hi - self.lo

    def at(self, t: FloatArray) -> FloatArray:
        """The orthonormal basis at times ``t`` (clipped to the domain), shape (t.size, M)."""
        return _design(self.spline, (np.asarray(t) - self.lo) / self.length) @ self.root_inverse


def _design(spline: BSpline, u: FloatArray) -> FloatArray:
    return np.asarray(
        BSpline.design_matrix(np.clip(u, 0.0, 1.0), spline.t, spline.k, extrapolate=False).toarray()
    )


def basis_sums(starts: IntArray, t: FloatArray, resid: FloatArray, basis: Basis) -> SubjectSums:
    """Per-subject G_i, h_i, r_i'r_i and n_i of readings sorted by subject (``starts``)."""
    n_i = np.diff(np.append(starts, t.size))
    owner = np.repeat(np.arange(starts.size), n_i)
    gram, cross = subject_sums(starts, resid, np.ascontiguousarray(basis.at(t)))
    rr = np.bincount(owner, resid * resid, starts.size)
    return SubjectSums(gram, cross, rr, n_i.astype(np.float64))


def subject_logliks(a: FloatArray, s2: float, sums: SubjectSums) -> FloatArray:
    """Each subject's log-likelihood under the model ``A``, sigma^2 (any basis: with the
    eigenfunctions themselves as the basis, ``A = diag(sqrt lambda)``)."""
    return _terms(a, s2, sums, gradient=False)[0]


def loglik_and_gradient(
    a: FloatArray, s2: float, sums: SubjectSums
) -> tuple[float, FloatArray, float]:
    """Log-likelihood of the model ``A`` (M x K), sigma^2, and its gradient in A and sigma^2."""
    each, grad_a, grad_s2 = _terms(a, s2, sums, gradient=True)
    return float(np.sum(each)), grad_a, grad_s2


def _terms(
    a: FloatArray, s2: float, sums: SubjectSums, gradient: bool
) -> tuple[FloatArray, FloatArray, float]:
    each, grad_a, grad_s2, ok = refine_terms(
        sums.gram, sums.cross, sums.rr, sums.n_obs, np.ascontiguousarray(a), float(s2), gradient
    )
    if not ok:
        raise np.linalg.LinAlgError("I + A' G A / sigma^2 is not positive definite")
    return each, grad_a, float(grad_s2)


@dataclass(frozen=True)
class Refined:
    """The likelihood's eigenfunctions (on the grid), eigenvalues and error variance."""

    functions: FloatArray
    eigenvalues: FloatArray
    error_variance: float
    loglik: float
    iterations: int
    converged: bool
    factor: FloatArray  # A, M x K: the model itself, for held-out evaluation


def refine(
    sums: SubjectSums,
    basis: Basis,
    grid: FloatArray,
    start_functions: FloatArray,
    start_values: FloatArray,
    start_s2: float,
) -> Refined:
    """Maximise the likelihood over the eigenfunctions in the basis's span, the eigenvalues
    and sigma^2, from the given start; the result's functions are signed as the start's."""
    w = trapezoid_weights(grid)
    root_length = np.sqrt(basis.length)
    on_grid = basis.at(grid)  # orthonormal on [0, 1]: a unit-norm function is on_grid / sqrt L
    theta0 = on_grid.T @ (w[:, None] * start_functions) / root_length
    a0 = theta0 * np.sqrt(np.maximum(start_values, 0.0) / basis.length)[None, :]
    m_basis, k = a0.shape
    # the optimiser works on A / scale and log(sigma^2 / scale^2), scale^2 the start's
    # variance of a single reading, so that its path does not depend on the values' unit
    scale = float(np.sqrt(start_s2 + np.sum(np.maximum(start_values, 0.0)) / basis.length))

    def objective(x: FloatArray) -> tuple[float, FloatArray]:
        a, s2 = scale * x[:-1].reshape(m_basis, k), scale**2 * float(np.exp(x[-1]))
        try:
            with np.errstate(over="raise", divide="raise", invalid="raise"):
                ll, ga, gs = loglik_and_gradient(a, s2, sums)
        except (np.linalg.LinAlgError, FloatingPointError):
            return np.inf, np.zeros_like(x)  # the line search steps back
        return -ll, -np.append(ga.ravel() * scale, gs * s2)

    x0 = np.append(a0.ravel() / scale, np.log(start_s2 / scale**2))
    bounds = [(None, None)] * (x0.size - 1) + [(LOG_VARIANCE_FLOOR, 0.0)]
    found = minimize(
        objective,
        x0,
        jac=True,
        method="L-BFGS-B",
        bounds=bounds,
        options={"maxiter": MAX_ITER, "gtol": 1e-8},
    )
    a = scale * found.x[:-1].reshape(m_basis, k)
    s2 = scale**2 * float(np.exp(found.x[-1]))
    vals, vecs = np.linalg.eigh(a @ a.T)
    top = np.argsort(-vals, kind="stable")[:k]
    vals, theta = np.maximum(vals[top], 0.0) * basis.length, vecs[:, top]
    functions = on_grid @ theta / root_length
    signs = np.sign(np.sum(w[:, None] * functions * start_functions, axis=0))
    functions = functions * np.where(signs == 0, 1.0, signs)[None, :]
    return Refined(
        functions,
        vals,
        s2,
        -float(found.fun),
        int(found.nit),
        bool(found.success),
        a,
    )


@dataclass(frozen=True)
class HeldOut:
    """Cross-validated log-likelihood per subject of the two sets of eigenfunctions, and the
    standard error of their mean difference (over subjects)."""

    smoothing: float
    refined: float
    standard_error: float
    folds: int

    @property
    def improves(self) -> bool:
        """The refined set is better by more than one standard error (the one-standard-
        error rule: the simpler model unless the other is clearly better; Breiman et al.
        1984, Classification and Regression Trees, sec. 3.4.3; from memory)."""
        return bool(self.refined - self.smoothing > self.standard_error)


def held_out_gain(
    smoothing_sums: SubjectSums,
    spline_sums: SubjectSums,
    basis: Basis,
    grid: FloatArray,
    functions: FloatArray,
    fitted: LikelihoodFit,
    start_values: FloatArray,
    folds: IntArray,
) -> HeldOut:
    """K-fold (by subject) held-out log-likelihood of the smoothing eigenfunctions (their
    eigenvalues and sigma^2 refitted on each training part, from ``fitted``) and of the
    refined ones (fitted on each training part from ``start_values`` and ``fitted``'s
    sigma^2, as on all subjects)."""
    n_folds = int(folds.max()) + 1
    gain = np.empty(folds.size)
    smooth = np.empty(folds.size)
    s2 = fitted.error_variance
    for f in range(n_folds):
        train, test = np.flatnonzero(folds != f), np.flatnonzero(folds == f)
        lik = maximise(smoothing_sums.subjects(train), fitted.eigenvalues, s2)
        root = np.diag(np.sqrt(lik.eigenvalues))
        smooth[test] = subject_logliks(root, lik.error_variance, smoothing_sums.subjects(test))
        ref = refine(spline_sums.subjects(train), basis, grid, functions, start_values, s2)
        refined = subject_logliks(ref.factor, ref.error_variance, spline_sums.subjects(test))
        gain[test] = refined - smooth[test]
    se = float(np.std(gain, ddof=1) / np.sqrt(gain.size)) if gain.size > 1 else np.inf
    mean_smooth = float(np.mean(smooth))
    return HeldOut(mean_smooth, mean_smooth + float(np.mean(gain)), se, n_folds)


# The refinement of the eigenfunctions uses at most this many subjects (a seeded sample of
# the likelihood's): each of its cross-validation folds is a maximisation over M x K'
# coefficients, and by this size the smoothing estimates are seldom the weak part.
REFINE_FUNCTIONS_MAX_SUBJECTS = 5000


def choose_functions(
    sample: Sample,
    resid: FloatArray,
    grid: FloatArray,
    functions: FloatArray,
    surface_values: FloatArray,
    lik: LikelihoodFit,
    options: FPCAOptions,
    beyond_readings: bool = False,
) -> tuple[FunctionSource, Refined | None]:
    """The smoothing eigenfunctions, or the likelihood's when asked or when they raise the
    held-out log-likelihood (``refine.held_out_gain``, folds by subject).

    Never the likelihood's where the domain reaches beyond the readings
    (``beyond_readings``): there no reading constrains a function's shape, and a function
    can move its norm into that part while its eigenvalue grows without bound (measured:
    a tenth of such fits put lambda_1 at 18 times the truth; benchmarks/ACCURACY.md, H).
    """
    asked = options.eigenfunctions
    smoothing = FunctionSource("smoothing", asked, smoothing=frozen(functions))
    if asked == "smoothing":
        return replace(smoothing, reason="asked for (model.eigenfunctions: smoothing)"), None
    if beyond_readings:
        return replace(
            smoothing,
            reason="not refined: the domain reaches beyond the readings, where the "
            "likelihood cannot tell an eigenfunction's shape",
        ), None
    n = sample.starts.size
    rows = seeded_sample(n, REFINE_FUNCTIONS_MAX_SUBJECTS, options.seed)
    sub = sample.subset(rows) if rows.size < n else sample
    idx, _, _ = sample.reading_index(rows)
    r = resid[idx] if rows.size < n else resid
    basis = Basis.on(grid)
    spline = basis_sums(sub.starts, sub.t, r, basis)
    try:
        refined = refine(spline, basis, grid, functions, surface_values, lik.error_variance)
        if asked == "likelihood":
            return FunctionSource(
                "likelihood",
                asked,
                "asked for (model.eigenfunctions: likelihood)",
                n_basis=basis.size,
                subjects=rows.size,
                smoothing=frozen(functions),
                likelihood=frozen(refined.functions),
            ), refined
        folds = assign_folds(rows.size, min(options.cv_folds, rows.size), options.seed)
        own = sample_terms(
            sub, np.arange(rows.size, dtype=np.intp), r, grid, functions[:, : lik.eigenvalues.size]
        )
        gain = held_out_gain(own.sums, spline, basis, grid, functions, lik, surface_values, folds)
    except (np.linalg.LinAlgError, EstimationError) as exc:
        return replace(smoothing, reason=f"the refinement failed ({exc})"), None
    better = gain.improves
    source = FunctionSource(
        "likelihood" if better else "smoothing",
        asked,
        (
            "the likelihood's raise the held-out log-likelihood by more than its standard "
            f"error, {gain.standard_error:.2g}"
            if better
            else "the likelihood's do not raise the held-out log-likelihood by more than its "
            f"standard error, {gain.standard_error:.2g}"
        ),
        gain.smoothing,
        gain.refined,
        gain.folds,
        basis.size,
        rows.size,
        frozen(functions),
        frozen(refined.functions),
    )
    return source, refined if better else None
