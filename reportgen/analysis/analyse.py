"""Fit, sensitivity runs, diagnostics and caveats -> one frozen :class:`AnalysisResult`.

No files and no printing: the runner writes, the renderer reads.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
from scipy.special import chdtri

from ..errors import EstimationError
from ..fpca import FPCAFit, with_bandwidths
from ..fpca._kernels import compiled_on_disk
from ..fpca.components import choose
from ..fpca.design import Sample
from ..fpca.diagnostics import (
    check_readings,
    distances,
    part_farthest,
    part_largest_rms,
    residual_summary,
)
from ..fpca.fit import Labels, fit_parts, rows_of, seeded_sample
from ..fpca.frame import arrays_from_frame
from ..fpca.groups import GroupComparison, compare_groups_on
from ..fpca.plan import Executor, InProcess, Kept, Partitioned, split_parts
from ..fpca.smoothing import trapezoid_weights
from ..inputs.checks import Dataset
from ..inputs.spec import Spec

Progress = Callable[[str], None]


@dataclass(frozen=True)
class SensitivityRun:
    factor: float
    mean_bandwidth: float
    covariance_bandwidth: float
    diagonal_bandwidth: float
    fit: FPCAFit | None
    similarity: tuple[float, ...]  # |<phi_k main, phi_k run>| for k = 1..K of the main fit
    error: str = ""


@dataclass(frozen=True)
class AnalysisResult:
    spec: Spec
    dataset: Dataset
    fit: FPCAFit
    sensitivity: tuple[SensitivityRun, ...]
    readings: ReadingView  # what the report holds of the readings
    subjects_view: SubjectView  # what the report holds of every subject's results
    residual_sums: Kept  # per subject: sums of the residuals and squared standardized ones
    shown_subjects: tuple[str, ...]
    trajectories: pd.DataFrame  # of the shown subjects, in the fit's order (FPCAFit.trajectories)
    caveats: tuple[str, ...]
    stable: tuple[bool | None, ...]  # per component; None: no setting could be computed
    factors_note: str  # how the sensitivity factors were chosen
    spread: float = 0.0  # spread_trend(readings.residuals), computed once
    groups: GroupComparison | None = None  # when the spec names a group column
    subject_groups: tuple[str, ...] = ()  # the group of each of fit.subjects
    # the codes (rows of fit.subjects, increasing) of the subjects of each data part, in
    # the parts' order (one part per data file): how tables of subjects are split into parts
    subject_parts: tuple[np.ndarray, ...] = ()

    @property
    def time_label(self) -> str:
        """The time axis's name: the spec's time_label, the file's label, the column."""
        d = self.spec.data
        return str(d.get("time_label") or self.dataset.labels.get("time") or d["time"])

    @property
    def value_label(self) -> str:
        """The measured value's name: the spec's value_label, the file's label, the column."""
        d = self.spec.data
        return str(d.get("value_label") or self.dataset.labels.get("value") or d["value"])


def _similarity(grid: np.ndarray, a: np.ndarray, b: np.ndarray) -> float:
    return float(abs(trapezoid_weights(grid) @ (a * b)))


def rule_choice(fit: FPCAFit, rule: str, threshold: float) -> int:
    """The number of components that ``rule`` picks from a fit's criteria table."""
    sel = fit.selection
    if rule == "fixed":
        return fit.n_components
    return choose(rule, int(sel.k.size), sel.cumulative_fve, sel.aic, sel.bic, sel.cv,
                  threshold, None)


def _smallest_feasible_factor(fit: FPCAFit) -> float:
    """The smallest factor at which every automatically chosen bandwidth stays feasible:
    the largest ratio of a smoother's smallest feasible candidate to its chosen bandwidth."""
    ratios = [min(h for h, c in zip(ch.candidates, ch.criterion, strict=True)
                  if np.isfinite(c)) / ch.value
              for ch in (fit.mean_bandwidth_choice, fit.covariance_bandwidth_choice,
                         fit.diagonal_bandwidth_choice) if ch.candidates]
    return max(ratios, default=0.0)


def sensitivity_factors(spec: Spec, fit: FPCAFit) -> tuple[list[float], str]:
    """The factors to run and a sentence on how they were chosen.

    Factors given in the spec are used as given. The default ones (0.5, 0.75, 1.5, 2) below 1
    are raised to the smallest factor at which every smoother is still defined, so that the
    default settings can be computed for the data at hand.
    """
    given = spec.content.get("sensitivity", {}).get("factors")
    if given is not None:
        return [float(f) for f in given], "Factors as given in the spec."
    floor = _smallest_feasible_factor(fit)
    factors = sorted({math.ceil(max(f, floor) * 100) / 100 if f < 1 else f
                      for f in spec.sensitivity["factors"]})
    factors = [f for f in factors if f != 1.0]
    raised = [f for f in spec.sensitivity["factors"] if f < floor]
    note = ("Default factors 0.5, 0.75, 1.5 and 2" + (
        f"; {', '.join(f'{f:g}' for f in raised)} raised to {floor:.2f}, the smallest factor "
        "at which every automatically chosen bandwidth stays at or above its smallest "
        "feasible candidate" if raised else "") + ".")
    return factors, note


def _sensitivity(data: Partitioned, labels: Labels, fit: FPCAFit, factors: list[float],
                 progress: Progress) -> list[SensitivityRun]:
    """Refit at each bandwidth factor, keeping the main fit's number of components so that
    every component can be compared (the number the rule would pick is reported too)."""
    runs = []
    for factor in factors:
        hm, hc = factor * fit.mean_bandwidth, factor * fit.covariance_bandwidth
        hd = factor * fit.diagonal_bandwidth
        progress(f"sensitivity: bandwidths x {factor:g}")
        # Plug-in bands: the sensitivity fits are compared by their estimates, not bands.
        options = replace(with_bandwidths(fit.options, hm, hc, hd), band="plugin",
                          component_rule="fixed",
                          n_components=fit.n_components)
        # only the population parts are compared: the refit's scores and readings would
        # hold 0.2 GB each at 10^6 subjects, and take a third of its time
        try:
            try:
                other = fit_parts(data, labels, options, per_subject=False)
            except EstimationError:  # fewer positive eigenvalues than the main fit's K
                other = fit_parts(data, labels, replace(options, component_rule="fve"),
                                  per_subject=False)
        except EstimationError as e:
            runs.append(SensitivityRun(factor, hm, hc, hd, None, (), str(e)))
            continue
        sims = tuple(
            _similarity(fit.grid, fit.eigenfunctions[:, k], other.eigenfunctions[:, k])
            if k < other.n_components else float("nan")
            for k in range(fit.n_components)
        )
        runs.append(SensitivityRun(factor, hm, hc, hd, other, sims))
    return runs


# The residual diagnostics (figure, spread trend) use the readings of at most this many
# subjects, a seeded sample above it: at 20 000 subjects (about 10^5 readings) the
# Spearman correlation's standard error is about 0.003, against a caveat threshold of 0.2.
DIAGNOSTIC_MAX_SUBJECTS = 20000


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

    @property
    def residuals(self) -> pd.DataFrame:
        """The readings of the residual sample."""
        return self.frame[self.frame.sampled.to_numpy()]

    def empty(self) -> ReadingView:
        return replace(self, frame=self.frame.iloc[:0])

    def sample_words(self, n_subjects: int) -> str:
        """What the residual diagnostics are drawn from when it is a sample ("" when it is
        every subject)."""
        if self.n_sampled == n_subjects:
            return ""
        return (f"the {len(self.residuals):,} readings of a seeded sample of "
                f"{self.n_sampled:,} of the {n_subjects:,} subjects")


# What the report shows of every subject's scores and residual summary (the score figures,
# the group test, the median and 90th percentile of the RMS standardized residuals) comes
# from at most this many subjects, a seeded sample above it; their scores, covariances and
# residual sums are gathered, (2 + K + K^2) x 8 bytes each: 13 MB at K = 2. The tables of
# subjects, the count of flagged subjects and the farthest and worst ones cover every
# subject (passes over the results kept with the parts).
SUBJECT_SAMPLE_MAX = 200_000
# The flagged subjects the report names (the farthest first), and the subjects of the
# table of the largest RMS standardized residuals.
NAMED_FLAGGED = 20
WORST_SHOWN = 10


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
        return replace(self, sampled=self.sampled[:0], scores=self.scores[:0],
                       distance2=self.distance2[:0], rms=self.rms[:0])


def _check_readings(data: Partitioned, fit: FPCAFit, shown: np.ndarray
                    ) -> tuple[ReadingView, Kept, pd.DataFrame]:
    """The pass that holds the fit against every reading (``fpca.diagnostics``): what the
    report shows of the readings, the per-subject residual sums (kept with the parts), and
    the trajectories of the shown subjects (``shown``: their codes, increasing) from their
    readings."""
    sampled = seeded_sample(fit.n_subjects, DIAGNOSTIC_MAX_SUBJECTS, fit.options.seed)
    chosen = np.union1d(sampled, shown).astype(np.intp)
    found = check_readings(data, fit.kept_scores, fit.predictor(), chosen)
    codes = found.readings["subject"]
    frame = pd.DataFrame({**found.readings, "subject": fit.subjects[codes],
                          "sampled": np.isin(codes, sampled)})
    view = ReadingView(fit.n_readings, int(sampled.size), frame, found.density,
                       found.time_axis, found.value_axis)
    mine = np.isin(codes, shown)
    readings = Sample.from_arrays(np.searchsorted(shown, codes[mine]),
                                  found.readings["time"][mine], found.readings["value"][mine])
    trajectories = fit.trajectories(list(fit.subjects[shown]), readings=readings)
    return view, found.sums, trajectories


def flag_cut(n_components: int, quantile: float) -> float:
    """The squared distance above which a subject is flagged: the chi-square(K) quantile."""
    return float(chdtri(n_components, 1.0 - quantile))


def _largest(frame: pd.DataFrame, column: str, n: int) -> pd.DataFrame:
    """The ``n`` rows with the largest ``column`` (NaN last), ties by subject."""
    values = np.nan_to_num(frame[column].to_numpy(dtype=np.float64), nan=-np.inf)
    order = np.lexsort((frame.subject.to_numpy(), -values))
    return frame.iloc[order[:n]].reset_index(drop=True)


def subject_view(fit: FPCAFit, sums: Kept, quantile: float, sampled: np.ndarray,
                 sampled_scores: np.ndarray) -> SubjectView:
    """What the report shows of every subject: the sample's values (``sampled``, with
    their ``sampled_scores``) and two passes over the kept results, for the farthest
    flagged subjects and the largest RMS standardized residuals."""
    cut = flag_cut(fit.n_components, quantile)
    kept = fit.kept_scores
    found = kept.map(part_farthest, shared=(fit.eigenvalues, cut, NAMED_FLAGGED))
    codes = np.concatenate([c[f[1]] for c, f in zip(kept.subjects, found, strict=True)])
    d2 = np.concatenate([f[2] for f in found])
    order = np.lexsort((codes, -d2))[:NAMED_FLAGGED]
    farthest = pd.DataFrame({"code": codes[order], "subject": fit.subjects[codes[order]],
                             "distance2": d2[order]})
    top = np.concatenate([f[3] for f in found])[order]
    for k in range(fit.n_components):
        farthest[f"score_{k + 1}"] = top[:, k]
    worst = sums.map(part_largest_rms, [(fit.n_obs[c],) for c in sums.subjects],
                     (WORST_SHOWN,))
    codes = np.concatenate([c[w[0]] for c, w in zip(sums.subjects, worst, strict=True)])
    candidates = pd.DataFrame({"subject": fit.subjects[codes], "n_obs": fit.n_obs[codes],
                               "mean_residual": np.concatenate([w[1] for w in worst]),
                               "rms_standardized": np.concatenate([w[2] for w in worst])})
    _, rms = residual_summary(sums.pick(sampled), fit.n_obs[sampled])
    return SubjectView(fit.n_subjects, sampled, sampled_scores,
                       distances(sampled_scores, fit.eigenvalues), rms, cut,
                       sum(f[0] for f in found), farthest,
                       _largest(candidates, "rms_standardized", WORST_SHOWN))


def spread_trend(residuals: pd.DataFrame) -> float:
    """Spearman correlation of |standardized residual| with the fitted value: the Pearson
    correlation of their average ranks (its definition; pandas' own method="spearman"
    imports scipy.stats, a second of start-up for one number)."""
    columns = (np.abs(residuals.standardized.to_numpy(dtype=np.float64)),
               residuals.fitted.to_numpy(dtype=np.float64))
    if columns[0].size > 100_000:  # numpy sorts without the GIL: two cores, half the time
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(2) as pool:
            size, fitted = pool.map(average_ranks, columns)
    else:
        size, fitted = map(average_ranks, columns)
    size -= size.mean()
    fitted -= fitted.mean()
    den = math.sqrt(float(size @ size) * float(fitted @ fitted))
    return float(size @ fitted) / den if den > 0 else float("nan")


def average_ranks(x: np.ndarray) -> np.ndarray:
    """Ranks 1..n of finite values, ties given the average of their ranks (one sort; pandas'
    rank took 1.8 s per column at 4.5 million readings, this 1.2 s, and a third of the
    memory when no value repeats)."""
    if x.size == 0:
        return np.zeros(0)
    order = np.argsort(x)  # ties get one average rank: the sort need not be stable
    xs = x[order]
    new = np.empty(x.size, dtype=bool)
    new[0] = True
    np.not_equal(xs[1:], xs[:-1], out=new[1:])
    del xs
    ranks = np.empty(x.size)
    if new.all():  # no ties, as with continuous values
        ranks[order] = np.arange(1.0, x.size + 1.0)
        return ranks
    first = np.flatnonzero(new)
    last = np.append(first[1:], x.size) - 1
    ranks[order] = np.repeat((first + last) / 2.0 + 1.0, last - first + 1)
    return ranks


def _shown(fit: FPCAFit, spec: Spec) -> tuple[str, ...]:
    chosen = [str(s) for s in spec.subjects["show"]]
    found = rows_of(pd.Index(fit.subjects).astype(str), chosen)
    missing = [s for s, row in zip(chosen, found, strict=True) if row < 0]
    if missing:
        raise EstimationError(f"subjects.show names subjects not in the data: {missing[:5]!r}")
    count = spec.subjects["count"]
    if len(chosen) < count:
        # Deterministic spread: subjects ordered by readings then id, taken at even steps.
        order = _by_readings_then_id(fit.n_obs, fit.subjects)
        picks = np.unique(np.linspace(0, len(order) - 1, count - len(chosen)).round().astype(int))
        ids = [str(fit.subjects[order[i]]) for i in picks]
        chosen += [s for s in ids if s not in chosen]
    return tuple(chosen)


def _codes_of(fit: FPCAFit, shown: tuple[str, ...]) -> np.ndarray:
    """The codes (rows of ``fit.subjects``) of the subjects shown, named as text."""
    as_text = pd.Index(fit.subjects).astype(str)
    return np.flatnonzero(as_text.isin(shown)).astype(np.intp)


def _by_readings_then_id(n_obs: np.ndarray, subjects: Labels) -> np.ndarray:
    """Row order by (readings, id as text); the ids usually come sorted already (the fit
    sorts its labels), and then it is one stable sort of the counts, not a sort of a
    million Python tuples (1.8 s)."""
    ids = pd.Index(subjects).astype(str)
    if _increasing(ids):
        return np.argsort(n_obs, kind="stable")
    return np.lexsort((ids.argsort(kind="stable").argsort(kind="stable"), n_obs))


def _increasing(ids: pd.Index) -> bool:
    """Whether text ids are in increasing order: for Arrow text, one comparison of
    neighbours in Arrow (pandas' is_monotonic_increasing made a Python string of every id:
    0.77 GB more at 10^7 ids, measured)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    try:
        text = pa.array(ids)
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        return bool(ids.is_monotonic_increasing)
    if text.null_count or len(text) < 2:
        return bool(ids.is_monotonic_increasing)
    return not pc.any(pc.less(text[1:], text[:-1])).as_py()


def _caveats(spec: Spec, ds: Dataset, fit: FPCAFit, runs: list[SensitivityRun],
             stable: list[bool | None], n_residuals: int, rho: float) -> list[str]:
    out = [w[:1].upper() + w[1:] + ("" if w.endswith(".") else ".") for w in fit.warnings]
    for c in ds.checks:
        if c.name == "time-pair coverage" and c.status == "warn":
            out.append("Parts of the time-pair square have no pairs of readings: the covariance "
                       f"there is an extrapolation of the smoother ({c.detail}).")
    out += _selection_caveats(fit)
    out += _thin_design_caveats(fit)
    share = fit.error_variance / float(np.mean(fit.diagonal_variance))
    if share < 0.1:
        out.append(f"The error variance is {share:.1%} of the variance of single readings. It is "
                   "estimated as the difference of two smoothed variances, which is imprecise "
                   "when differences between subjects dominate: read it, and the width of the "
                   "bands, with the sensitivity table.")
    if rho > max(0.2, 3.0 / np.sqrt(n_residuals)):
        out.append(f"The spread of the residuals grows with the fitted value (Spearman "
                   f"correlation of |standardized residual| with the fitted value {rho:.2f}): "
                   "the error is not of constant size. A log transform of the values "
                   "(data.transform: log) often makes it so; read the bands with care.")
    single = int(np.sum(fit.n_obs == 1))
    if single > 0.2 * fit.n_subjects:
        out.append(f"{single} of {fit.n_subjects} subjects have one reading: their trajectories "
                   "lean on the mean and the components, and their bands are wide.")
    thr = spec.sensitivity["similarity_threshold"]
    for k, ok in enumerate(stable):
        if ok is False:
            low = [f"x{r.factor:g}: {r.similarity[k]:.3f}" if np.isfinite(r.similarity[k])
                   else f"x{r.factor:g}: absent, that fit has {r.fit.n_components} components"
                   for r in runs
                   if r.fit is not None and np.nan_to_num(r.similarity[k]) < thr]
            out.append(f"Component {k + 1} changes when the bandwidths change (similarity "
                       f"below {thr:g} at {', '.join(low)}): interpret its shape with care.")
    failed = [r for r in runs if r.fit is None]
    if failed:
        out.append("Sensitivity settings not computed (not evidence either way): "
                   + "; ".join(f"x{r.factor:g}: {r.error}" for r in failed) + ".")
    out.append("Scores and bands come from conditional expectation under joint Gaussianity of "
               "scores and errors; with skewed or heavy-tailed data they are best linear "
               "predictions and the bands' coverage is approximate.")
    out.append("Visit times are assumed unrelated to the subject's state; where readings are "
               "taken because a subject is unwell (or drop out because of it), the mean and the "
               "trajectories can be biased.")
    return out


def _group_caveats(groups: GroupComparison | None, fit: FPCAFit) -> list[str]:
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
    gaps = [lab for lab, m in zip(groups.labels, groups.means, strict=True)
            if not np.all(np.isfinite(m))]
    if gaps:
        out.append(f"The mean curve of group(s) {', '.join(gaps)} is undefined over part of the "
                   "time domain at the common mean bandwidth (too few readings there); the "
                   "figure leaves those parts out.")
    return out


# Below this the covariance smoother's local design is called nearly singular. Measured: at
# the domain ends of well-covered designs the value falls to 0.06-0.09 (one-sided windows);
# where eigenfunctions showed kinks (a thin band of pairs in two open datasets) it was
# 0.015-0.03, against medians of 0.4-1.
THIN_DESIGN = 0.05


def _thin_design_caveats(fit: FPCAFit) -> list[str]:
    """Name the time ranges where the covariance surface rests on a nearly singular fit."""
    thin = fit.diagonal_support < THIN_DESIGN
    if not np.any(thin):
        return []
    g = fit.grid
    edges = np.flatnonzero(np.diff(np.concatenate(([0], thin.astype(int), [0]))))
    ranges = ", ".join(f"{g[a]:.4g} to {g[b - 1]:.4g}" for a, b in zip(edges[::2], edges[1::2],
                                                                         strict=True))
    return [f"Between {ranges} the covariance surface rests on a nearly singular local fit "
            f"(few, lopsided pairs of readings: the local design's normalised determinant "
            f"falls to {float(fit.diagonal_support.min()):.2g}, against a median of "
            f"{float(np.median(fit.diagonal_support)):.2g}). Eigenfunctions can show kinks or "
            "spikes there; compare them with the sensitivity fits before reading shapes in "
            "that range."]


def _selection_caveats(fit: FPCAFit) -> list[str]:
    """Say when the component rules disagree or the FVE sits at its threshold."""
    out = []
    sel = fit.selection
    picks = {rule: rule_choice(fit, rule, fit.options.fve_threshold)
             for rule in ("fve", "aic", "bic", "cv") if rule == "fve" or
             np.any(np.isfinite(getattr(sel, rule)))}
    if len(set(picks.values())) > 1:
        listed = ", ".join(f"{r.upper() if r != 'cv' else 'cv'} {k}" for r, k in picks.items())
        out.append(f"The rules for the number of components disagree ({listed}); the report "
                   f"uses {fit.n_components} by the {sel.rule} rule. AIC and cv tend to pick "
                   "more components than the data support when the eigenfunctions are "
                   "estimated from the same data (measured in benchmarks/ACCURACY.md).")
    k = fit.n_components
    if sel.rule == "fve" and abs(float(fit.cumulative_fve[k - 1]) - fit.options.fve_threshold) \
            < 0.01:
        out.append(f"The cumulative FVE of the chosen {k} components, "
                   f"{fit.cumulative_fve[k - 1]:.3f}, is within 0.01 of the threshold "
                   f"{fit.options.fve_threshold:g}: a slightly different sample could change "
                   "the number of components.")
    return out


STANDARD_CAUTIONS = (
    "These results describe the study sample under the model's assumptions.",
    "They are not for decisions about an individual without review by a qualified "
    "statistician or clinician.",
    "The study protocol and statistical analysis plan take precedence over this appendix.",
)


def _data(ds: Dataset, executor: Executor) -> tuple[Partitioned, Labels]:
    """The readings as the fit's parts, one per data file, and the subjects' ids: those of
    many files where they were read (``Dataset.held``), one file's placed on ``executor``."""
    if ds.held is not None:
        # the ids stay Arrow text (as Python strings: 0.69 GB more at 10^7 subjects)
        return Partitioned.of(executor, ds.held.parts), ds.held.ids
    codes, t, y, labels = arrays_from_frame(ds.frame, "subject", "time", "value")
    return Partitioned.of(executor, executor.place(split_parts(codes, t, y, None))), labels


def analyse(spec: Spec, ds: Dataset, progress: Progress = lambda _: None,
            lap: Progress = lambda _: None, executor: Executor | None = None
            ) -> AnalysisResult:
    """The main fit, the sensitivity fits, diagnostics and caveats.

    ``progress`` receives a message before each long step; ``lap`` the name of each step
    just finished (for timing). The fits' passes over the data run on ``executor`` (here,
    by default; ``reportgen.analysis.engine``).
    """
    if not compiled_on_disk():
        progress("compiling the numerical kernels (once, about half a minute on 2 cores; "
                 "later runs load them from the cache)")
    progress("fit")
    data, labels = _data(ds, executor or InProcess())
    fit = fit_parts(data, labels, spec.options)  # the shown subjects' readings come later
    lap("fit")
    factors, factors_note = sensitivity_factors(spec, fit)
    runs = _sensitivity(data, labels, fit, factors, progress)
    lap("sensitivity")
    threshold = spec.sensitivity["similarity_threshold"]
    computed = [r for r in runs if r.fit is not None]
    stable: list[bool | None] = [
        all(np.nan_to_num(r.similarity[k]) >= threshold for r in computed) if computed else None
        for k in range(fit.n_components)]
    drawn = seeded_sample(fit.n_subjects, SUBJECT_SAMPLE_MAX, fit.options.seed)
    drawn_scores = fit.kept_scores.pick(drawn)[0]
    groups: GroupComparison | None = None
    subject_groups: tuple[str, ...] = ()
    if spec.data.get("group"):
        progress("groups")
        if ds.held is not None and ds.held.groups is not None:  # by code: fit.subjects' order
            subject_groups = tuple(str(g) for g in ds.held.groups)
        else:
            per = ds.frame.drop_duplicates("subject").set_index("subject")["group"]
            subject_groups = tuple(str(g) for g in per.reindex(fit.subjects).to_numpy())
        groups = compare_groups_on(data, fit, np.asarray(subject_groups),
                                   tested=(drawn, drawn_scores))
        lap("groups")
    shown = _shown(fit, spec)
    progress("diagnostics")
    view, sums, trajectories = _check_readings(data, fit, _codes_of(fit, shown))
    sampled = view.residuals
    rho = spread_trend(sampled)
    caveats = (_caveats(spec, ds, fit, runs, stable, len(sampled), rho)
               + _group_caveats(groups, fit))
    subjects = subject_view(fit, sums, spec.subjects["outlier_quantile"], drawn,
                            drawn_scores)
    lap("diagnostics")
    return AnalysisResult(
        spec=spec, dataset=replace(ds, held=None), fit=fit, sensitivity=tuple(runs),
        readings=view, subjects_view=subjects, residual_sums=sums,
        trajectories=trajectories,
        shown_subjects=shown, caveats=tuple(caveats), stable=tuple(stable),
        factors_note=factors_note, spread=rho, groups=groups, subject_groups=subject_groups,
        subject_parts=data.subjects,
    )
