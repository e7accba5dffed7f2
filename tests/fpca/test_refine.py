"""Eigenfunctions refined by the marginal likelihood over a spline basis (``fpca.refine``)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.stats import multivariate_normal

from reportgen.api import fit_sparse_fpca
from reportgen.fpca.refine import Basis, basis_sums, loglik_and_gradient, refine, subject_logliks
from reportgen.fpca.smoothing import trapezoid_weights


def _readings(
    rng: np.random.Generator, sizes: list[int], lo: float, hi: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    starts = np.cumsum([0, *sizes[:-1]]).astype(np.intp)
    t = rng.uniform(lo, hi, sum(sizes))
    return starts, t, rng.normal(size=t.size) * 1.7


def test_basis_is_orthonormal_over_the_unit_domain() -> None:
    # Reference: the trapezoid rule on the grid, the quadrature every eigenfunction's norm
    # uses (common practice, no source).
    grid = np.linspace(3.0, 11.0, 81)
    b = Basis.on(grid).at(grid)
    unit = (grid - 3.0) / 8.0
    np.testing.assert_allclose(b.T @ (trapezoid_weights(unit)[:, None] * b), np.eye(10), atol=1e-12)


def test_loglik_equals_dense_multivariate_normal() -> None:
    # Reference: scipy.stats.multivariate_normal.logpdf of each subject's residuals under
    # N(0, F_i F_i' + sigma^2 I), F_i = b(T_i) A, summed (general-purpose library).
    rng = np.random.default_rng(4)
    grid = np.linspace(0.0, 2.0, 41)
    basis = Basis.on(grid, 8)
    starts, t, r = _readings(rng, [1, 3, 6, 2, 7, 1, 4], 0.0, 2.0)
    sums = basis_sums(starts, t, r, basis)
    a, s2 = rng.normal(size=(8, 3)), 0.45
    ends = np.append(starts[1:], t.size)
    ref = [
        multivariate_normal(
            np.zeros(e - s), basis.at(t[s:e]) @ a @ a.T @ basis.at(t[s:e]).T + s2 * np.eye(e - s)
        ).logpdf(r[s:e])
        for s, e in zip(starts, ends, strict=True)
    ]
    np.testing.assert_allclose(subject_logliks(a, s2, sums), ref, rtol=1e-11)
    assert loglik_and_gradient(a, s2, sums)[0] == pytest.approx(sum(ref), rel=1e-12)


def test_gradient_equals_finite_differences() -> None:
    # Reference: central differences of the log-likelihood itself (step 1e-6), common
    # practice, no source.
    rng = np.random.default_rng(9)
    grid = np.linspace(0.0, 1.0, 31)
    basis = Basis.on(grid, 7)
    starts, t, r = _readings(rng, [2, 5, 3, 1, 6, 4], 0.0, 1.0)
    sums = basis_sums(starts, t, r, basis)
    a, s2 = rng.normal(size=(7, 2)), 0.8
    _, grad_a, grad_s2 = loglik_and_gradient(a, s2, sums)
    h = 1e-6
    num = np.zeros_like(a)
    for idx in np.ndindex(a.shape):
        up, down = a.copy(), a.copy()
        up[idx] += h
        down[idx] -= h
        num[idx] = (
            loglik_and_gradient(up, s2, sums)[0] - loglik_and_gradient(down, s2, sums)[0]
        ) / (2 * h)
    np.testing.assert_allclose(grad_a, num, rtol=1e-6, atol=1e-7)
    num_s2 = (loglik_and_gradient(a, s2 + h, sums)[0] - loglik_and_gradient(a, s2 - h, sums)[0]) / (
        2 * h
    )
    assert grad_s2 == pytest.approx(num_s2, rel=1e-6)


def _model_in_span(
    seed: int, n: int, lo: float = 0.0, hi: float = 1.0
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Readings from a two-component model whose eigenfunctions are smooth curves (unit
    norm on [lo, hi]); returns starts, t, residuals, the truth on the grid and the grid."""
    rng = np.random.default_rng(seed)
    grid = np.linspace(lo, hi, 101)
    span = hi - lo
    u = (grid - lo) / span
    truth = np.column_stack([np.sqrt(2) * np.sin(np.pi * u), np.sqrt(2) * np.cos(np.pi * u)])
    truth = truth / np.sqrt(span)
    sizes = rng.integers(2, 7, n)
    starts = (np.cumsum(sizes) - sizes).astype(np.intp)
    t = rng.uniform(lo, hi, int(sizes.sum()))
    owner = np.repeat(np.arange(n), sizes)
    xi = rng.normal(size=(n, 2)) * np.sqrt(np.array([3.0, 1.0]) * span)
    phi = np.column_stack([np.interp(t, grid, truth[:, k]) for k in range(2)])
    r = np.sum(xi[owner] * phi, axis=1) + rng.normal(0, 0.5, t.size)
    return starts, t, r, truth, grid


def _l2(grid: np.ndarray, f: np.ndarray, g: np.ndarray) -> float:
    w = trapezoid_weights(grid)
    f = f if np.sum(w * f * g) >= 0 else -f
    return float(np.sqrt(np.sum(w * (f - g) ** 2)))


def test_refinement_recovers_eigenfunctions_from_a_wrong_start() -> None:
    # Reference: the data-generating model (the maximum of the likelihood is a consistent
    # estimate; James, Hastie & Sugar 2000, Biometrika 87:587-602, sec. 3; from memory).
    # The start mixes the two true functions by 40 degrees: the likelihood turns them back.
    starts, t, r, truth, grid = _model_in_span(1, 3000)
    basis = Basis.on(grid)
    c, s = np.cos(0.7), np.sin(0.7)
    start = truth @ np.array([[c, -s], [s, c]])
    found = refine(basis_sums(starts, t, r, basis), basis, grid, start, np.array([2.0, 2.0]), 1.0)
    assert found.converged
    for k in range(2):
        assert _l2(grid, found.functions[:, k], truth[:, k]) < 0.08
        assert _l2(grid, start[:, k], truth[:, k]) > 0.6  # the start was far off
    np.testing.assert_allclose(found.eigenvalues, [3.0, 1.0], rtol=0.12)
    assert found.error_variance == pytest.approx(0.25, rel=0.08)
    w = trapezoid_weights(grid)
    np.testing.assert_allclose(
        found.functions.T @ (w[:, None] * found.functions), np.eye(2), atol=1e-10
    )


def test_refinement_does_not_depend_on_the_units() -> None:
    # Equivariance (common practice, no source): times x 1000 and values x 10 give the same
    # functions per unit of time (scaled by 1/sqrt(1000)), eigenvalues x 1000 x 100 and the
    # error variance x 100.
    starts, t, r, truth, grid = _model_in_span(2, 400)
    start = truth + 0.1 * np.column_stack([np.ones(grid.size), grid - 0.5])
    base_basis = Basis.on(grid)
    base = refine(
        basis_sums(starts, t, r, base_basis), base_basis, grid, start, np.array([3, 1.0]), 0.3
    )
    g2 = grid * 1000.0
    basis2 = Basis.on(g2)
    scaled = refine(
        basis_sums(starts, t * 1000.0, r * 10.0, basis2),
        basis2,
        g2,
        start / np.sqrt(1000.0),
        np.array([3, 1.0]) * 1e5,
        30.0,
    )
    np.testing.assert_allclose(scaled.functions * np.sqrt(1000.0), base.functions, atol=1e-6)
    np.testing.assert_allclose(scaled.eigenvalues, base.eigenvalues * 1e5, rtol=1e-6)
    assert scaled.error_variance == pytest.approx(base.error_variance * 100.0, rel=1e-6)


def _dominant_mode_frame(seed: int) -> tuple[pd.DataFrame, np.ndarray]:
    """A constant mode with 96% of the variance and a smooth one (1-6 readings, n 300)."""
    rng = np.random.default_rng(seed)
    n, lo, hi = 300, 0.0, 40.0
    m = rng.integers(1, 7, n)
    subj = np.repeat(np.arange(n), m)
    t = rng.uniform(lo, hi, subj.size)
    xi = rng.normal(size=(n, 2)) * np.sqrt([160.0, 6.67])
    phi = np.column_stack(
        [np.full(t.size, 1 / np.sqrt(40.0)), np.sqrt(2 / 40) * np.cos(np.pi * t / 40)]
    )
    y = 10 + 0.05 * t + np.sum(xi[subj] * phi, axis=1) + rng.normal(0, np.sqrt(0.5), t.size)
    return pd.DataFrame({"id": subj, "t": t, "y": y}), np.sqrt(2 / 40) * np.cos(
        np.pi * np.linspace(lo, hi, 101) / 40
    )


@pytest.mark.slow
def test_a_mode_the_surface_loses_is_found_and_kept() -> None:
    # Reference: the data-generating model. On this seed the smoothing surface gives the
    # second mode no shape (its estimate is orthogonal to the truth: L2 error near sqrt 2)
    # while the likelihood finds it; the held-out likelihood then keeps the refined set.
    frame, second = _dominant_mode_frame(1)
    fit = fit_sparse_fpca(frame, subject="id", time="t", value="y", band="plugin")
    src = fit.functions
    assert src.used == "likelihood" and src.asked == "auto"
    assert src.held_out_likelihood > src.held_out_smoothing
    assert _l2(fit.grid, src.smoothing[:, 1], second) > 1.0
    assert _l2(fit.grid, src.likelihood[:, 1], second) < 0.4
    assert fit.all_eigenvalues[1] / 6.67 == pytest.approx(1.0, abs=0.35)
    assert fit.error_variance / 0.5 == pytest.approx(1.0, abs=0.15)
    # asked for the surface's: the mode's variance lands in sigma^2
    plain = fit_sparse_fpca(
        frame, subject="id", time="t", value="y", band="plugin", eigenfunctions="smoothing"
    )
    assert plain.functions.used == "smoothing" and plain.functions.likelihood.size == 0
    assert plain.error_variance / 0.5 > 1.3


def test_forced_choices_and_the_functions_used() -> None:
    # The options' contract (no outside reference): "likelihood" uses the refined set
    # without the comparison; the predictor's functions are the set reported as used.
    frame, _ = _dominant_mode_frame(4)
    fit = fit_sparse_fpca(
        frame, subject="id", time="t", value="y", band="plugin", eigenfunctions="likelihood"
    )
    src = fit.functions
    assert src.used == "likelihood" and src.folds == 0 and np.isnan(src.held_out_smoothing)
    k = fit.n_components
    for j in range(k):
        assert _l2(fit.grid, fit.eigenfunctions[:, j], src.likelihood[:, j]) < 1e-12
