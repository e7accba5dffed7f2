"""The model's adequacy checks on the residual sample (``fpca.adequacy``), their tables and
their caveats."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..fpca.adequacy import ADEQUACY_LEVEL as ADEQUACY_LEVEL  # for captions
from ..fpca.adequacy import Binned, VisitPattern, binned_means, visit_pattern
from ..fpca.adequacy import variance_by_time as _variance_by_time
from ..fpca.components import evaluate_at
from ..fpca.result import FPCAFit
from ..fpca.scores import conditional_scores


@dataclass(frozen=True)
class Adequacy:
    """The three checks (``fpca.adequacy``) on the readings of the residual sample."""

    variance: Binned
    by_time: Binned  # leave-one-reading-out residuals' mean over time
    by_fitted: Binned  # ... over their fitted value
    spread: Binned  # their mean square over its model value (1), over time
    visits: VisitPattern
    n_subjects: int
    # per subject of the residual sample, for the figure: last reading time, number of
    # readings, first score
    last_time: np.ndarray
    count: np.ndarray
    first_score: np.ndarray


def model_variance_at(fit: FPCAFit, t: np.ndarray) -> np.ndarray:
    """The model's variance of a single reading at times ``t``: the retained components',
    the left-out ones' and the error variance."""
    model = fit.predictor
    phi = model.eigenfunctions_at(t)
    left_out = np.interp(t, model.grid, model.truncation_variance)
    return np.asarray(phi**2 @ model.eigenvalues + left_out + model.error_variance)


def model_checks(fit: FPCAFit, readings: pd.DataFrame, codes: np.ndarray) -> Adequacy:
    """The checks on ``readings`` (the residual sample: time, value, fitted, residual) of
    the subjects ``codes`` (rows of ``fit.subjects``, one per reading), with the subjects'
    scores and score covariances from the fit.

    The residual checks use leave-one-reading-out residuals, ``e_j = y_j - E[y_j | the
    subject's other readings]``, under the model of every refined component (the retained
    K and those beyond, ``fit.likelihood``): under it ``E[e_j | y_-j] = 0``, so their mean
    is 0 at every time and at every leave-one-out fitted value (the in-sample residual is
    not: it shares the reading's own error with the fitted value, so that it rises with
    it). For the Gaussian model ``e_j = r_j / (sigma^2 (Sigma^-1)_jj)`` with ``r_j`` the
    in-sample residual and ``sigma^2 (Sigma^-1)_jj = 1 - phi_j' Omega phi_j / sigma^2``
    (``Omega`` the score error covariance; ``fpca.scores``), with variance ``1 /
    (Sigma^-1)_jj``.
    """
    order = np.argsort(codes, kind="stable")
    readings, codes = readings.iloc[order], codes[order]
    t = readings.time.to_numpy(dtype=np.float64)
    value = readings.value.to_numpy(dtype=np.float64)
    deviation = value - fit.predictor.mean_at(t)
    subjects, owner = np.unique(codes, return_inverse=True)
    last = np.full(subjects.size, -np.inf)
    np.maximum.at(last, owner, t)
    count = np.bincount(owner, minlength=subjects.size).astype(np.float64)
    scores = fit.kept_scores.pick(subjects)[0]
    s2 = fit.error_variance
    phi = evaluate_at(t, fit.grid, fit.refined_eigenfunctions)
    starts = np.searchsorted(owner, np.arange(subjects.size)).astype(np.intp)
    full, omega = conditional_scores(starts, deviation, phi, fit.likelihood.eigenvalues, s2)
    residual = deviation - np.sum(phi * full[owner], axis=1)
    quad = np.einsum("nk,nkl,nl->n", phi, omega[owner], phi)
    keep = np.maximum(1.0 - quad / s2, 1e-12)  # sigma^2 (Sigma^-1)_jj
    loo = residual / keep
    zero = np.zeros(t.size)
    # the mean's own estimation error is in every residual near t: its variance (the mean
    # band's, bias-corrected and so on the wide side) joins each bin's
    se = fit.mean_se
    known = np.isfinite(se)
    mean_var = np.interp(t, fit.grid[known], se[known] ** 2) if np.any(known) else zero
    return Adequacy(
        _variance_by_time(t, deviation, owner, model_variance_at(fit, t)),
        binned_means(t, loo, owner, zero, shared=mean_var),
        binned_means(value - loo, loo, owner, zero, shared=mean_var),
        binned_means(t, loo**2 * keep / s2, owner, np.ones(t.size)),
        visit_pattern(scores, last, count),
        int(subjects.size),
        last,
        count,
        scores[:, 0].copy(),
    )


def binned_frame(check: Binned, x: str) -> pd.DataFrame:
    return pd.DataFrame(
        {
            f"{x}_from": check.lower_edge,
            f"{x}_to": check.upper_edge,
            "readings": check.readings,
            "subjects": check.subjects,
            "observed": check.observed,
            "lower": check.low,
            "upper": check.high,
            "model": check.expected,
            "judged": check.judged,
            "outside": check.outside,
        }
    )


def adequacy_tables(found: Adequacy) -> dict[str, pd.DataFrame]:
    """tables/variance_check.csv, residual_trend.csv and visit_pattern.csv."""
    v = found.visits
    k = v.with_last_time.size
    visits = pd.DataFrame(
        {
            "component": np.repeat(np.arange(1, k + 1), 2),
            "against": ["last reading time", "number of readings"] * k,
            "spearman": np.column_stack([v.with_last_time, v.with_count]).ravel(),
            "p_value": np.column_stack([v.p_last_time, v.p_count]).ravel(),
            "threshold": v.threshold,
            "fires": np.column_stack([v.last_time_fires, v.count_fires]).ravel(),
        }
    )
    trend = pd.concat(
        [
            binned_frame(found.by_time, "x").assign(over="time", quantity="mean residual"),
            binned_frame(found.by_fitted, "x").assign(
                over="fitted value", quantity="mean residual"
            ),
            binned_frame(found.spread, "x").assign(
                over="time", quantity="mean squared standardized residual"
            ),
        ],
        ignore_index=True,
    )
    return {
        "variance_check": binned_frame(found.variance, "time"),
        "residual_trend": trend[
            ["quantity", "over", *[c for c in trend.columns if c not in ("quantity", "over")]]
        ],
        "visit_pattern": visits,
    }


def _bins_words(check: Binned, fmt: str = ".4g") -> str:
    parts = [
        f"{lo:{fmt}} to {hi:{fmt}}: model {e:.4g}, readings {o:.4g} [{a:.4g}, {b:.4g}]"
        for lo, hi, e, o, a, b, out in zip(
            check.lower_edge,
            check.upper_edge,
            check.expected,
            check.observed,
            check.low,
            check.high,
            check.outside,
            strict=True,
        )
        if out
    ]
    return "; ".join(parts[:4]) + ("; ..." if len(parts) > 4 else "")


def adequacy_caveats(found: Adequacy, time_unit: str) -> list[str]:
    """A caveat for each check that fires (none when the model's assumptions survive)."""
    out: list[str] = []
    level = f"{ADEQUACY_LEVEL:.0%}"
    tu = f" {time_unit}" if time_unit else ""
    v = found.variance
    if v.fires:
        out.append(
            f"The model's variance of a single reading disagrees with the readings' own at "
            f"{int(v.outside.sum())} of {v.outside.size} time bins (times{tu} "
            f"{_bins_words(v)}; intervals {level} over the bins together, cluster-robust). "
            "The model takes the covariance surface to describe every subject at every "
            "time: when the subjects read late differ from those read early (dropout, "
            "late entry), or the variance changes in a way the components do not follow, "
            "the bands are too narrow at some times and too wide at others "
            "(tables/variance_check.csv)."
        )
    for check, over in ((found.by_time, "time"), (found.by_fitted, "fitted value")):
        if check.fires:
            out.append(
                f"The leave-one-reading-out residuals (a reading minus its prediction from "
                f"the subject's other readings) are not centred on 0 over {over}: "
                f"{int(check.outside.sum())} of {check.outside.size} bins away from it "
                f"({over} {_bins_words(check)}; {level} intervals over the bins together). "
                "A systematic pattern, such as a U over time, means the mean or the "
                "retained components miss part of how the readings move "
                "(tables/residual_trend.csv)."
            )
    sp = found.spread
    if sp.fires:
        out.append(
            f"The readings' scatter around the subjects' curves changes over time: the mean "
            f"squared standardized leave-one-reading-out residual, 1 under the model, is "
            f"outside its interval at {int(sp.outside.sum())} of {sp.outside.size} time "
            f"bins (times{tu} {_bins_words(sp)}). The model has one measurement-error "
            "variance for all times; where the error grows or shrinks over time (or "
            "variation the components miss lands in the error variance), the trajectory "
            "bands and the bands for new readings are too wide at some times and too "
            "narrow at others (tables/residual_trend.csv)."
        )
    w = found.visits
    said = []
    for j in range(w.with_last_time.size):
        if w.last_time_fires[j]:
            direction = "higher" if w.with_last_time[j] < 0 else "lower"
            said.append(
                f"readings stop earlier for subjects with {direction} component {j + 1} "
                f"scores (Spearman {w.with_last_time[j]:.2f} with the last reading time, "
                f"p = {w.p_last_time[j]:.2g})"
            )
        if w.count_fires[j]:
            direction = "higher" if w.with_count[j] < 0 else "lower"
            said.append(
                f"subjects with {direction} component {j + 1} scores have fewer readings "
                f"(Spearman {w.with_count[j]:.2f}, p = {w.p_count[j]:.2g})"
            )
    if said:
        out.append(
            "The visit pattern depends on the subjects' levels: "
            + "; ".join(said)
            + f" (Bonferroni threshold {w.threshold:.2g} over the {found.n_subjects} subjects "
            "of the residual sample). The conditional-expectation model assumes that when "
            "and how often a subject is read does not depend on its curve; under "
            "informative dropout the mean and covariance describe the subjects while they "
            "are read, not the whole cohort, and a model for the dropout is needed to say "
            "more (tables/visit_pattern.csv)."
        )
    return out
