"""Binned smoothers against exact ones, and the exact one against statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.nonparametric.kernel_regression import KernelReg

from reportgen.fpca.smoothing import (
    BinGrid,
    bin_1d,
    gaussian,
    local_linear_binned_1d,
    local_linear_binned_2d,
    local_quadratic_diagonal_2d,
)
from tests.reference.exact_smoothers import local_linear_exact_1d, local_linear_exact_2d


@pytest.fixture
def scatter() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(7)
    x = rng.uniform(0, 1, 3000)
    y = np.sin(6 * x) + rng.normal(0, 0.3, x.size)
    return x, y


def test_exact_local_linear_matches_statsmodels(scatter: tuple[np.ndarray, np.ndarray]) -> None:
    # Reference: statsmodels KernelReg(reg_type="ll") is a general-purpose local linear
    # regression with a Gaussian kernel whose bandwidth is the kernel's standard deviation.
    x, y = scatter[0][:400], scatter[1][:400]
    h = 0.08
    ev = np.linspace(0.02, 0.98, 25)
    model = KernelReg(y, x, var_type="c", reg_type="ll", bw=[h], rng=np.random.default_rng(0))
    ref, _ = model.fit(ev)
    ours = local_linear_exact_1d(ev, x, y, h, gaussian)
    np.testing.assert_allclose(ours, ref, rtol=1e-8, atol=1e-10)


@pytest.mark.parametrize("h", [0.03, 0.1, 0.3])
def test_binned_1d_close_to_exact(scatter: tuple[np.ndarray, np.ndarray], h: float) -> None:
    # Linear binning error is O(delta^2 / h^2) relative (Wand 1994, sec. 3; from memory):
    # with 401 bins (delta = 0.0025) and h >= 0.03 it is below 0.1% of the range of y.
    x, y = scatter
    grid = BinGrid(0.0, 1.0, 401)
    counts, sums = bin_1d(grid, x, y)
    ev = np.linspace(0, 1, 101)
    binned = local_linear_binned_1d(ev, grid.centers, counts[0], sums[0], h)
    exact = local_linear_exact_1d(ev, x, y, h)
    assert np.max(np.abs(binned - exact)) < 1e-3 * np.ptp(y)


def test_binned_2d_close_to_exact() -> None:
    rng = np.random.default_rng(3)
    x1, x2 = rng.uniform(0, 1, (2, 4000))
    z = np.cos(3 * x1) * np.cos(3 * x2) + rng.normal(0, 0.2, x1.size)
    h = 0.15
    grid = BinGrid(0.0, 1.0, 101)
    i1, f1 = grid.locate(x1)
    i2, f2 = grid.locate(x2)
    counts = np.zeros((101, 101))
    sums = np.zeros((101, 101))
    for a, wa in ((i1, 1 - f1), (i1 + 1, f1)):
        for b, wb in ((i2, 1 - f2), (i2 + 1, f2)):
            np.add.at(counts, (a, b), wa * wb)
            np.add.at(sums, (a, b), wa * wb * z)
    ev = np.linspace(0, 1, 21)
    binned = local_linear_binned_2d(ev, grid.centers, counts, sums, h)
    exact = local_linear_exact_2d(ev, x1, x2, z, h)
    assert np.max(np.abs(binned - exact)) < 2e-3 * np.ptp(z)


def test_local_polynomials_reproduce_their_degree() -> None:
    # A local polynomial fit of degree p reproduces polynomials of degree p exactly
    # (Fan & Gijbels 1996, sec. 3.2; a fact of the trade). With data at the bin centres
    # binning is exact, so the binned smoothers must reproduce them to rounding.
    grid = BinGrid(0.0, 2.0, 41)
    c = grid.centers
    s, t = np.meshgrid(c, c, indexing="ij")
    counts = np.ones((41, 41))
    plane = 1.0 + 2.0 * s - 0.5 * t
    ev = np.linspace(0, 2, 9)
    np.testing.assert_allclose(
        local_linear_binned_2d(ev, c, counts, plane, 0.4),
        1.0 + 2.0 * ev[:, None] - 0.5 * ev[None, :],
        atol=1e-10,
    )
    # The rotated fit is linear along the diagonal and quadratic across it.
    ridge = 1.0 + (s + t) - 0.4 * (s - t) ** 2
    np.testing.assert_allclose(
        local_quadratic_diagonal_2d(ev, c, counts, ridge, 0.5), 1.0 + 2.0 * ev, atol=1e-9
    )
    np.testing.assert_allclose(
        local_linear_binned_1d(ev, c, np.ones(41), 3.0 - c, 0.3), 3.0 - ev, atol=1e-12
    )


def test_singular_windows_are_nan() -> None:
    grid = BinGrid(0.0, 1.0, 51)
    counts = np.zeros(51)
    counts[[10, 11]] = 1.0
    est = local_linear_binned_1d(np.array([0.21, 0.9]), grid.centers, counts, counts, 0.05)
    assert np.isfinite(est[0]) and np.isnan(est[1])
