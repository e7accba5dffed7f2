"""The model's adequacy checks on the residual sample (``fpca.adequacy``), their tables and
their caveats."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..fpca.adequacy import ADEQUACY_LEVEL as ADEQUACY_LEVEL  # for captions
from ..fpca.adequacy import (
    Binned,
    VisitPattern,
    binned_means,
    mean_error_variance,
    visit_pattern,
)
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
    spread: Binned  # their mean square over its model value, over time, against its average
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


def _loo(
    deviation: np.ndarray, phi: np.ndarray, eigenvalues: np.ndarray, s2: float, starts: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Leave-one-reading-out residuals of subject-sorted readings, their standardized
    squares, and the scores' error covariances and ``sigma^2 (Sigma^-1)_jj`` behind them."""
    owner = np.repeat(np.arange(starts.size), np.diff(np.append(starts, deviation.size)))
    full, omega = conditional_scores(starts, deviation, phi, eigenvalues, s2)
    residual = deviation - np.sum(phi * full[owner], axis=1)
    quad = np.einsum("nk,nkl,nl->n", phi, omega[owner], phi)
    keep = np.maximum(1.0 - quad / s2, 1e-12)  # sigma^2 (Sigma^-1)_jj
    loo = residual / keep
    return loo, loo**2 * keep / s2, omega, keep


def _under_replicates(
    fit: FPCAFit, t: np.ndarray, value: np.ndarray, starts: np.ndarray
) -> list[tuple[np.ndarray, np.ndarray]]:
    """The leave-one-out residuals and their standardized squares of the same readings
    under each resampled fit of the corrected band (``fit.replicates``; none for a plug-in
    band): how much a check's bin moves with the estimation of the model's parts (its
    mean, eigenfunctions, eigenvalues and error variance). A resampled fit keeps its
    retained components only; the rest enter as a variance of each reading's own (as in
    its bands), so its residuals are near, not equal to, the main fit's: what is used is
    their spread over the resampled fits, not their level."""
    out = []
    for rep in fit.replicates:
        # each reading's own noise: the error variance plus the left-out components'
        # variance there; readings and eigenfunctions scaled by its root make it one
        root = np.sqrt(rep.error_variance + np.interp(t, rep.grid, rep.truncation_variance))
        loo, z2, _, _ = _loo(
            (value - rep.mean_at(t)) / root,
            rep.eigenfunctions_at(t) / root[:, None],
            np.asarray(rep.eigenvalues),
            1.0,
            starts,
        )
        out.append((loo * root, z2))
    return out


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

    A bin's interval adds, to the cluster-robust variance of its mean, the variance that
    the estimation of the model's parts brings: over the corrected band's resampled fits
    (``_under_replicates``) where the fit has them, else the mean's error alone
    (``fpca.adequacy.mean_error_variance``). Without it, studies of 100 subjects where
    the model holds fired the scatter check in 15% (the estimated parts are off by more
    than a bin's sampling error); with it, 3 of 120 (tests/analysis/test_adequacy.py).
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
    loo, z2, omega, keep = _loo(deviation, phi, fit.likelihood.eigenvalues, s2, starts)
    zero = np.zeros(t.size)
    again = _under_replicates(fit, t, value, starts)
    # One error variance means the same mean square at every time: each bin is set
    # against the readings' average, not against 1, so that an error variance estimated
    # a little high or low everywhere (its estimation error, large in small studies) is
    # not read as a change over time.
    average = float(np.mean(z2))

    def estimation(squares: bool) -> Callable[[np.ndarray, int], np.ndarray]:
        """The bins' variance from the estimation of the model's parts, for the residuals
        or (``squares``) their standardized squares."""
        stat = 1 if squares else 0  # which of each resampled fit's (residuals, squares)

        def shared(which: np.ndarray, nb: int) -> np.ndarray:
            counts = np.maximum(np.bincount(which, minlength=nb), 1)
            if again:  # the bin's value under each resampled fit, on these readings
                binned = np.array([np.bincount(which, r[stat], nb) / counts for r in again])
                if squares:  # the scatter check is on the shape over time, not the level
                    binned *= average / np.array([np.mean(r[1]) for r in again])[:, None]
                return np.asarray(np.var(binned, axis=0, ddof=1))
            if squares or fit.mean_covariance.size == 0:
                return np.zeros(nb)
            # no resampled fits (a plug-in band): the estimated mean's error only, common
            # to every subject, as it reaches each bin's mean residual
            return mean_error_variance(
                which, nb, t, phi, owner, omega, keep, s2, fit.grid, fit.mean_covariance
            )

        return shared

    return Adequacy(
        _variance_by_time(t, deviation, owner, model_variance_at(fit, t)),
        binned_means(t, loo, owner, zero, shared=estimation(squares=False)),
        binned_means(value - loo, loo, owner, zero, shared=estimation(squares=False)),
        binned_means(
            t, z2, owner, np.full(t.size, average), shared=estimation(squares=True), positive=True
        ),
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
            f"squared standardized leave-one-reading-out residual, the same at every time "
            f"under the model ({sp.expected[0]:.3g} on average here), is outside its "
            f"interval at {int(sp.outside.sum())} of {sp.outside.size} time bins "
            f"(times{tu} {_bins_words(sp)}). The model has one measurement-error "
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
