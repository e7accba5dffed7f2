"""The tables of one row per subject, as frames: each subject's scores with its outlier
distance, its residual summary, and (on request) its trajectory on the grid. Made for all
subjects at once (single CSV tables) or part by part by the engine's tasks (Parquet parts,
``report.subject_parts``): one function, so both forms hold the same numbers."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

from ..fpca.diagnostics import distances, residual_summary
from ..fpca.plan import PartResults
from ..fpca.result import FPCAFit, Labels
from .analyse import AnalysisResult


def subject_table_names(result: AnalysisResult) -> tuple[str, ...]:
    """The tables whose rows belong to one subject each (in parts with subjects.tables:
    parquet), in name order."""
    extra = ("all_trajectories",) if result.spec.subjects.all_trajectories else ()
    return (*extra, "residuals_by_subject", "scores")


def every_subject_frames(result: AnalysisResult) -> dict[str, pd.DataFrame]:
    """The tables of every subject as single tables (``subjects.tables: csv``): their
    scores, covariances and residual sums are gathered from the parts."""
    fit = result.fit
    scores, cov = fit.kept_scores.every()
    return subject_frames(
        fit,
        fit.subjects,
        subject_groups(result, None),
        fit.n_obs,
        scores,
        cov,
        result.residual_sums.every(),
        result.subjects_view.cut,
        result.spec.subjects.all_trajectories,
    )


def subject_frames(
    fit: FPCAFit,
    ids: Labels,
    groups: np.ndarray | None,
    n_obs: np.ndarray,
    scores: np.ndarray,
    cov: np.ndarray,
    sums: tuple[np.ndarray, ...],
    cut: float,
    curves: bool,
) -> dict[str, pd.DataFrame]:
    """The tables of the subjects ``ids`` (with their ``groups``, reading counts, scores,
    score covariances and residual sums): scores (with the outlier distances: flagged
    beyond ``cut``), residuals_by_subject, and all_trajectories when ``curves``. ``fit``
    gives the population parts (eigenvalues, eigenfunctions, ...) only."""
    table = pd.DataFrame({"subject": pd.Index(ids).astype(str)})
    if groups is not None:
        table["group"] = groups
    table["n_obs"] = n_obs
    for k in range(fit.n_components):
        table[f"score_{k + 1}"] = scores[:, k]
    d2 = distances(scores, fit.eigenvalues)
    table["distance2"] = d2
    table["flagged"] = d2 > cut
    mean, rms = residual_summary(sums, n_obs)
    residuals = pd.DataFrame(
        {"subject": ids, "n_obs": n_obs, "mean_residual": mean, "rms_standardized": rms}
    )
    tables = {"scores": table, "residuals_by_subject": residuals}
    if curves:
        held = replace(fit, subjects=ids, kept_scores=PartResults.of_arrays(scores, cov))
        tables["all_trajectories"] = _trajectory_table(held, groups)
    return tables


def subject_groups(result: AnalysisResult, codes: np.ndarray | None) -> np.ndarray | None:
    """The groups of the subjects ``codes`` (None: all); None without groups. (A part's
    groups are picked one by one: the tuple of every subject's group is not made an array
    again for each part.)"""
    if result.groups is None:
        return None
    every = result.subject_groups
    picked = every if codes is None else [every[i] for i in codes.tolist()]
    return np.array(picked, dtype=object)


def shown_trajectories(result: AnalysisResult) -> pd.DataFrame:
    """The shown subjects' trajectories, with their groups when there are groups."""
    trajectories = result.trajectories.copy()
    if result.groups is not None:
        shown = result.fit.rows_of_ids(trajectories.subject.astype(str).tolist())
        trajectories.insert(1, "group", subject_groups(result, shown))
    return trajectories


def _trajectory_table(fit: FPCAFit, groups: np.ndarray | None) -> pd.DataFrame:
    """all_trajectories of the fit's subjects, with their ``groups``."""
    table = fit.plugin_trajectories()
    table["subject"] = pd.Index(table["subject"]).astype(str)
    if groups is not None:
        table.insert(1, "group", np.repeat(groups, fit.grid.size))
    return table
