"""What the report holds of the readings and of every subject, at a size that does not grow
with them: the residual diagnostics' readings (:class:`ReadingView`), and the scores,
distances and residual summaries of a sample of subjects with the farthest and worst of
all (:class:`SubjectView`). The per-subject results themselves stay with the data's parts.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
from scipy.special import chdtri

from ..fpca.adequacy import average_ranks as average_ranks  # one implementation, shared
from ..fpca.adequacy import spearman
from ..fpca.design import Sample, seeded_sample
from ..fpca.diagnostics import (
    axis,
    cell_counts,
    check_readings,
    distances,
    part_farthest,
    part_largest_rms,
    residual_summary,
)
from ..fpca.fit import MIN_SUPPORT as MIN_SUPPORT  # for captions: the report floor
from ..fpca.plan import Partitioned, PartResults
from ..fpca.result import FPCAFit
from ..fpca.smoothing import trapezoid_weights

# The residual diagnostics (figure, spread trend) use the readings of at most this many
# subjects, a seeded sample above it: at 20 000 subjects (about 10^5 readings) the
# Spearman correlation's standard error is about 0.003, against a caveat threshold of 0.2.
DIAGNOSTIC_MAX_SUBJECTS = 20000
# What the report shows of every subject's scores and residual summary (the score figures,
# the group test, the median and 90th percentile of the RMS standardized residuals) comes
# from at most this many subjects, a seeded sample above it ((2 + K + K^2) x 8 bytes each
# are gathered). The tables of subjects, the count of flagged subjects and the farthest and
# worst ones cover every subject (passes over the results kept with the parts).
SUBJECT_SAMPLE_MAX = 200_000
# The flagged subjects the report names (the farthest first): a large study flags thousands,
# and the table of scores holds them all; and the subjects of the table of the largest RMS
# standardized residuals.
NAMED_FLAGGED = 20
WORST_SHOWN = 10


@dataclass(frozen=True)
class ReadingView:
    """What the report holds of the readings, at a size that does not grow with them.

    Attributes
    ----------
    n_readings : int
    n_sampled : int
        Subjects in the residual sample: all of them up to DIAGNOSTIC_MAX_SUBJECTS, a seeded
        sample of that many above it.
    frame : DataFrame
        The readings of the sampled and of the shown subjects: subject, time, value,
        fitted, residual, standardized, sampled (the subject is in the residual sample).
    density : ndarray
        All readings counted in equal cells of ``time_axis`` x ``value_axis``
        (each axis: low, high, cells).
    """

    n_readings: int
    n_sampled: int
    frame: pd.DataFrame
    density: np.ndarray
    time_axis: tuple[float, float, int]
    value_axis: tuple[float, float, int]
    codes: np.ndarray  # the subject code (row of fit.subjects) of each row of frame

    @property
    def residuals(self) -> pd.DataFrame:
        """The readings of the residual sample."""
        return self.frame[self.frame.sampled.to_numpy()]

    @property
    def residual_codes(self) -> np.ndarray:
        """The subject codes of ``residuals``' rows."""
        return np.asarray(self.codes[self.frame.sampled.to_numpy()])

    def empty(self) -> ReadingView:
        return replace(self, frame=self.frame.iloc[:0], codes=self.codes[:0])

    def sample_words(self, n_subjects: int) -> str:
        """What the residual diagnostics are drawn from when it is a sample ("" when it is
        every subject)."""
        if self.n_sampled == n_subjects:
            return ""
        return (
            f"the {len(self.residuals):,} readings of a seeded sample of "
            f"{self.n_sampled:,} of the {n_subjects:,} subjects"
        )


@dataclass(frozen=True)
class SubjectView:
    """What the report holds of every subject's results, at a size that does not grow with
    the subjects (the rest stay with the parts, for the tables of subjects).

    Attributes
    ----------
    n_subjects : int
    sampled : ndarray
        Codes of the subjects held (increasing): every subject up to SUBJECT_SAMPLE_MAX, a
        seeded sample of that many above it.
    scores, distance2, rms : ndarray
        Their scores (n_sampled, K), squared Mahalanobis distances and RMS standardized
        residuals.
    cut : float
        A subject is flagged when its squared distance exceeds it.
    n_flagged : int
        Flagged subjects, of every subject.
    farthest : DataFrame
        The NAMED_FLAGGED farthest flagged subjects, farthest first: code, subject,
        distance2, score_1 .. score_K.
    worst : DataFrame
        The WORST_SHOWN subjects with the largest RMS standardized residual: subject,
        n_obs, mean_residual, rms_standardized.
    """

    n_subjects: int
    sampled: np.ndarray
    scores: np.ndarray
    distance2: np.ndarray
    rms: np.ndarray
    cut: float
    n_flagged: int
    farthest: pd.DataFrame
    worst: pd.DataFrame

    @property
    def flagged(self) -> np.ndarray:
        """Whether each sampled subject is flagged."""
        return np.asarray(self.distance2 > self.cut)

    def sample_words(self) -> str:
        """The sample's description ("" when it is every subject)."""
        if self.sampled.size == self.n_subjects:
            return ""
        return f"a seeded sample of {self.sampled.size:,} of the {self.n_subjects:,} subjects"

    def empty(self) -> SubjectView:
        return replace(
            self,
            sampled=self.sampled[:0],
            scores=self.scores[:0],
            distance2=self.distance2[:0],
            rms=self.rms[:0],
        )


def reading_view(
    data: Partitioned, fit: FPCAFit, shown: np.ndarray
) -> tuple[ReadingView, PartResults, pd.DataFrame]:
    """The pass that holds the fit against every reading (``fpca.diagnostics``): what the
    report shows of the readings, the per-subject residual sums (kept with the parts), and
    the trajectories of the shown subjects (``shown``: their codes, increasing) from their
    readings."""
    sampled = seeded_sample(fit.n_subjects, DIAGNOSTIC_MAX_SUBJECTS, fit.options.seed)
    chosen = np.union1d(sampled, shown).astype(np.intp)
    found = check_readings(data, fit.kept_scores, fit.predictor, chosen)
    codes = found.readings["subject"]
    frame = pd.DataFrame(
        {**found.readings, "subject": fit.subjects[codes], "sampled": np.isin(codes, sampled)}
    )
    view = ReadingView(
        fit.n_readings,
        int(sampled.size),
        frame,
        found.density,
        found.time_axis,
        found.value_axis,
        np.asarray(codes, dtype=np.intp),
    )
    mine = np.isin(codes, shown)
    readings = Sample.from_arrays(
        np.searchsorted(shown, codes[mine]),
        found.readings["time"][mine],
        found.readings["value"][mine],
    )
    trajectories = fit.trajectories(list(fit.subjects[shown]), readings=readings)
    return view, found.sums, trajectories


def subject_sample(fit: FPCAFit) -> tuple[np.ndarray, np.ndarray]:
    """The codes of the subjects whose results the report gathers (every subject up to
    SUBJECT_SAMPLE_MAX, a seeded sample above it), and their scores."""
    drawn = seeded_sample(fit.n_subjects, SUBJECT_SAMPLE_MAX, fit.options.seed)
    return drawn, fit.kept_scores.pick(drawn)[0]


def flag_cut(n_components: int, quantile: float) -> float:
    """The squared distance above which a subject is flagged: the chi-square(K) quantile."""
    return float(chdtri(n_components, 1.0 - quantile))


def _largest(frame: pd.DataFrame, column: str, n: int) -> pd.DataFrame:
    """The ``n`` rows with the largest ``column`` (NaN last), ties by subject."""
    values = np.nan_to_num(frame[column].to_numpy(dtype=np.float64), nan=-np.inf)
    order = np.lexsort((frame.subject.to_numpy(), -values))
    return frame.iloc[order[:n]].reset_index(drop=True)


def subject_view(
    fit: FPCAFit,
    sums: PartResults,
    quantile: float,
    sampled: np.ndarray,
    sampled_scores: np.ndarray,
) -> SubjectView:
    """What the report shows of every subject: the sample's values (``sampled``, with
    their ``sampled_scores``) and two passes over the kept results, for the farthest
    flagged subjects and the largest RMS standardized residuals."""
    cut = flag_cut(fit.n_components, quantile)
    kept = fit.kept_scores
    found = kept.map(part_farthest, shared=(fit.eigenvalues, cut, NAMED_FLAGGED))
    codes = np.concatenate([c[f.rows] for c, f in zip(kept.subjects, found, strict=True)])
    d2 = np.concatenate([f.distance2 for f in found])
    order = np.lexsort((codes, -d2))[:NAMED_FLAGGED]
    farthest = pd.DataFrame(
        {"code": codes[order], "subject": fit.subjects[codes[order]], "distance2": d2[order]}
    )
    top = np.concatenate([f.scores for f in found])[order]
    for k in range(fit.n_components):
        farthest[f"score_{k + 1}"] = top[:, k]
    worst = sums.map(part_largest_rms, [(fit.n_obs[c],) for c in sums.subjects], (WORST_SHOWN,))
    codes = np.concatenate([c[w.rows] for c, w in zip(sums.subjects, worst, strict=True)])
    candidates = pd.DataFrame(
        {
            "subject": fit.subjects[codes],
            "n_obs": fit.n_obs[codes],
            "mean_residual": np.concatenate([w.mean_residual for w in worst]),
            "rms_standardized": np.concatenate([w.rms for w in worst]),
        }
    )
    _, rms = residual_summary(sums.pick(sampled), fit.n_obs[sampled])
    return SubjectView(
        fit.n_subjects,
        sampled,
        sampled_scores,
        distances(sampled_scores, fit.eigenvalues),
        rms,
        cut,
        sum(f.n_beyond for f in found),
        farthest,
        _largest(candidates, "rms_standardized", WORST_SHOWN),
    )


def density(
    x: np.ndarray, y: np.ndarray, cells: tuple[int, int]
) -> tuple[np.ndarray, tuple[tuple[float, float, int], ...]]:
    """Counts of the points (x, y) in ``cells`` equal cells over their range, and the two
    axes (low, high, cells): how the report draws many points as an image."""
    axes = tuple(axis(float(v.min()), float(v.max()), n) for v, n in ((x, cells[0]), (y, cells[1])))
    return cell_counts(x, y, axes), axes


def spread_trend(residuals: pd.DataFrame) -> float:
    """Spearman correlation of |standardized residual| with the fitted value."""
    return spearman(
        np.abs(residuals.standardized.to_numpy(dtype=np.float64)),
        residuals.fitted.to_numpy(dtype=np.float64),
    )[0]


def band_words(fit: FPCAFit) -> str:
    """What the trajectories' bands are, in words for a caption (``fpca.result.BandChoice``)."""
    band = fit.band
    if band.kind == "corrected":
        return (
            "corrected for the estimation of the mean, eigenfunctions and variances "
            f"({band.reason})"
        )
    if band.kind == "unavailable":
        return f"not drawn: the corrected band is unavailable ({band.reason})"
    return f"plug-in: the mean, eigenfunctions and variances taken as known ({band.reason})"


def mean_variance_words(fit: FPCAFit, whose: str = "subjects") -> str:
    """How a mean band's variance was estimated, in words for a caption
    (``FPCAFit.mean_variance``)."""
    if fit.mean_variance == "jackknife":
        return (
            f"a variance by the jackknife over {whose} (leaving out one at a time), widened "
            "where few subjects carry the fit (the t quantile at its effective degrees of "
            "freedom)"
        )
    return f"a cluster-robust (sandwich) variance over {whose}"


def mean_multiplier_words(fit: FPCAFit) -> str:
    """How the mean's simultaneous band multiplier was found, in words for a caption
    (``FPCAFit.mean_multiplier``)."""
    chosen = fit.mean_multiplier
    level = f"{fit.options.band_level:.0%}"
    if chosen.method == "bootstrap-t":
        return (
            f"The simultaneous band's multiplier, {chosen.value:.2f}, is the bootstrap-t one: "
            f"the {level} quantile of the largest studentized deviation of the band's centre "
            f"over {chosen.resamples} resamples of subjects, each refitted and jackknifed as "
            "the data are, so that the noise of the standard error itself counts"
            + (
                f" ({chosen.undefined} resamples undefined where the band is drawn, counted "
                "as beyond it)"
                if chosen.undefined
                else ""
            )
            + f"; the normal-theory multiplier would be {chosen.normal:.2f}."
        )
    return (
        f"The simultaneous band's multiplier, {fit.mean_simultaneous_multiplier:.2f}, is the "
        f"{level} quantile of the largest standardized deviation of a normal process with the "
        "band's covariance" + (f" ({chosen.reason})." if chosen.reason else ".")
    )


def function_words(fit: FPCAFit) -> str:
    """Where the eigenfunctions come from, and the evidence, in words (``FunctionSource``)."""
    src = fit.functions
    held = (
        f"; held-out log-likelihood per subject ({src.folds}-fold cross-validation over "
        f"{src.subjects} subjects) {src.held_out_likelihood:.4f} refined against "
        f"{src.held_out_smoothing:.4f} from the surface"
        if src.folds
        else ""
    )
    if src.used == "likelihood":
        return (
            "refined by maximising the marginal Gaussian likelihood of the readings over a "
            f"cubic B-spline basis of {src.n_basis} functions, started from the covariance "
            f"surface's ({src.reason}{held})"
        )
    return f"those of the smoothed covariance surface ({src.reason}{held})"


def other_functions(fit: FPCAFit) -> np.ndarray | None:
    """The estimate of the eigenfunctions the fit does not use, one column per retained
    component: the other set's column closest to it (largest absolute inner product, each
    used once), signed to agree; ``None`` when there is no other estimate."""
    src = fit.functions
    other = src.smoothing if src.used == "likelihood" else src.likelihood
    if other.size == 0:
        return None
    w = trapezoid_weights(fit.grid)
    inner = (fit.eigenfunctions * w[:, None]).T @ other  # (K, K_other)
    out = np.full(fit.eigenfunctions.shape, np.nan)
    free = np.ones(other.shape[1], dtype=bool)
    for k in range(fit.eigenfunctions.shape[1]):
        if not free.any():
            break
        j = int(np.argmax(np.where(free, np.abs(inner[k]), -1.0)))
        free[j] = False
        out[:, k] = other[:, j] * (1.0 if inner[k, j] >= 0 else -1.0)
    return out
