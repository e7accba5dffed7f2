"""Quadrature eigen-decomposition against the known spectrum of the published design."""

from __future__ import annotations

import numpy as np
import pytest

from reportgen.errors import EstimationError
from reportgen.fpca.components import choose, eigen_decompose, trapezoid_weights
from tests.designs import YAO_EIGENVALUES, l2_inner, yao_eigenfunctions


@pytest.mark.parametrize("n_grid", [31, 51, 101, 201])
def test_true_covariance_gives_eigenvalues_4_and_1(n_grid: int) -> None:
    # Source: the covariance of the Yao, Müller & Wang (2005) design (from memory),
    # G(s,t) = 4 phi1(s) phi1(t) + phi2(s) phi2(t) with orthonormal phi on [0, 10].
    # The trapezoid rule integrates these trigonometric products with error O(h^2);
    # 2e-3 relative at 31 points shrinks as the grid refines.
    grid = np.linspace(0, 10, n_grid)
    phi = yao_eigenfunctions(grid)
    cov = (phi * YAO_EIGENVALUES) @ phi.T
    eig = eigen_decompose(grid, cov)
    tol = 2e-3 * (31 / n_grid) ** 2
    np.testing.assert_allclose(eig.values[:2], YAO_EIGENVALUES, rtol=tol)
    for k in range(2):
        assert abs(l2_inner(grid, eig.functions[:, k], phi[:, k])) == pytest.approx(1, abs=tol)
        assert np.sum(trapezoid_weights(grid) * eig.functions[:, k] ** 2) == pytest.approx(1)
    # rank 2: nothing else is positive beyond rounding
    assert eig.values.size <= 2 or eig.values[2] < 1e-8


def test_sign_convention() -> None:
    # Documented in fpca.components: positive integral, else increasing on balance.
    grid = np.linspace(0, 10, 101)
    phi = yao_eigenfunctions(grid)
    eig = eigen_decompose(grid, (phi * YAO_EIGENVALUES) @ phi.T)
    w = trapezoid_weights(grid)
    assert w @ eig.functions[:, 1] > 0  # sin has a positive integral
    assert w @ ((grid - 5) * eig.functions[:, 0]) > 0  # -cos has zero integral; increasing


def test_negative_eigenvalues_dropped_and_counted() -> None:
    grid = np.linspace(0, 1, 51)
    phi = np.column_stack([np.ones(51), np.sqrt(3) * (2 * grid - 1)])
    cov = 2 * np.outer(phi[:, 0], phi[:, 0]) - 0.5 * np.outer(phi[:, 1], phi[:, 1])
    eig = eigen_decompose(grid, cov)
    assert eig.values.size == 1 and eig.values[0] == pytest.approx(2, rel=1e-3)
    assert eig.n_dropped == 50 and eig.dropped_sum == pytest.approx(0.5, rel=1e-2)


def test_no_positive_eigenvalue_is_an_error() -> None:
    grid = np.linspace(0, 1, 11)
    with pytest.raises(EstimationError, match="no positive eigenvalue"):
        eigen_decompose(grid, -np.eye(11))


def test_choose_rules() -> None:
    cum = np.array([0.7, 0.96, 0.99])
    crit = np.array([3.0, 1.0, 2.0])
    assert choose("fve", 3, cum, crit, crit, crit, 0.95, None) == 2
    assert choose("fve", 3, cum, crit, crit, crit, 0.999, None) == 3
    assert choose("aic", 3, cum, crit, crit, crit, 0.95, None) == 2
    assert choose("fixed", 3, cum, crit, crit, crit, 0.95, 3) == 3
    with pytest.raises(EstimationError, match="n_components=5 is more than the 3"):
        choose("fixed", 3, cum, crit, crit, crit, 0.95, 5)
