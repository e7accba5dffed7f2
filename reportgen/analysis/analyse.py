"""Fit, sensitivity runs, diagnostics and caveats -> one frozen :class:`AnalysisResult`.

No files and no printing: the run writes, the report reads.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from ..errors import EstimationError
from ..fpca._kernels import compiled_on_disk
from ..fpca.fit import fit_parts
from ..fpca.groups import GroupComparison, compare_groups
from ..fpca.plan import Partitioned, PartResults
from ..fpca.result import FPCAFit, Labels
from ..inputs.loader import Dataset
from ..inputs.spec import Spec
from .adequacy import Adequacy, adequacy_caveats, model_checks
from .caveats import caveats, group_caveats, sensitivity_caveats
from .sensitivity import (
    MeanMove,
    SensitivityRun,
    mean_moves,
    run_sensitivity,
    sensitivity_factors,
    stability,
)
from .views import (
    ReadingView,
    SubjectView,
    reading_view,
    spread_trend,
    subject_sample,
    subject_view,
)

Progress = Callable[[str], None]


@dataclass(frozen=True)
class AnalysisResult:
    spec: Spec
    dataset: Dataset
    fit: FPCAFit
    sensitivity: tuple[SensitivityRun, ...]
    readings: ReadingView  # what the report holds of the readings
    subjects_view: SubjectView  # what the report holds of every subject's results
    residual_sums: PartResults  # per subject: sums of the residuals and squared standardized ones
    shown_subjects: tuple[str, ...]
    trajectories: pd.DataFrame  # of the shown subjects, in the fit's order (FPCAFit.trajectories)
    caveats: tuple[str, ...]
    stable: tuple[bool | None, ...]  # per component; None: no setting could be computed
    factors_note: str  # how the sensitivity factors were chosen
    spread: float = 0.0  # spread_trend(readings.residuals), computed once
    adequacy: Adequacy | None = None  # the model's checks on the residual sample
    mean_moves: tuple[MeanMove, ...] = ()  # each setting's mean against the main band
    groups: GroupComparison | None = None  # when the spec names a group column
    subject_groups: tuple[str, ...] = ()  # the group of each of fit.subjects
    # the codes (rows of fit.subjects, increasing) of the subjects of each data part, in
    # the parts' order (one part per data file): how tables of subjects are split into parts
    subject_parts: tuple[np.ndarray, ...] = ()

    def without_subjects(self) -> AnalysisResult:
        """The analysis without its per-reading and per-subject parts: what the figures of
        the fit's summaries need, at a size that does not grow with the data, and nothing
        of the engine's (it can be sent to another process)."""
        runs = tuple(
            replace(r, fit=r.fit.without_subjects()) if r.fit is not None else r
            for r in self.sensitivity
        )
        return replace(
            self,
            dataset=replace(self.dataset, readings=None),
            fit=self.fit.without_subjects(),
            sensitivity=runs,
            readings=self.readings.empty(),
            subjects_view=self.subjects_view.empty(),
            residual_sums=PartResults.of_arrays(np.zeros(0), np.zeros(0)),
            subject_parts=(),
        )

    @property
    def time_label(self) -> str:
        """The time axis's name: the spec's time_label, the file's label, the column."""
        d = self.spec.data
        return str(d.time_label or self.dataset.labels.get("time") or d.time)

    @property
    def value_label(self) -> str:
        """The measured value's name: the spec's value_label, the file's label, the column."""
        d = self.spec.data
        return str(d.value_label or self.dataset.labels.get("value") or d.value)


def _shown(fit: FPCAFit, spec: Spec) -> tuple[str, ...]:
    chosen = list(spec.subjects.show)
    found = fit.rows_of_ids(chosen)
    missing = [s for s, row in zip(chosen, found, strict=True) if row < 0]
    if missing:
        raise EstimationError(f"subjects.show names subjects not in the data: {missing[:5]!r}")
    count = spec.subjects.count
    if len(chosen) < count:
        # Deterministic spread: subjects ordered by readings then id, taken at even steps.
        order = _by_readings_then_id(fit.n_obs, fit.subjects)
        picks = np.unique(np.linspace(0, len(order) - 1, count - len(chosen)).round().astype(int))
        ids = [str(fit.subjects[order[i]]) for i in picks]
        chosen += [s for s in ids if s not in chosen]
    return tuple(chosen)


def _by_readings_then_id(n_obs: np.ndarray, subjects: Labels) -> np.ndarray:
    """Row order by (readings, id as text); the ids usually come sorted already (the fit
    sorts its labels), and then it is one stable sort of the counts, not a sort of a
    million Python tuples."""
    ids = pd.Index(subjects).astype(str)
    if _increasing(ids):
        return np.argsort(n_obs, kind="stable")
    return np.lexsort((ids.argsort(kind="stable").argsort(kind="stable"), n_obs))


def _increasing(ids: pd.Index) -> bool:
    """Whether text ids are in increasing order: for Arrow text, one comparison of
    neighbours in Arrow (pandas' is_monotonic_increasing makes a Python string of every
    id)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    try:
        text = pa.array(ids)
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        return bool(ids.is_monotonic_increasing)
    if text.null_count or len(text) < 2:
        return bool(ids.is_monotonic_increasing)
    return not pc.any(pc.less(text[1:], text[:-1])).as_py()


def analyse(
    spec: Spec, ds: Dataset, progress: Progress = lambda _: None, lap: Progress = lambda _: None
) -> AnalysisResult:
    """The main fit, the sensitivity fits, diagnostics and caveats.

    ``ds`` must hold its readings (``load_dataset(..., for_fit=True)``); the fits' passes
    run where they were placed (``ds.readings.executor``: this process, or a cluster; see
    ``analysis.engine``). ``progress`` receives a message before each long step; ``lap`` the
    name of each step just finished (for timing).
    """
    if ds.readings is None:
        raise ValueError("the dataset holds no readings: load it with for_fit=True")
    if not compiled_on_disk():
        progress(
            "compiling the numerical kernels (once, about half a minute on 2 cores; "
            "later runs load them from the cache)"
        )
    progress("fit")
    held = ds.readings
    data = Partitioned.of(held.executor, held.parts)
    # the ids stay Arrow text (as Python strings they would take about twice the memory)
    fit = fit_parts(data, held.ids, spec.options)  # the shown subjects' readings come later
    lap("fit")
    factors, factors_note, fallback = sensitivity_factors(spec, fit)
    runs, raised = run_sensitivity(data, held.ids, fit, factors, progress, fallback)
    factors_note += raised
    moves = mean_moves(runs, fit)
    lap("sensitivity")
    stable = stability(runs, fit.n_components, spec.sensitivity.similarity_threshold)
    drawn, drawn_scores = subject_sample(fit)
    groups: GroupComparison | None = None
    subject_groups: tuple[str, ...] = ()
    if spec.data.group:
        progress("groups")
        assert held.groups is not None  # by code: fit.subjects' order
        subject_groups = tuple(str(g) for g in held.groups)
        groups = compare_groups(data, fit, np.asarray(subject_groups), tested=(drawn, drawn_scores))
        lap("groups")
    shown = _shown(fit, spec)
    progress("diagnostics")
    view, sums, trajectories = reading_view(data, fit, np.sort(fit.rows_of_ids(shown)))
    sampled = view.residuals
    rho = spread_trend(sampled)
    adequacy = model_checks(fit, sampled, view.residual_codes)
    found = (
        caveats(spec, ds, fit, runs, stable, len(sampled), rho)
        + sensitivity_caveats(runs, moves, spec.units()["time"])
        + adequacy_caveats(adequacy, spec.units()["time"])
        + group_caveats(groups, fit)
    )
    subjects = subject_view(fit, sums, spec.subjects.outlier_quantile, drawn, drawn_scores)
    lap("diagnostics")
    return AnalysisResult(
        spec=spec,
        dataset=replace(ds, readings=None),
        fit=fit,
        sensitivity=tuple(runs),
        readings=view,
        subjects_view=subjects,
        residual_sums=sums,
        trajectories=trajectories,
        shown_subjects=shown,
        caveats=tuple(found),
        stable=tuple(stable),
        factors_note=factors_note,
        mean_moves=tuple(moves),
        spread=rho,
        adequacy=adequacy,
        groups=groups,
        subject_groups=subject_groups,
        subject_parts=data.subjects,
    )
