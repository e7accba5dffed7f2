"""The caveats the analysis generates (each said only when it is true of this analysis),
and the standing cautions every report carries."""

from __future__ import annotations

import numpy as np

from ..fpca.groups import GroupComparison
from ..fpca.result import FPCAFit
from ..inputs.loader import Dataset
from ..inputs.spec import Spec
from .sensitivity import MeanMove, SensitivityRun, directions

STANDARD_CAUTIONS = (
    "These results describe the study sample under the model's assumptions.",
    "They are not for decisions about an individual without review by a qualified "
    "statistician or clinician.",
    "The study protocol and statistical analysis plan take precedence over this appendix.",
)

# Below this the covariance smoother's local design is called nearly singular: at the
# domain ends of well-covered designs the value falls to 0.06-0.09 (one-sided windows);
# where eigenfunctions showed kinks (a thin band of pairs in two open datasets) it was
# 0.015-0.03, against medians of 0.4-1 (DEVELOPERS.md, "Thin designs").
THIN_DESIGN = 0.05


def caveats(
    spec: Spec,
    ds: Dataset,
    fit: FPCAFit,
    runs: list[SensitivityRun],
    stable: list[bool | None],
    n_residuals: int,
    rho: float,
) -> list[str]:
    """Every caveat that holds for this fit, its sensitivity runs and its residuals."""
    out = [w[:1].upper() + w[1:] + ("" if w.endswith(".") else ".") for w in fit.warnings]
    for c in ds.checks:
        if c.name == "time-pair coverage" and c.status == "warn":
            out.append(
                "Parts of the time-pair square have no pairs of readings: the covariance "
                f"there is an extrapolation of the smoother ({c.detail})."
            )
    out += selection_caveats(fit)
    out += thin_design_caveats(fit)
    average = float(np.mean(fit.diagonal_variance))
    share = fit.error_variance / average
    if share < 0.1:
        out.append(
            f"The error variance ({fit.error_variance:.4g}, maximum likelihood) is "
            f"{share:.1%} of the average variance of single readings ({average:.4g}): where "
            "differences between subjects dominate this much, measurement error and "
            "differences between subjects are hard to tell apart; read it, and the width of "
            "the bands, with the sensitivity table."
        )
    if rho > max(0.2, 3.0 / np.sqrt(n_residuals)):
        out.append(
            f"The spread of the residuals grows with the fitted value (Spearman "
            f"correlation of |standardized residual| with the fitted value {rho:.2f}): "
            "the error is not of constant size"
            + (
                f" even on the log scale (data.transform: {spec.data.transform}); read the "
                "bands with care."
                if spec.data.transform != "none"
                else ". A log transform of the values (data.transform: log) often makes it "
                "so; read the bands with care."
            )
        )
    single = int(np.sum(fit.n_obs == 1))
    if single > 0.2 * fit.n_subjects:
        out.append(
            f"{single} of {fit.n_subjects} subjects have one reading: their trajectories "
            "lean on the mean and the components, and their bands are wide."
        )
    thr = spec.sensitivity.similarity_threshold
    for k, ok in enumerate(stable):
        if ok is False:
            low = [
                f"x{r.factor:g}: {r.similarity[k]:.3f}"
                if np.isfinite(r.similarity[k])
                else f"x{r.factor:g}: absent, that fit has {r.fit.n_components} components"
                for r in runs
                if r.fit is not None and np.nan_to_num(r.similarity[k]) < thr
            ]
            out.append(
                f"Component {k + 1} changes when the bandwidths change (similarity "
                f"below {thr:g} at {', '.join(low)}): interpret its shape with care."
            )
    failed = [r for r in runs if r.fit is None]
    if failed:
        out.append(
            "Sensitivity settings not computed (not evidence either way): "
            + "; ".join(f"x{r.factor:g}: {r.error}" for r in failed)
            + "."
        )
    out.append(
        "Scores and bands come from conditional expectation under joint Gaussianity of "
        "scores and errors; with skewed or heavy-tailed data they are best linear "
        "predictions and the bands' coverage is approximate."
    )
    out.append(
        "Visit times are assumed unrelated to the subject's state; where readings are "
        "taken because a subject is unwell (or drop out because of it), the mean and the "
        "trajectories can be biased."
    )
    return out


def group_caveats(groups: GroupComparison | None, fit: FPCAFit) -> list[str]:
    """What the shared model and the group test do not say."""
    if groups is None:
        return []
    out = [
        f"The groups ({', '.join(groups.labels)}) share one fitted model: one mean for the "
        "scores, one set of eigenfunctions and eigenvalues, one error variance. Differences "
        "in how subjects vary within each group are not modelled, and each subject's scores "
        "are pulled towards the common mean, the more so the fewer readings the subject has: "
        "groups with fewer readings per subject look closer to the common mean than they are.",
        f"The group test is one test of all {fit.n_components} retained component(s) "
        "together. The per-component averages and the group mean curves are descriptive: "
        "they are not adjusted for multiple comparisons, and a difference read off them after "
        "looking at the data is not a tested finding. A comparison planned in the protocol "
        "takes precedence.",
    ]
    gaps = [
        lab
        for lab, m in zip(groups.labels, groups.means, strict=True)
        if not np.all(np.isfinite(m))
    ]
    if gaps:
        out.append(
            f"The mean curve of group(s) {', '.join(gaps)} is undefined over part of the "
            "time domain at the common mean bandwidth (too few readings there); the "
            "figure leaves those parts out."
        )
    return out


def thin_design_caveats(fit: FPCAFit) -> list[str]:
    """Name the time ranges where the covariance surface rests on a nearly singular fit."""
    thin = fit.diagonal_support < THIN_DESIGN
    if not np.any(thin):
        return []
    g = fit.grid
    edges = np.flatnonzero(np.diff(np.concatenate(([0], thin.astype(int), [0]))))
    ranges = ", ".join(
        f"{g[a]:.4g} to {g[b - 1]:.4g}" for a, b in zip(edges[::2], edges[1::2], strict=True)
    )
    return [
        f"Between {ranges} the covariance surface rests on a nearly singular local fit "
        f"(few, lopsided pairs of readings: the local design's normalised determinant "
        f"falls to {float(fit.diagonal_support.min()):.2g}, against a median of "
        f"{float(np.median(fit.diagonal_support)):.2g}). Eigenfunctions can show kinks or "
        "spikes there; compare them with the sensitivity fits before reading shapes in "
        "that range."
    ]


def selection_caveats(fit: FPCAFit) -> list[str]:
    """Say when the component rules disagree or the FVE sits at its threshold."""
    out = []
    sel = fit.selection
    picks = {
        rule: fit.rule_picks(rule)
        for rule in ("fve", "aic", "bic", "cv")
        if rule == "fve" or np.any(np.isfinite(getattr(sel, rule)))
    }
    if len(set(picks.values())) > 1:
        listed = ", ".join(f"{r.upper() if r != 'cv' else 'cv'} {k}" for r, k in picks.items())
        out.append(
            f"The rules for the number of components disagree ({listed}); the report "
            f"uses {fit.n_components} by the {sel.rule} rule. AIC and cv tend to pick "
            "more components than the data support when the eigenfunctions are "
            "estimated from the same data (measured in benchmarks/ACCURACY.md)."
        )
    k = fit.n_components
    if (
        sel.rule == "fve"
        and abs(float(fit.cumulative_fve[k - 1]) - fit.options.fve_threshold) < 0.01
    ):
        out.append(
            f"The cumulative FVE of the chosen {k} components, "
            f"{fit.cumulative_fve[k - 1]:.3f}, is within 0.01 of the threshold "
            f"{fit.options.fve_threshold:g}: a slightly different sample could change "
            "the number of components."
        )
    return out


def sensitivity_caveats(
    runs: list[SensitivityRun], moves: list[MeanMove], time_unit: str
) -> list[str]:
    """A one-sided sensitivity analysis, and a mean that leaves its band when the
    bandwidths move."""
    out = []
    side = directions(runs)
    if side and side != "no setting computed":
        out.append(
            f"Sensitivity to the bandwidths: {side}, so the stable / not stable verdicts "
            "say nothing about the other side."
        )
    far = [m for m in moves if m.ratio > 1.0]
    if far:
        tu = f" {time_unit}" if time_unit else ""
        out.append(
            "The mean moves beyond its simultaneous band when the bandwidths change ("
            + "; ".join(
                f"x{m.factor:g}: {m.moved:.4g} against {m.main:.4g} at time {m.time:.4g}{tu}, "
                f"{m.ratio:.2g} band half-widths"
                for m in far
            )
            + "): read the mean curve's shape there with care."
        )
    return out
