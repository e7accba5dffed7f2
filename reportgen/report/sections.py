"""The report's sections (a registry of small functions) built from an analysis: numbered
tables and figures, text and lists, in the order the spec asks for. What each section says
is read off the analysis result; nothing here computes a number of the model."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from ..analysis.analyse import AnalysisResult
from ..analysis.caveats import STANDARD_CAUTIONS
from ..analysis.sensitivity import directions
from ..analysis.views import NAMED_FLAGGED, band_words, function_words

if TYPE_CHECKING:
    from ..fpca.bandwidth import BandwidthChoice


@dataclass
class _Numbering:
    table: int = 0
    figure: int = 0


@dataclass
class Section:
    id: str
    title: str
    lead: str
    blocks: list[dict[str, Any]] = field(default_factory=list)


def _fmt(x: Any) -> str:
    if isinstance(x, bool | np.bool_):
        return "yes" if x else "no"
    if isinstance(x, int | np.integer):
        return str(int(x))
    if isinstance(x, float | np.floating):
        return "—" if not np.isfinite(x) else f"{float(x):.4g}"
    if x is None:
        return "—"
    return str(x)


def _how(choice: BandwidthChoice) -> str:
    method = {
        "cv": "chosen by K-fold cross-validation over subjects",
        "gcv": "chosen by generalized cross-validation (GCV)",
        "fixed": "fixed in the spec",
    }[choice.method]
    return f"{choice.value:.4g}, {method}"


class _Builder:
    def __init__(self, prefix: str = "") -> None:
        self.n = _Numbering()
        self.prefix = prefix
        self.sections: list[Section] = []

    def label(self, n: int) -> str:
        return f"{self.prefix}.{n}" if self.prefix else str(n)

    def section(self, id_: str, title: str, lead: str) -> Section:
        s = Section(id_, title, lead)
        self.sections.append(s)
        return s

    def table(self, s: Section, caption: str, header: list[str], rows: list[list[Any]]) -> None:
        self.n.table += 1
        s.blocks.append(
            {
                "kind": "table",
                "number": self.label(self.n.table),
                "caption": caption,
                "header": header,
                "rows": [[_fmt(c) for c in r] for r in rows],
            }
        )

    def text(self, s: Section, text: str, kind: str = "text") -> None:
        """A paragraph (``kind="text"``) or preformatted text (``kind="pre"``)."""
        s.blocks.append({"kind": kind, "text": text})

    def items(self, s: Section, items: list[str]) -> None:
        s.blocks.append({"kind": "list", "items": items})

    def figure(self, s: Section, svg: str, caption: str, alt: str) -> None:
        self.n.figure += 1
        s.blocks.append(
            {
                "kind": "figure",
                "number": self.label(self.n.figure),
                "svg": svg,
                "caption": caption,
                "alt": alt,
            }
        )


@dataclass
class _Context:
    """What a section function reads: the analysis, the figures, the record's summary."""

    b: _Builder
    result: AnalysisResult
    record_view: dict[str, Any]
    figures: dict[str, tuple[str, str, str]]

    @property
    def units(self) -> dict[str, str]:
        return self.result.spec.units()

    def unit(self, quantity: str) -> str:
        u = self.units[quantity]
        return f" ({u})" if u else ""

    def fig(self, s: Section, name: str) -> None:
        if name in self.figures:
            self.b.figure(s, *self.figures[name])


def _section_summary(c: _Context) -> None:
    b = c.b
    fit = c.result.fit
    unit = c.unit
    tu = c.unit("time")
    s = b.section("summary", "Summary", "The key numbers of this analysis at a glance.")
    b.text(
        s,
        "Method: functional principal component analysis of sparse longitudinal data by "
        "conditional expectation (Yao, Müller and Wang 2005, Journal of the American "
        "Statistical Association 100, 577-590). The mean is a local linear smooth of all "
        "readings; the covariance is a two-dimensional local linear smooth of the products "
        "of residuals at two different readings of a subject, with the readings' own "
        "squares smoothed separately to estimate the measurement-error variance; "
        "the eigenvalues and the error variance are then refined by maximising the "
        "marginal Gaussian likelihood of the readings "
        f"(over {fit.likelihood.n_subjects} subjects and {fit.likelihood.eigenvalues.size} "
        f"components), for eigenfunctions {function_words(fit)}; each subject's scores "
        "and trajectory follow by conditional "
        "expectation, which works with a single reading. Bands for trajectories add the "
        "components left out (with their shapes, for the simultaneous band). Bandwidths: mean "
        f"{_how(fit.mean_bandwidth_choice)}, covariance "
        f"{_how(fit.covariance_bandwidth_choice)}, variance of single readings "
        f"{_how(fit.diagonal_bandwidth_choice)} ({fit.options.kernel} kernel).",
    )
    per = fit.n_obs
    b.table(
        s,
        "Key estimates.",
        ["quantity", "value"],
        [
            ["subjects", fit.n_subjects],
            ["readings", fit.n_readings],
            [
                "readings per subject (min / median / max)",
                f"{per.min()} / {np.median(per):g} / {per.max()}",
            ],
            ["components chosen", f"{fit.n_components} (rule: {fit.selection.rule})"],
            ["FVE of the chosen components", f"{fit.cumulative_fve[fit.n_components - 1]:.3f}"],
            ["error variance, maximum likelihood" + unit("error variance"), fit.error_variance],
            [
                "error variance, smoothing estimate (starting point)" + unit("error variance"),
                fit.smoothing_error_variance,
            ],
            [
                "mean bandwidth" + tu,
                f"{fit.mean_bandwidth:.4g} ({fit.mean_bandwidth_choice.method})",
            ],
            [
                "covariance bandwidth" + tu,
                f"{fit.covariance_bandwidth:.4g} ({fit.covariance_bandwidth_choice.method})",
            ],
        ],
    )


def _section_checks(c: _Context) -> None:
    b = c.b
    ds = c.result.dataset
    fig = c.fig
    s = b.section("checks", "Data checks", "What was checked in the data before fitting.")
    b.table(
        s,
        f"Checks of {ds.relpath}.",
        ["check", "status", "detail"],
        [[chk.name, chk.status, chk.detail] for chk in ds.checks],
    )
    fig(s, "readings_per_subject")
    fig(s, "pair_coverage")


def _section_mean(c: _Context) -> None:
    b = c.b
    fit = c.result.fit
    fig = c.fig
    s = b.section(
        "mean",
        "Mean curve",
        "The average curve over all subjects, with pointwise "
        f"and simultaneous {fit.options.band_level:.0%} bands.",
    )
    fig(s, "mean")


def _section_covariance(c: _Context) -> None:
    b = c.b
    fig = c.fig
    s = b.section(
        "covariance",
        "Covariance and correlation",
        "How readings at two times vary together across subjects.",
    )
    fig(s, "covariance")


def _section_components(c: _Context) -> None:
    b = c.b
    fit = c.result.fit
    units = c.units
    unit = c.unit
    fig = c.fig
    s = b.section("components", "Components", "The main modes of variation and how many were kept.")
    n_ref = fit.likelihood.eigenvalues.size
    b.table(
        s,
        f"Eigenvalues and fraction of variance explained (FVE). The first {n_ref} are "
        "maximum likelihood estimates (the surface's values beside them); the rest are "
        "the surface's"
        + (
            f". Shown: the first 10 of {fit.all_eigenvalues.size}; every one is in "
            "tables/components.csv."
            if fit.all_eigenvalues.size > 10
            else "."
        ),
        [
            "component",
            "eigenvalue" + unit("eigenvalue"),
            "surface eigenvalue" + unit("eigenvalue"),
            "FVE",
            "cumulative FVE",
        ],
        [
            [
                k + 1,
                fit.all_eigenvalues[k],
                fit.surface_eigenvalues[k],
                fit.fve[k],
                fit.cumulative_fve[k],
            ]
            for k in range(min(fit.all_eigenvalues.size, 10))
        ],
    )
    span = float(fit.grid[-1] - fit.grid[0])
    b.text(
        s,
        "An eigenvalue is the variance of a component's score. The eigenfunctions have "
        "unit norm over the whole time domain, so eigenvalues scale with its length "
        f"({span:.4g}{' ' + units['time'] if units['time'] else ''}): eigenvalue / "
        "domain length is the average variance the component adds to a single reading"
        f"{unit('error variance')}; for the first component here "
        f"{fit.eigenvalues[0] / span:.4g}, beside an error variance of "
        f"{fit.error_variance:.4g}.",
    )
    b.text(
        s,
        f"{fit.all_eigenvalues.size} eigenvalues of the smoothed surface are positive; "
        f"{fit.dropped_eigenvalues} negative or numerically zero ones were dropped (the "
        f"negative ones sum to {fit.dropped_negative_sum:.3g}, "
        f"{fit.dropped_negative_sum / fit.surface_eigenvalues.sum():.1%} of the positive "
        "total). FVE is relative to the total of the positive eigenvalues, those of the "
        "retained and refined components as refined by likelihood.",
    )
    sel = fit.selection
    b.table(
        s,
        f"Component selection: every criterion; the rule used was {sel.rule}. AIC, BIC "
        f"and cv were computed over {sel.n_subjects_used} subjects, each K with its own "
        "likelihood maximum (K eigenvalues and the error variance counted as parameters).",
        ["K", "cumulative FVE", "AIC", "BIC", "cv error", "chosen"],
        [
            [
                int(k),
                sel.cumulative_fve[i],
                sel.aic[i],
                sel.bic[i],
                sel.cv[i],
                "chosen" if k == sel.chosen else "",
            ]
            for i, k in enumerate(sel.k)
        ],
    )
    fig(s, "eigenvalues")
    b.text(
        s,
        f"The eigenfunctions are {function_words(fit)}. The figure draws the other "
        "estimate dashed where there is one; tables/eigenfunctions.csv holds both and "
        "tables/eigenfunction_source.csv the comparison.",
    )
    fig(s, "eigenfunctions")
    fig(s, "effects")


def _subject_table(result: AnalysisResult, name: str) -> str:
    """Where a table of subjects is in the run directory."""
    if result.spec.subjects.tables == "parquet":
        return (
            f"tables/{name}/, {len(result.subject_parts)} Parquet part(s) listed in "
            f"tables/{name}/parts.json"
        )
    return f"tables/{name}.csv"


def _section_scores(c: _Context) -> None:
    b = c.b
    result = c.result
    fit = c.result.fit
    spec = c.result.spec
    fig = c.fig
    s = b.section("scores", "Scores", "Where each subject sits on the components.")
    view = result.subjects_view
    first = view.farthest.iloc[:NAMED_FLAGGED]
    named = ", ".join(
        f"{sid} ({d2:.3g})"
        for sid, d2 in zip(first.subject.astype(str), first.distance2, strict=True)
    )
    which = "" if view.n_flagged <= NAMED_FLAGGED else f"; the {NAMED_FLAGGED} farthest"
    b.text(
        s,
        f"Rule: a subject is flagged when its squared Mahalanobis distance of the scores "
        f"exceeds the {spec.subjects.outlier_quantile:g} quantile of the "
        f"chi-square({fit.n_components}) distribution; {view.n_flagged} subject(s) flagged"
        + (f"{which}: {named} (squared distance in brackets)" if named else "")
        + f". Distances and flags of every subject: {_subject_table(result, 'scores')}.",
    )
    fig(s, "scores")


def _section_trajectories(c: _Context) -> None:
    b = c.b
    result = c.result
    fit = c.result.fit
    spec = c.result.spec
    fig = c.fig
    s = b.section(
        "trajectories",
        "Trajectories",
        "Recovered curves of selected subjects with their readings and bands.",
    )
    chosen = list(spec.subjects.show)
    b.text(
        s,
        "Subjects shown: "
        + (
            f"{', '.join(chosen)} as listed in subjects.show; then the rest of the "
            if chosen
            else ""
        )
        + f"{spec.subjects.count} at even steps through all subjects ordered by number of "
        "readings, then id (from the fewest readings to the most), so that sparse and dense "
        f"subjects both appear: {', '.join(result.shown_subjects)}. Bands: "
        f"{band_words(fit)}. Inner band: pointwise {fit.options.band_level:.0%}; outer band: "
        "simultaneous over the whole curve, its multiplier for each subject the "
        f"{fit.options.band_level:.0%} quantile of the curve's largest standardized "
        "deviation over the grid, drawn from the band's own error distribution. Neither "
        "accounts for the smoothing bias of the mean. The tables also give each time's band "
        "for a new reading (lower_new_reading, upper_new_reading: the curve's variance plus "
        "the error variance)."
        + (
            " The trajectory of every subject, with plug-in bands (their simultaneous band "
            "the conservative chi-square bound): "
            f"{_subject_table(result, 'all_trajectories')}."
            if spec.subjects.all_trajectories
            else ""
        ),
    )
    fig(s, "trajectories")


def _section_residuals(c: _Context) -> None:
    b = c.b
    result = c.result
    fig = c.fig
    s = b.section(
        "residuals",
        "Residual diagnostics",
        "Whether the readings scatter around the fitted curves as the model assumes.",
    )
    fig(s, "residuals")
    import pandas as pd  # loaded already: the analysis made it

    view = result.subjects_view
    worst = view.worst
    rms = pd.Series(view.rms)
    over = view.sample_words()
    b.text(
        s,
        "Each residual (reading minus fitted trajectory) is divided by its own standard "
        "deviation under the fitted model, which is smaller than the error standard "
        "deviation because the trajectory was fitted to the same readings; so about 1 is "
        "expected when the model fits. Per subject, the root mean square of the "
        f"standardized residuals has median {rms.median():.3g} and 90th percentile "
        f"{rms.quantile(0.9):.3g}{f' (over {over})' if over else ''}; the Spearman "
        "correlation of their size with the fitted "
        f"value is {result.spread:.2f} (near 0 expected{_over_sample(result)}). The full "
        f"list is {_subject_table(result, 'residuals_by_subject')}.",
    )
    b.table(
        s,
        f"The {len(worst)} subjects with the largest RMS standardized residual.",
        ["subject", "readings", "mean residual", "RMS standardized"],
        [[r.subject, r.n_obs, r.mean_residual, r.rms_standardized] for r in worst.itertuples()],
    )
    found = result.adequacy
    if found is None:
        return
    b.text(
        s,
        "Does the model fit? Checks of its assumptions on the same readings"
        f"{_over_sample(result)}, each with a caveat when it fails: "
        + "; ".join(
            f"{what}: {'fails' if fires else 'holds'}"
            for what, fires in (
                (
                    "the model's variance of a reading against the readings' own, over time",
                    found.variance.fires,
                ),
                ("leave-one-out residuals centred on 0 over time", found.by_time.fires),
                ("and over fitted value", found.by_fitted.fires),
                ("their scatter constant over time (one error variance)", found.spread.fires),
                ("visit pattern unrelated to the subjects' scores", found.visits.fires),
            )
        )
        + ". Tables: tables/variance_check.csv, tables/residual_trend.csv, "
        "tables/visit_pattern.csv.",
    )
    v = found.variance
    b.table(
        s,
        "Variance of a single reading by time bin: the readings' (with interval) against "
        "the model's.",
        ["times", "readings", "subjects", "readings' variance", "interval", "model", "verdict"],
        [
            [
                f"{lo:.4g} to {hi:.4g}",
                int(n),
                int(g),
                o,
                f"[{a:.4g}, {bb:.4g}]",
                e,
                ("outside" if out else "inside") if judged else "too few subjects",
            ]
            for lo, hi, n, g, o, a, bb, e, judged, out in zip(
                v.lower_edge,
                v.upper_edge,
                v.readings,
                v.subjects,
                v.observed,
                v.low,
                v.high,
                v.expected,
                v.judged,
                v.outside,
                strict=True,
            )
        ],
    )
    fig(s, "variance_check")
    fig(s, "residual_trend")
    fig(s, "visit_pattern")


def _tested(result: AnalysisResult) -> str:
    """Whom the group test permuted: the subjects, or a seeded sample of them."""
    g = result.groups
    if g is None or g.tested == result.fit.n_subjects:
        return "subjects"
    return f"a seeded sample of {g.tested:,} of the {result.fit.n_subjects:,} subjects"


def _over_sample(result: AnalysisResult) -> str:
    """Where the residual diagnostics use a sample of subjects, say so."""
    words = result.readings.sample_words(result.fit.n_subjects)
    return f"; over {words}" if words else ""


def _section_sensitivity(c: _Context) -> None:
    b = c.b
    result = c.result
    fit = c.result.fit
    spec = c.result.spec
    fig = c.fig
    s = b.section(
        "sensitivity",
        "Sensitivity to the bandwidths",
        "How the estimates move when both bandwidths are multiplied by a factor.",
    )
    thr = spec.sensitivity.similarity_threshold
    rows = []
    rule = fit.options.component_rule
    for run in result.sensitivity:
        rows.append(
            [
                run.factor,
                run.mean_bandwidth,
                run.covariance_bandwidth,
                run.diagonal_bandwidth,
                run.fit.rule_picks(rule) if run.fit else "—",
                run.fit.error_variance if run.fit else float("nan"),
                ", ".join(_fmt(x) if np.isfinite(x) else "absent" for x in run.similarity)
                or f"not computed: {run.error}",
            ]
        )
    b.table(
        s,
        "Key estimates per bandwidth setting: K is the number of components the rule "
        f"({rule}) picks at that setting; similarity is |inner product| of each of the main "
        "fit's eigenfunctions with the same component of that setting (absent: that "
        "setting's fit gives the component no variance; counted as not stable).",
        ["factor", "mean bw", "covariance bw", "diagonal bw", "K", "error variance", "similarity"],
        rows,
    )
    b.text(
        s,
        result.factors_note + " A setting that could not be computed is shown as not "
        "computed with its reason and does not enter the verdict.",
    )
    side = directions(list(result.sensitivity))
    moves = result.mean_moves
    mean_verdict = (
        ("stable" if all(m.ratio <= 1.0 for m in moves) else "not stable")
        if moves
        else "not assessed (no setting could be computed)"
    )
    b.table(
        s,
        f"Verdict per component (stable when every similarity of the computed settings "
        f"is at least {thr:g}) and for the mean (stable when every computed setting's mean "
        "stays inside the main fit's simultaneous band)" + (f"; {side}." if side else "."),
        ["component", "verdict"],
        [
            *[
                [
                    k + 1,
                    {
                        True: "stable",
                        False: "not stable",
                        None: "not assessed (no setting could be computed)",
                    }[ok]
                    + (f" ({side})" if side and ok is not None else ""),
                ]
                for k, ok in enumerate(result.stable)
            ],
            ["mean", mean_verdict + (f" ({side})" if side and moves else "")],
        ],
    )
    fig(s, "sensitivity")
    fig(s, "bandwidths")


def _section_caveats(c: _Context) -> None:
    b = c.b
    result = c.result
    s = b.section(
        "caveats", "Caveats", "What could be wrong with these results, and how to use them."
    )
    b.items(s, list(result.caveats) + list(STANDARD_CAUTIONS))


def _section_reproducibility(c: _Context) -> None:
    b = c.b
    spec = c.result.spec
    record_view = c.record_view
    s = b.section(
        "reproducibility",
        "Reproducibility",
        "How to re-run this analysis and confirm by hash that nothing changed.",
    )
    b.table(s, "Record.", ["item", "value"], [[k, v] for k, v in record_view["items"]])
    b.text(
        s,
        "Across machines the numbers reproduce (verify compares every table within a "
        "relative 1e-6); the rendered HTML, figures and PDF reproduce byte for byte only "
        "with the same fonts and library versions (the environment above).",
    )
    b.text(s, record_view["commands"], kind="pre")
    b.text(
        s,
        "The spec's settings, its whole-line comments left out (a starter spec lists the "
        "data file's columns there); spec.yaml in the run is the file as given, its "
        "SHA-256 in the record above.",
    )
    b.text(s, settings_text(spec.raw.decode("utf-8")), kind="pre")


def settings_text(raw: str) -> str:
    """The spec without its whole-line comments (and the blank lines they leave)."""
    return "\n".join(
        line for line in raw.splitlines() if line.strip() and not line.lstrip().startswith("#")
    )


def _section_groups(c: _Context) -> None:
    g, fit, spec, b = c.result.groups, c.result.fit, c.result.spec, c.b
    if g is None:
        return
    su = spec.units()["score"]
    s = b.section(
        "groups",
        "Groups",
        f"The subjects by {spec.data.group}: mean curves, scores and a test of equal mean scores.",
    )
    k = fit.n_components
    b.table(
        s,
        "Subjects and average scores per group (descriptive).",
        ["group", "subjects"]
        + [f"mean score {j + 1}" + (f" ({su})" if su else "") for j in range(k)],
        [
            [label, int(n), *g.score_means[i]]
            for i, (label, n) in enumerate(zip(g.labels, g.n_subjects, strict=True))
        ],
    )
    resolution = 1 / (1 + g.permutations)
    b.text(
        s,
        f"Test of equal mean scores across the {len(g.labels)} groups, on the {k} "
        "retained component(s) together: Pillai's trace of a one-way MANOVA of the scores "
        f"is {g.statistic:.4g}; its p-value by {g.permutations} random permutations of the "
        f"group labels over {_tested(c.result)} (seed {g.seed}) is {g.p_value:.4g} (the "
        f"smallest p-value this number of permutations can give is {resolution:.2g}). The "
        "scores come from one model fitted to all groups together; see the caveats.",
    )
    c.fig(s, "group_means")
    c.fig(s, "group_scores")


# The report's sections, in their default order: name -> function. A section adds nothing
# when it does not apply (groups without a group column). The spec's report.sections picks
# and orders them; caveats (with the standing cautions) and reproducibility are required.
SECTIONS: dict[str, Callable[[_Context], None]] = {
    "summary": _section_summary,
    "checks": _section_checks,
    "mean": _section_mean,
    "covariance": _section_covariance,
    "components": _section_components,
    "scores": _section_scores,
    "groups": _section_groups,
    "trajectories": _section_trajectories,
    "residuals": _section_residuals,
    "sensitivity": _section_sensitivity,
    "caveats": _section_caveats,
    "reproducibility": _section_reproducibility,
}


def build_sections(
    result: AnalysisResult,
    record_view: dict[str, Any],
    figures: dict[str, tuple[str, str, str]],
    numbering: str = "",
    order: Sequence[str] | None = None,
) -> list[Section]:
    """Sections in report order (``order``: names from SECTIONS; default all of them).
    ``figures`` maps a name to (svg, caption, alt); tables and figures are numbered
    ``numbering.1``, ``numbering.2``, ... when a prefix is given."""
    context = _Context(_Builder(numbering), result, record_view, figures)
    for name in order or SECTIONS:
        SECTIONS[name](context)
    return context.b.sections
