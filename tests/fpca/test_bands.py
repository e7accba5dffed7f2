"""The bands' multipliers and columns, against facts of the normal distribution.

Reference for the quantiles: scipy.stats (norm, chi2)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from reportgen.fpca.predictor import Source, sup_multipliers


def _one_mode(n_grid: int = 41) -> tuple[np.ndarray, np.ndarray]:
    t = np.linspace(0, 1, n_grid)
    return t, (np.sqrt(2) * np.cos(np.pi * t))[:, None]


def test_a_rank_one_curve_error_has_the_normal_quantile_as_its_sup_multiplier() -> None:
    # error(t) = phi(t) z: |error(t)| / sd(t) = |z| at every t, so the whole curve is inside
    # m sd exactly when |z| <= m: the simultaneous multiplier is the pointwise one, 1.96.
    # (common practice, no source)
    t, phi = _one_mode()
    cov = np.full((3, 1, 1), 2.0)
    sd = np.sqrt(2.0) * np.abs(phi[:, 0])[None, :].repeat(3, axis=0)
    m = sup_multipliers([Source(np.zeros_like(sd), cov, phi, np.zeros((t.size, 0)))], sd, 0.95)
    assert np.allclose(m, m[0])  # the same draws for every subject
    assert abs(m[0] - stats.norm.ppf(0.975)) < 0.1  # Monte Carlo error of 1000 draws


def test_two_modes_lie_between_the_pointwise_and_the_chi_square_multipliers() -> None:
    # With two orthogonal modes the sup over t of |a(t)'z| is at most |z| (Cauchy-Schwarz,
    # the chi-square bound with 2 degrees of freedom) and at least the pointwise quantile.
    t = np.linspace(0, 1, 81)
    phi = np.column_stack([np.sqrt(2) * np.cos(np.pi * t), np.sqrt(2) * np.cos(2 * np.pi * t)])
    cov = np.array([[[1.0, 0.0], [0.0, 0.5]]])
    sd = np.sqrt(np.einsum("gk,nkl,gl->ng", phi, cov, phi))
    m = sup_multipliers([Source(np.zeros_like(sd), cov, phi, np.zeros((t.size, 0)))], sd, 0.95)[0]
    assert stats.norm.ppf(0.975) < m < np.sqrt(stats.chi2.ppf(0.95, 2))


def test_an_offset_widens_the_multiplier_and_a_mixture_uses_every_source() -> None:
    # A corrected band's mixture: one source shifted by 2 sd everywhere has its errors at
    # |2 + z|, so the 95% quantile of the equal mixture lies well above the normal one.
    t, phi = _one_mode()
    cov = np.ones((1, 1, 1))
    sd = np.abs(phi[:, 0])[None, :]
    zero = Source(np.zeros_like(sd), cov, phi, np.zeros((t.size, 0)))
    shifted = Source(2.0 * sd, cov, phi, np.zeros((t.size, 0)))
    alone = sup_multipliers([zero], sd, 0.95)[0]
    mixed = sup_multipliers([zero, shifted], sd, 0.95)[0]
    assert mixed > alone + 1.0


def test_a_left_out_mode_that_changes_sign_keeps_its_shape_in_the_simultaneous_band() -> None:
    # One retained constant mode and one left-out cosine (it moves the two ends of a curve
    # apart). The whole-curve error a + b cos(pi t), drawn afresh with numpy (another seed),
    # must lie inside m sd for about 95% of draws; standing the cosine in by one mode along
    # |cos| (the root of its variance) gives a smaller multiplier that holds far less often.
    t = np.linspace(0, 1, 61)
    phi = np.ones((t.size, 1))
    left_out = 0.8 * np.sqrt(2) * np.cos(np.pi * t)[:, None]
    cov = np.full((1, 1, 1), 0.3)
    sd = np.sqrt(0.3 + left_out[:, 0] ** 2)[None, :]
    shaped = sup_multipliers([Source(np.zeros_like(sd), cov, phi, left_out)], sd, 0.95)[0]
    rooted = sup_multipliers([Source(np.zeros_like(sd), cov, phi, np.abs(left_out))], sd, 0.95)[0]
    rng = np.random.default_rng(2024)
    a = rng.normal(0, np.sqrt(0.3), 20000)[:, None]
    b = rng.normal(size=20000)[:, None]
    largest = np.max(np.abs(a + b * left_out[:, 0][None, :]) / sd, axis=1)
    assert np.mean(largest <= shaped) == pytest.approx(0.95, abs=0.015)
    assert np.mean(largest <= rooted) < 0.94 and rooted < shaped


def test_the_band_for_a_new_reading_adds_the_error_variance() -> None:
    # A new reading is the curve plus an independent error: its variance is the curve's plus
    # sigma^2 (common practice, no source); the new-reading band is that at the pointwise
    # quantile, on every predict path (in memory here; the stored run: tests/runs).
    from reportgen import fit_sparse_fpca
    from tests.designs import yao_design

    frame = yao_design(150, seed=4)
    for band in ("plugin", "corrected"):
        fit = fit_sparse_fpca(frame, subject="id", time="t", value="y", band=band)
        for got in (fit.trajectories(list(fit.subjects[:5])), fit.predict(frame.head(40))):
            z = stats.norm.ppf(0.975)
            curve_var = ((got.upper - got.fitted) / z) ** 2
            expected = z * np.sqrt(curve_var + fit.error_variance)
            np.testing.assert_allclose(got.upper_new_reading - got.fitted, expected, rtol=1e-9)
            np.testing.assert_allclose(got.fitted - got.lower_new_reading, expected, rtol=1e-9)
            assert np.all(got.upper_simultaneous >= got.upper - 1e-12)


def test_the_local_quadratic_weights_are_weighted_least_squares() -> None:
    # Reference: statsmodels WLS of y on (1, x - x0, (x - x0)^2) with Epanechnikov weights;
    # its intercept is the local quadratic estimate at x0 (Fan & Gijbels 1996, sec. 3.1).
    import statsmodels.api as sm

    from reportgen.fpca.smoothing import epanechnikov, equivalent_kernel_quadratic_1d

    rng = np.random.default_rng(0)
    x = np.sort(rng.uniform(0, 1, 300))
    y = np.sin(3 * x) + rng.normal(0, 0.1, 300)
    at, h = np.array([0.0, 0.3, 0.5, 1.0]), 0.2
    got = equivalent_kernel_quadratic_1d(at, x, np.ones_like(x), h) @ y
    for x0, value in zip(at, got, strict=True):
        w = epanechnikov((x - x0) / h)
        m = w > 0
        design = np.column_stack([np.ones(m.sum()), x[m] - x0, (x[m] - x0) ** 2])
        ref = sm.WLS(y[m], design, weights=w[m]).fit().params[0]
        assert abs(value - ref) < 1e-10


def test_support_counts_each_subject_once_within_the_bandwidth() -> None:
    # a direct count over subjects (common practice, no source)
    from reportgen.fpca.design import Sample, subject_support

    rng = np.random.default_rng(3)
    codes = np.repeat(np.arange(40), rng.integers(1, 6, 40))
    t = rng.uniform(0, 10, codes.size)
    sample = Sample.from_arrays(codes, t, np.zeros_like(t))
    grid, h = np.linspace(0, 10, 51), 1.3
    direct = [
        len({int(c) for c, tt in zip(sample.subject, sample.t, strict=True) if abs(tt - x) < h})
        for x in grid
    ]
    np.testing.assert_array_equal(subject_support(sample, grid, h), direct)


def test_no_band_where_too_few_subjects_support_the_mean() -> None:
    # Readings of only three subjects after t = 0.8: the mean, the trajectories and the
    # predictions carry no band there, and a caveat says where.
    import pandas as pd

    from reportgen import fit_sparse_fpca
    from tests.designs import yao_design

    frame = yao_design(150, seed=4)
    late = frame.t > 0.8
    keep = ~late | frame.id.isin(frame.id.unique()[:3])
    fit = fit_sparse_fpca(frame[keep], subject="id", time="t", value="y", band="plugin")
    thin = fit.mean_support < 10
    assert thin.any() and np.all(np.isnan(fit.mean_se[thin]))
    # Elsewhere the mean's band is drawn unless its variance rests in effect on fewer than
    # 10 subjects (the jackknife's effective degrees of freedom), as it does within a
    # bandwidth of the three late subjects' readings, which weigh most in the local
    # quadratic fits there; a caveat names those times.
    few = ~thin & np.isnan(fit.mean_se)
    assert few.any()
    assert np.all(fit.mean_degrees_of_freedom[~thin & ~few] >= 10)
    assert any("in effect on fewer than 10 subjects" in w for w in fit.warnings)
    assert any(
        "no band is drawn at" in w and "fewer than 10 subjects have a reading" in w
        for w in fit.warnings
    )
    traj = fit.trajectories(list(fit.subjects[:2]))
    at_thin = traj.time.isin(fit.grid[thin])
    assert traj.loc[at_thin, "upper"].isna().all() and traj.loc[~at_thin, "upper"].notna().all()
    assert isinstance(fit.predict(frame[keep].head(30)), pd.DataFrame)


def test_the_numbers_do_not_depend_on_how_the_ids_are_written() -> None:
    # The same readings with ids as integers and as text: the same folds, resamples and
    # numbers (common practice, no source: an analysis must not depend on a storage type).
    from reportgen import fit_sparse_fpca
    from tests.designs import yao_design

    frame = yao_design(120, seed=8)
    as_int = frame.assign(id=frame.id.astype(int) * 7 + 3)  # 3, 10, 17, ...: sorts apart
    as_text = as_int.assign(id=as_int.id.astype(str))
    a = fit_sparse_fpca(as_int, subject="id", time="t", value="y", bootstrap_replicates=20)
    b = fit_sparse_fpca(as_text, subject="id", time="t", value="y", bootstrap_replicates=20)
    assert a.n_components == b.n_components
    assert (a.mean_bandwidth, a.covariance_bandwidth) == (b.mean_bandwidth, b.covariance_bandwidth)
    np.testing.assert_array_equal(a.all_eigenvalues, b.all_eigenvalues)
    assert a.error_variance == b.error_variance
    assert [str(s) for s in a.subjects] == list(b.subjects)
    np.testing.assert_array_equal(a.score_values, b.score_values)
    ta, tb = a.trajectories([a.subjects[4]]), b.trajectories([b.subjects[4]])
    np.testing.assert_array_equal(ta.upper_simultaneous, tb.upper_simultaneous)


def test_no_band_beyond_the_readings_when_the_domain_is_wider() -> None:
    # A planned window wider than the readings: the curves past the last reading are
    # extrapolated, and no band claims to cover them (common practice, no source).
    from reportgen import fit_sparse_fpca
    from tests.reference.accuracy import DESIGNS

    frame, _ = DESIGNS["H"].sample(0)  # readings in [0, 0.8] only
    fit = fit_sparse_fpca(
        frame, subject="id", time="t", value="y", band="plugin", domain=[0.0, 1.0]
    )
    step = fit.grid[1] - fit.grid[0]
    beyond = fit.grid > frame.t.max() + step  # a grid step of slack at the readings' edge
    assert beyond.any() and np.all(np.isnan(fit.mean_se[beyond]))
    assert any("outside the readings' range" in w for w in fit.warnings)
    traj = fit.trajectories(list(fit.subjects[:2]))
    assert traj.loc[traj.time > frame.t.max() + step, "lower_simultaneous"].isna().all()


def test_band_auto_above_its_size_measures_the_width_ratio_it_gives_up(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # Above the size limit band: auto draws the plug-in band and states how much wider the
    # corrected one would be: measured on refits of a sample, scaled by 1/n; at least 1.
    import reportgen.fpca.fit as fitmod
    from reportgen import fit_sparse_fpca
    from tests.designs import yao_design

    monkeypatch.setattr(fitmod, "AUTO_CORRECTED_MAX_SUBJECTS", 100)
    monkeypatch.setattr(fitmod, "WIDTH_SAMPLE", 150)
    frame = yao_design(300, seed=4)
    fit = fit_sparse_fpca(frame, subject="id", time="t", value="y")
    assert fit.band.kind == "plugin" and not fit.replicates
    assert 1.0 <= fit.band.width_ratio < 1.5
    assert f"would be {fit.band.width_ratio:.3f} times as wide" in fit.band.reason


def test_the_model_table_keeps_the_left_out_modes_and_reads_a_table_without_them() -> None:
    # A table written before the left-out modes were kept reads back with one mode along the
    # root of their variance (what bands were drawn with then). (common practice, no source)
    from reportgen.fpca.predictor import Predictor

    t = np.linspace(0, 1, 11)
    modes = np.column_stack([np.cos(np.pi * t), 0.5 * np.cos(2 * np.pi * t)])
    p = Predictor(
        t, t, t**2, np.ones((t.size, 1)), np.array([2.0]), 0.3,
        np.sum(modes**2, axis=1), 0.95, 3, None, modes,
    )  # fmt: skip
    back = Predictor.from_frame(p.to_frame())
    np.testing.assert_array_equal(back.left_out_modes(), modes)
    table = p.to_frame()
    old = Predictor.from_frame(table[table.quantity != "truncation_mode"])
    assert old.truncation_modes is None
    np.testing.assert_allclose(old.left_out_modes()[:, 0], np.sqrt(np.sum(modes**2, axis=1)))
    # none left out: no mode rows, read back as no mode (not one of zeros, which would draw
    # other random numbers: the stored run's simultaneous band must be the run's own)
    bare = Predictor(
        t, t, t**2, np.ones((t.size, 1)), np.array([2.0]), 0.3,
        np.zeros(t.size), 0.95, 1, None, np.zeros((t.size, 0)),
    )  # fmt: skip
    assert Predictor.from_frame(bare.to_frame()).left_out_modes().shape == (t.size, 0)
