"""Generated sentences appear exactly when they are true, and quote the tables' numbers.

Cases are built from the invented clinic example (specs/clinic_visits.yaml) by editing its
spec or its data; the analysis runs in-process (no rendering).
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from reportgen.analysis.analyse import AnalysisResult, analyse
from reportgen.inputs.loader import load_dataset
from reportgen.inputs.spec import Spec, load_spec

ROOT = Path(__file__).resolve().parents[2]


def _analyse(
    tmp_path: Path,
    name: str,
    spec_edit: tuple[str, str] = ("", ""),
    data: pd.DataFrame | None = None,
) -> AnalysisResult:
    folder = tmp_path / name
    folder.mkdir()
    text = (ROOT / "specs" / "clinic_visits.yaml").read_text()
    if spec_edit[0]:
        assert spec_edit[0] in text
        text = text.replace(*spec_edit)
    (folder / "s.yaml").write_text(text)
    if data is None:
        shutil.copy(ROOT / "specs" / "clinic_visits.csv", folder / "clinic_visits.csv")
    else:
        data.to_csv(folder / "clinic_visits.csv", index=False)
    spec = load_spec(folder / "s.yaml")
    return analyse(spec, load_dataset(spec, for_fit=True))


@pytest.fixture(scope="module")
def base(tmp_path_factory: pytest.TempPathFactory) -> AnalysisResult:
    return _analyse(tmp_path_factory.mktemp("base"), "base")


def test_setting_not_computed_is_said_with_its_reason(tmp_path: Path) -> None:
    res = _analyse(
        tmp_path, "infeasible", ("factors: [0.5, 0.75, 1.5, 2.0]", "factors: [0.02, 1.5]")
    )
    failed = [r for r in res.sensitivity if r.fit is None]
    assert [r.factor for r in failed] == [0.02]
    caveat = next(c for c in res.caveats if c.startswith("Sensitivity settings not computed"))
    assert failed[0].error in caveat and caveat.endswith(".")  # the full reason, not cut
    assert "Factors as given in the spec." == res.factors_note
    ran = [r for r in res.sensitivity if r.fit is not None]
    for k, verdict in enumerate(res.stable):
        assert verdict == all(r.similarity[k] >= 0.9 for r in ran)


def test_all_settings_computed_no_not_computed_sentence(base: AnalysisResult) -> None:
    assert all(r.fit is not None for r in base.sensitivity)
    assert not any("not computed" in c for c in base.caveats)


def test_error_variance_share_sentence(base: AnalysisResult) -> None:
    # It names the estimate it reports (the likelihood one) and prints both numbers, so
    # that its percentage reproduces from them.
    share = base.fit.error_variance / float(np.mean(base.fit.diagonal_variance))
    sentence = [c for c in base.caveats if c.startswith("The error variance (")]
    assert bool(sentence) == (share < 0.1)
    if sentence:
        found = re.match(
            r"The error variance \(([0-9.]+), maximum likelihood\) is ([0-9.]+)% of the "
            r"average variance of single readings \(([0-9.]+)\)",
            sentence[0],
        )
        assert found is not None, sentence[0]
        ev, printed, average = (float(x) for x in found.groups())
        assert ev == float(f"{base.fit.error_variance:.4g}")
        assert f"{ev / average:.1%}" == f"{printed}%"
        assert "difference of two smoothed" not in sentence[0]


def test_no_log_transform_is_recommended_on_the_log_scale(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The spread-trend caveat (its rho forced high) recommends data.transform: log only
    # where the spec does not already apply it.
    import reportgen.analysis.analyse as analyse_module

    monkeypatch.setattr(analyse_module, "spread_trend", lambda frame: 0.9)
    plain = _analyse(tmp_path, "plain")
    logged = _analyse(
        tmp_path, "logged", ("  value_unit: units\n", "  value_unit: units\n  transform: log\n")
    )
    said = [c for c in plain.caveats if "grows with the fitted value" in c]
    assert len(said) == 1 and "(data.transform: log) often makes it so" in said[0]
    said = [c for c in logged.caveats if "grows with the fitted value" in c]
    assert len(said) == 1 and "often makes it so" not in said[0]
    assert "even on the log scale (data.transform: log)" in said[0]


def test_single_reading_sentence(base: AnalysisResult, tmp_path: Path) -> None:
    claim = "subjects have one reading"
    single = int(np.sum(base.fit.n_obs == 1))
    assert (any(claim in c for c in base.caveats)) == (single > 0.2 * base.fit.n_subjects)
    data = pd.read_csv(ROOT / "specs" / "clinic_visits.csv")
    patients = sorted(data.patient.unique())
    thin = set(patients[::2])  # every second patient keeps only the first visit
    first = data.groupby("patient").head(1)
    data = pd.concat([first[first.patient.isin(thin)], data[~data.patient.isin(thin)]])
    res = _analyse(tmp_path, "singles", data=data)
    n_single = int(np.sum(res.fit.n_obs == 1))
    sentence = next(c for c in res.caveats if claim in c)
    assert sentence.startswith(f"{n_single} of {res.fit.n_subjects} subjects have one reading")


def test_stability_sentence_quotes_the_similarities(base: AnalysisResult) -> None:
    for k, verdict in enumerate(base.stable):
        sentence = [c for c in base.caveats if c.startswith(f"Component {k + 1} changes")]
        assert bool(sentence) == (verdict is False)
        for quoted in re.findall(r"x([0-9.]+): ([0-9.]+)", " ".join(sentence)):
            run = next(r for r in base.sensitivity if f"{r.factor:g}" == quoted[0])
            assert f"{run.similarity[k]:.3f}" == quoted[1]
        for factor, n in re.findall(
            r"x([0-9.]+): absent, that fit has (\d+) components", " ".join(sentence)
        ):
            run = next(r for r in base.sensitivity if f"{r.factor:g}" == factor)
            assert np.isnan(run.similarity[k]) and run.fit.n_components == int(n) <= k


def test_error_variance_share_sentence_absent_when_noise_is_large(tmp_path: Path) -> None:
    data = pd.read_csv(ROOT / "specs" / "clinic_visits.csv")
    rng = np.random.default_rng(3)
    data["marker"] = (data.marker + rng.normal(0, 4.0, len(data))).round(2)  # sd 4 noise
    res = _analyse(tmp_path, "noisy", data=data)
    share = res.fit.error_variance / float(np.mean(res.fit.diagonal_variance))
    assert share >= 0.1
    assert not any(c.startswith("The error variance (") for c in res.caveats)


def test_time_pair_coverage_sentence(base: AnalysisResult, tmp_path: Path) -> None:
    claim = "Parts of the time-pair square have no pairs of readings"
    check = next(c for c in base.dataset.checks if c.name == "time-pair coverage")
    assert (any(c.startswith(claim) for c in base.caveats)) == (check.status == "warn")
    data = pd.read_csv(ROOT / "specs" / "clinic_visits.csv")
    early = sorted(data.patient.unique())[::2]  # half the patients seen only early, half late
    data = data[
        (data.patient.isin(early) & (data.week < 70))
        | (~data.patient.isin(early) & (data.week > 30))
    ]  # no (early, late) pairs
    res = _analyse(tmp_path, "split", data=data)
    check = next(c for c in res.dataset.checks if c.name == "time-pair coverage")
    assert check.status == "warn"
    sentence = next(c for c in res.caveats if c.startswith(claim))
    assert check.detail in sentence


def test_spread_trend_is_spearmans_rho() -> None:
    # Reference: scipy.stats.spearmanr (general-purpose library), on values with ties.
    from scipy.stats import spearmanr

    from reportgen.analysis.views import spread_trend

    rng = np.random.default_rng(9)
    fitted = rng.integers(0, 20, 300).astype(float)
    standardized = rng.normal(size=300) * (1 + fitted / 10)
    frame = pd.DataFrame({"fitted": fitted, "standardized": standardized.round(1)})
    expected = spearmanr(np.abs(frame.standardized), frame.fitted).statistic
    assert spread_trend(frame) == pytest.approx(expected, rel=1e-12)
    # Parquet input gives Arrow-backed columns: the same number
    assert spread_trend(frame.astype("float64[pyarrow]")) == pytest.approx(expected, rel=1e-12)


def test_flagged_subjects_named_up_to_the_cap(base: AnalysisResult) -> None:
    # At the 0.5 quantile about half the subjects are flagged: the count is over every
    # subject and the names are the NAMED_FLAGGED farthest, farthest first, both found by
    # passes over the kept scores; the reference is numpy on every subject's scores.
    from dataclasses import asdict, replace

    from reportgen.analysis.views import NAMED_FLAGGED, subject_view
    from reportgen.report.sections import build_sections

    fit = base.fit
    view = subject_view(
        fit, base.residual_sums, 0.5, base.subjects_view.sampled, base.subjects_view.scores
    )
    d2 = np.sum(fit.score_values**2 / fit.eigenvalues, axis=1)
    assert view.n_flagged == int(np.sum(d2 > view.cut)) > NAMED_FLAGGED
    top = np.argsort(-d2, kind="stable")[:NAMED_FLAGGED]
    assert view.farthest.subject.tolist() == list(fit.subjects[top])
    np.testing.assert_array_equal(view.farthest.distance2, d2[top])
    result = replace(base, subjects_view=view)
    text = str(
        asdict(
            build_sections(result, {}, {"scores": ("<svg></svg>", "c", "a")}, order=["scores"])[0]
        )
    )
    assert f"{view.n_flagged} subject(s) flagged; the {NAMED_FLAGGED} farthest: " in text
    named = re.findall(r"(\w+) \(([\d.e+-]+)\)", text.split("farthest: ")[1].split(" (squared")[0])
    assert [s for s, _ in named] == [str(x) for x in fit.subjects[top]]


def test_residual_diagnostics_over_a_sample_say_so(
    base: AnalysisResult, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Above DIAGNOSTIC_MAX_SUBJECTS the spread trend and the residual figure use a seeded
    # sample of subjects: the sentence names it, and the number is Spearman's rho of that
    # sample's readings (reference: scipy.stats.spearmanr). At or below it, every subject.
    from scipy.stats import spearmanr

    from reportgen.analysis import views as analysis
    from reportgen.report.sections import _over_sample

    assert base.readings.n_sampled == base.fit.n_subjects and _over_sample(base) == ""
    monkeypatch.setattr(analysis, "DIAGNOSTIC_MAX_SUBJECTS", 40)
    res = _analyse(tmp_path, "sampled")
    n = res.fit.n_subjects
    sampled = res.readings.residuals
    assert res.readings.n_sampled == 40 < n and sampled.subject.nunique() == 40
    counts = sampled.groupby("subject").size()
    assert counts.tolist() == res.fit.scores.n_obs.loc[counts.index].tolist()  # all readings
    expected = spearmanr(np.abs(sampled.standardized), sampled.fitted).statistic
    assert res.spread == pytest.approx(expected, rel=1e-12)
    assert _over_sample(res) == (
        f"; over the {len(sampled):,} readings of a seeded sample of 40 of the {n:,} subjects"
    )
    # the per-subject table covers every subject, as does the summary's sample here
    from reportgen.analysis.subjects import every_subject_frames as subject_tables

    table = subject_tables(res)["residuals_by_subject"]
    assert len(table) == n and res.subjects_view.sample_words() == ""
    np.testing.assert_array_equal(
        table.rms_standardized, subject_tables(base)["residuals_by_subject"].rms_standardized
    )
    np.testing.assert_array_equal(res.subjects_view.rms, table.rms_standardized)


def test_the_dropped_eigenvalues_share_is_the_same_in_components_and_caveats(
    base: AnalysisResult,
) -> None:
    # One denominator (the surface's positive eigenvalues) wherever the share is printed.
    from dataclasses import asdict

    from reportgen.report.sections import build_sections

    fit = base.fit
    share = f"{fit.dropped_negative_sum / fit.surface_eigenvalues.sum():.1%} of the positive total"
    text = " ".join(str(asdict(x)) for x in build_sections(base, {}, {}, order=["components"]))
    assert share in text
    caveat = [c for c in base.caveats if "non-positive eigenvalues" in c]
    assert all(share in c for c in caveat)


def _failing_below(cut: float, base: AnalysisResult, monkeypatch: pytest.MonkeyPatch) -> None:
    """Make every sensitivity refit whose factor is below ``cut`` fail, as a smoother that
    is not defined there would."""
    import reportgen.analysis.sensitivity as sensitivity
    from reportgen.errors import EstimationError

    real = sensitivity.fit_parts

    def fit_parts(data, labels, options, per_subject=True):  # type: ignore[no-untyped-def]
        if options.mean_bandwidth < cut * base.fit.mean_bandwidth - 1e-9:
            raise EstimationError("the mean smoother is not defined at this bandwidth")
        return real(data, labels, options, per_subject=per_subject)

    monkeypatch.setattr(sensitivity, "fit_parts", fit_parts)


def _default_factors(base: AnalysisResult) -> Spec:
    from dataclasses import replace

    return replace(
        base.spec,
        sensitivity=replace(base.spec.sensitivity, factors=(0.5, 0.75, 1.5, 2.0), given=False),
    )


def _data(base: AnalysisResult, tmp_path: Path) -> tuple[object, object]:
    spec = load_spec(_copy(tmp_path))
    ds = load_dataset(spec, for_fit=True)
    from reportgen.fpca.plan import Partitioned

    held = ds.readings
    assert held is not None
    return Partitioned.of(held.executor, held.parts), held.ids


def _copy(tmp_path: Path) -> Path:
    shutil.copy(ROOT / "specs" / "clinic_visits.csv", tmp_path / "clinic_visits.csv")
    (tmp_path / "s.yaml").write_text((ROOT / "specs" / "clinic_visits.yaml").read_text())
    return tmp_path / "s.yaml"


def test_default_factors_are_tried_as_they_are_and_raised_only_when_they_fail(
    base: AnalysisResult, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The README's rule: the default factors run as they are; one below 1 that cannot be
    # fitted is raised to the smallest factor at which every chosen bandwidth stays at or
    # above its smallest feasible candidate, printed as the factor run (two decimals).
    import reportgen.analysis.sensitivity as sensitivity

    factors, note, fallback = sensitivity.sensitivity_factors(_default_factors(base), base.fit)
    assert factors == [0.5, 0.75, 1.5, 2.0] and note == "Default factors 0.5, 0.75, 1.5 and 2."
    monkeypatch.setattr(sensitivity, "_smallest_feasible_factor", lambda fit: 0.853)
    factors, _, fallback = sensitivity.sensitivity_factors(_default_factors(base), base.fit)
    assert fallback == 0.86
    _failing_below(0.8, base, monkeypatch)
    data, ids = _data(base, tmp_path)
    runs, raised = sensitivity.run_sensitivity(data, ids, base.fit, factors, lambda _: None, 0.86)
    assert [r.factor for r in runs] == [0.86, 1.5, 2.0]
    assert all(r.fit is not None for r in runs)
    assert raised.startswith(" 0.5, 0.75 could not be fitted (the mean smoother is not defined")
    assert "raised to 0.86, the smallest factor" in raised
    assert sensitivity.directions(runs) == ""


def test_only_larger_bandwidths_tried_is_said(
    base: AnalysisResult, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # No smaller setting computable and no fallback below 1: the verdict is one-sided and
    # the report says so (a caveat and the verdict table).
    import reportgen.analysis.sensitivity as sensitivity
    from reportgen.analysis.caveats import sensitivity_caveats

    _failing_below(1.0, base, monkeypatch)
    data, ids = _data(base, tmp_path)
    runs, raised = sensitivity.run_sensitivity(
        data, ids, base.fit, [0.5, 0.75, 1.5, 2.0], lambda _: None, None
    )
    assert raised == ""
    assert sensitivity.directions(runs) == "only larger bandwidths tried"
    words = " ".join(sensitivity_caveats(runs, sensitivity.mean_moves(runs, base.fit), "weeks"))
    assert "Sensitivity to the bandwidths: only larger bandwidths tried" in words


def test_a_mean_that_leaves_its_band_gets_a_verdict_and_a_caveat(base: AnalysisResult) -> None:
    # The rule (no outside reference): a setting's mean further from the main mean than the
    # simultaneous band's half-width anywhere makes the mean "not stable", with the place.
    from dataclasses import replace

    import reportgen.analysis.sensitivity as sensitivity
    from reportgen.analysis.caveats import sensitivity_caveats

    fit = base.fit
    run = next(r for r in base.sensitivity if r.fit is not None)
    assert run.fit is not None
    half = fit.mean_simultaneous_multiplier * fit.mean_se
    j = int(np.nanargmax(half))
    bumped = fit.mean.copy()
    bumped[j] += 2.0 * half[j]
    moved = replace(run, fit=replace(run.fit, mean=bumped))
    moves = sensitivity.mean_moves([moved], fit)
    assert moves[0].ratio == pytest.approx(2.0, rel=1e-9) and moves[0].time == fit.grid[j]
    words = " ".join(sensitivity_caveats([moved], moves, "weeks"))
    assert "The mean moves beyond its simultaneous band" in words
    assert f"at time {fit.grid[j]:.4g} weeks, 2 band half-widths" in words
    assert all(m.ratio <= 1.0 for m in base.mean_moves) == (
        not any("The mean moves beyond" in c for c in base.caveats)
    )


def test_the_shown_subjects_sentence_reads_without_listed_ids(base: AnalysisResult) -> None:
    from dataclasses import asdict

    from reportgen.report.sections import build_sections

    assert not base.spec.subjects.show
    text = " ".join(str(asdict(x)) for x in build_sections(base, {}, {}, order=["trajectories"]))
    assert "Subjects shown: 6 at even steps through all subjects" in text
    assert "the rest of the" not in text


def test_figure_words_follow_the_fit(base: AnalysisResult) -> None:
    # The captions and figure labels against the fit and tables they describe (no
    # outside reference: each sentence must be true of this analysis).
    from dataclasses import asdict, replace

    from reportgen.analysis.views import subject_view
    from reportgen.report.figures import FIGURES, with_unit
    from reportgen.report.sections import build_sections

    fit = base.fit
    # one component: the rebuilt correlation is +-1 everywhere, and the caption says so
    assert fit.n_components == 1
    fig, caption, _ = FIGURES["covariance"](base)  # type: ignore[misc]
    assert "With one component the rebuilt correlation is 1 or -1" in caption
    # all-positive covariances get a sequential map with the unit on its bar
    retained = fit.retained_covariance
    assert float(np.min(retained)) >= 0
    assert fig.axes[0].collections[0].get_cmap().name == "Blues"
    unit = base.spec.units()["covariance"]
    assert unit and any(ax.get_ylabel() == unit for ax in fig.axes[3:])
    # pointwise and simultaneous bands: "inner/outer" only where they differ
    traj = base.trajectories
    differ = not np.allclose(traj.lower, traj.lower_simultaneous, equal_nan=True)
    _, caption, _ = FIGURES["trajectories"](base)  # type: ignore[misc]
    assert ("(inner)" in caption) == differ and ("coincide here" in caption) == (not differ)
    # a file label that carries a unit is not given a second one
    assert with_unit("Serum level (mg/dl)", "log(mg/dl)") == "Serum level (log(mg/dl))"
    assert with_unit("Serum level", "mg/dl") == "Serum level (mg/dl)"
    assert with_unit("week", "") == "week"
    # the scores figure names at most five of many flagged subjects, and says how many
    view = subject_view(
        fit, base.residual_sums, 0.5, base.subjects_view.sampled, base.subjects_view.scores
    )
    _, caption, _ = FIGURES["scores"](replace(base, subjects_view=view))  # type: ignore[misc]
    assert f"the 5 farthest of the {view.n_flagged} flagged labelled by id" in caption
    # the components table says when it shows only the first ten
    text = str(asdict(build_sections(base, {}, {}, order=["components"])[0]))
    n_all = fit.all_eigenvalues.size
    assert (f"Shown: the first 10 of {n_all}" in text) == (n_all > 10)
    # the figure of where pairs of readings fall has a name of its own
    assert "pair_coverage" in FIGURES and "design" not in FIGURES


def test_the_printed_spec_leaves_out_whole_line_comments() -> None:
    # The rule (no outside reference): every setting line stays, no whole-line comment.
    from reportgen.report.sections import settings_text

    raw = "# columns:\n#   id: text  <- subject\nreport:\n  id: x   # folder\n\n  title: T\n"
    assert settings_text(raw) == "report:\n  id: x   # folder\n  title: T"


def test_the_mean_caption_names_its_multiplier_and_the_normal_one(base: AnalysisResult) -> None:
    # The rule (no outside reference): the caption quotes the multiplier that mean.csv's
    # simultaneous columns use, says how it was found, and gives the normal one beside it.
    from dataclasses import replace

    from reportgen.analysis.views import mean_multiplier_words
    from reportgen.fpca.result import MeanMultiplier

    fit = base.fit
    words = mean_multiplier_words(fit)
    assert fit.mean_multiplier.method == "bootstrap-t"
    assert f"multiplier, {fit.mean_simultaneous_multiplier:.2f}, is the bootstrap-t one" in words
    assert f"over {fit.mean_multiplier.resamples} resamples of subjects" in words
    assert f"the normal-theory multiplier would be {fit.mean_multiplier.normal:.2f}" in words
    normal = MeanMultiplier("normal", 2.5, reason="a stated reason", value=2.5)
    other = replace(fit, mean_multiplier=normal, mean_simultaneous_multiplier=2.5)
    words = mean_multiplier_words(other)
    assert "multiplier, 2.50, is the 95% quantile" in words and "(a stated reason)" in words
