"""The fit held against its readings, as one pass over the parts (``plan``).

Each reading's fitted value and standardized residual are computed where the part lives.
What comes back does not grow with the readings: per-subject sums of the residuals, a
density of all readings on fixed cells, and the readings of chosen subjects (a seeded
sample for the residual diagnostics and the few subjects a report shows).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from .arrays import FloatArray, IntArray
from .components import evaluate_at
from .plan import Part, Partitioned, PartResults, in_code_order
from .predictor import Predictor

# Cells of the density of all readings (time x value).
DENSITY_CELLS = (60, 40)


def standardized_residuals(
    t: FloatArray,
    y: FloatArray,
    rows: IntArray,
    scores: FloatArray,
    cov: FloatArray,
    model: Predictor,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Fitted values, residuals and standardized residuals of readings ``(t, y)`` whose
    subjects have ``scores[rows]`` and score error covariances ``cov[rows]``.

    Under the model, y - E[X(t) | y] at a reading has variance sigma^2 - phi(t)' Omega phi(t)
    (Omega: the subject's score prediction-error covariance; from Var(e) = sigma^4 Sigma^-1
    for e = sigma^2 Sigma^-1 r, standard Gaussian conditioning), plus the variance of the
    components K leaves out. Dividing by its square root makes 1 the expected spread: the
    in-sample residuals are shrunk by design, so sigma alone would understate them.
    """
    phi = evaluate_at(t, model.grid, model.eigenfunctions)
    fitted = np.interp(t, model.mean_time, model.mean_value) + np.einsum(
        "nk,nk->n", phi, scores[rows]
    )
    resid = y - fitted
    # phi' Omega phi term by term: never an (n_readings, K, K) copy of the covariances
    quad = np.zeros_like(t)
    k = model.n_components
    for a in range(k):
        for b in range(a, k):
            term = phi[:, a] * phi[:, b] * cov[rows, a, b]
            quad += term if a == b else 2.0 * term
    sigma2 = model.error_variance
    var = sigma2 - quad + np.interp(t, model.grid, model.truncation_variance)
    sd = np.sqrt(np.maximum(var, 1e-12 * sigma2))
    return fitted, resid, resid / sd


def cell_counts(
    x: FloatArray, y: FloatArray, edges: tuple[tuple[float, float, int], ...]
) -> IntArray:
    """Counts of the points (x, y) in equal cells: ``edges`` gives (low, high, cells) of
    each axis; points on or past the high end fall in the last cell."""
    index = np.zeros(x.size, dtype=np.intp)
    for values, (lo, hi, n) in zip((x, y), edges, strict=True):
        cell = np.clip(((values - lo) * (n / (hi - lo))).astype(np.intp), 0, n - 1)
        index = index * n + cell
    return np.bincount(index, minlength=edges[0][2] * edges[1][2]).reshape(edges[0][2], edges[1][2])


def axis(lo: float, hi: float, cells: int) -> tuple[float, float, int]:
    """(low, high, cells) of an axis over [lo, hi]; a single value gets a unit-wide axis."""
    return (lo, hi, cells) if hi > lo else (lo - 0.5, hi + 0.5, cells)


class Found(NamedTuple):
    """What the pass brings back of a part: the density of its readings, and the readings
    of the chosen subjects (``readings``: time, value, fitted, residual, standardized) with
    each one's reading count."""

    density: IntArray
    sizes: IntArray
    readings: tuple[FloatArray, ...]


class Checked(NamedTuple):
    """The pass's result on a part, kept there: per subject, the sums of its residuals and
    of its squared standardized residuals; and what comes back (``found``)."""

    sums: tuple[FloatArray, FloatArray]
    found: Found


def part_checks(
    part: Part,
    kept: tuple[FloatArray, FloatArray],
    rows: IntArray,
    model: Predictor,
    edges: tuple[tuple[float, float, int], ...],
) -> Checked:
    """The pass, over a part and its kept scores and covariances (``kept``): per subject of
    the part, the sums of its residuals and of its squared standardized residuals; the
    density of the part's readings; and the readings of its subjects at ``rows`` (time,
    value, fitted, residual, standardized) with their counts."""
    part = part.writable()
    s = part.sample
    scores, cov = kept
    fitted, resid, std = standardized_residuals(s.t, s.y, s.subject, scores, cov, model)
    n = s.n_subjects
    sums = np.bincount(s.subject, resid, n), np.bincount(s.subject, std * std, n)
    index, _, sizes = s.reading_index(rows)
    kept_readings = tuple(a[index] for a in (s.t, s.y, fitted, resid, std))
    return Checked(sums, Found(cell_counts(s.t, s.y, edges), sizes, kept_readings))


def checked_sums(checked: Checked) -> tuple[FloatArray, FloatArray]:
    return checked.sums


def checked_found(checked: Checked) -> Found:
    return checked.found


@dataclass(frozen=True)
class ReadingChecks:
    """What the caller holds of the readings after the pass.

    Attributes
    ----------
    sums : PartResults
        Per subject, the sum of its residuals and of its squared standardized residuals,
        kept where the pass computed them.
    density : ndarray of shape DENSITY_CELLS
        Readings per cell of (time, value) over ``time_axis`` x ``value_axis``.
    chosen : ndarray
        Codes of the subjects whose readings are kept (increasing).
    readings : dict of str to ndarray
        Their readings, subject by subject in code order: ``subject`` (code), ``time``,
        ``value``, ``fitted``, ``residual``, ``standardized``.
    """

    sums: PartResults
    density: IntArray
    time_axis: tuple[float, float, int]
    value_axis: tuple[float, float, int]
    chosen: IntArray
    readings: dict[str, np.ndarray]


def check_readings(
    data: Partitioned, scores: PartResults, model: Predictor, chosen: IntArray
) -> ReadingChecks:
    """One pass over ``data`` and its subjects' kept ``scores`` (scores and covariances):
    residual sums of every subject (kept with the parts), the density of all readings,
    and the readings of the subjects ``chosen`` (increasing codes)."""
    edges = (
        axis(data.t_min, data.t_max, DENSITY_CELLS[0]),
        axis(data.y_min, data.y_max, DENSITY_CELLS[1]),
    )
    rows = data.rows_in_parts(chosen)
    run = data.executor
    checked = run.keep(
        part_checks,
        data.parts,
        [(h, r) for h, r in zip(scores.handles, rows, strict=True)],
        (model, edges),
    )
    found = run.map(checked_found, checked)
    sums = PartResults(run, tuple(run.keep(checked_sums, checked)), data.subjects)
    density = sum((f.density for f in found), np.zeros(DENSITY_CELLS, dtype=np.intp))
    # the chosen subjects' readings, from the parts' order into code order
    owner = np.concatenate([codes[r] for codes, r in zip(data.subjects, rows, strict=True)])
    index, sizes = in_code_order(owner, np.concatenate([f.sizes for f in found]))
    kept = np.sort(owner)
    names = ("time", "value", "fitted", "residual", "standardized")
    readings = {
        name: np.concatenate([f.readings[k] for f in found])[index] for k, name in enumerate(names)
    }
    readings = {"subject": np.repeat(kept, sizes), **readings}
    return ReadingChecks(sums, density, *edges, kept, readings)


# --- passes over the kept per-subject results: what the report shows of every subject ---


def distances(scores: FloatArray, eigenvalues: FloatArray) -> FloatArray:
    """Squared Mahalanobis distance of each row of ``scores`` under N(0, diag(eigenvalues))."""
    return np.asarray(np.sum(scores**2 / eigenvalues, axis=1))


def _top(values: FloatArray, n: int) -> IntArray:
    """The rows of the ``n`` largest ``values`` (NaN lowest), ties at the n-th included:
    the caller orders them and cuts to ``n`` with every part's candidates in hand."""
    values = np.nan_to_num(values, nan=-np.inf)
    if values.size <= n:
        return np.arange(values.size, dtype=np.intp)
    cut = np.partition(values, values.size - n)[values.size - n]
    return np.flatnonzero(values >= cut).astype(np.intp)


class Farthest(NamedTuple):
    """How many of a part's subjects are beyond the cut, and the rows, squared distances
    and scores of its farthest ones."""

    n_beyond: int
    rows: IntArray
    distance2: FloatArray
    scores: FloatArray


def part_farthest(
    kept: tuple[FloatArray, FloatArray], eigenvalues: FloatArray, cut: float, n: int
) -> Farthest:
    """Pass over a part's kept scores: how many of its subjects are beyond ``cut``, and the
    rows, distances and scores of the ``n`` farthest of those."""
    scores = kept[0]
    d2 = distances(scores, eigenvalues)
    beyond = np.flatnonzero(d2 > cut)
    rows = beyond[_top(d2[beyond], n)]
    return Farthest(int(beyond.size), rows, d2[rows], scores[rows])


def residual_summary(
    sums: tuple[FloatArray, ...], n_obs: IntArray
) -> tuple[FloatArray, FloatArray]:
    """Each subject's mean residual and RMS standardized residual from its sums."""
    residual_sum, squared_sum = sums
    return residual_sum / n_obs, np.sqrt(squared_sum / n_obs)


class LargestRms(NamedTuple):
    """A part's subjects with the largest RMS standardized residual: rows, mean residuals,
    RMS standardized residuals."""

    rows: IntArray
    mean_residual: FloatArray
    rms: FloatArray


def part_largest_rms(kept: tuple[FloatArray, FloatArray], n_obs: IntArray, n: int) -> LargestRms:
    """Pass over a part's kept residual sums (``n_obs``: its subjects' reading counts): the
    rows, mean residuals and RMS standardized residuals of the ``n`` largest RMS."""
    mean, rms = residual_summary(kept, n_obs)
    rows = _top(rms, n)
    return LargestRms(rows, mean[rows], rms[rows])


def part_group_sums(
    kept: tuple[FloatArray, FloatArray], groups: IntArray, n_groups: int
) -> FloatArray:
    """Pass over a part's kept scores: the sum of each group's scores, (n_groups, K)."""
    scores = kept[0]
    return np.stack([scores[groups == k].sum(axis=0) for k in range(n_groups)])
