"""The fit held against its readings, as one pass over the parts (``plan``).

Each reading's fitted value and standardized residual are computed where the part lives.
What comes back does not grow with the readings: per-subject sums of the residuals, a
density of all readings on fixed cells, and the readings of chosen subjects (a seeded
sample for the residual diagnostics and the few subjects a report shows).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .components import evaluate_at
from .design import IntArray
from .plan import Part, Partitioned, in_code_order
from .predictor import Predictor
from .smoothing import FloatArray

# Cells of the density of all readings (time x value).
DENSITY_CELLS = (60, 40)


def standardized_residuals(t: FloatArray, y: FloatArray, rows: IntArray, scores: FloatArray,
                           cov: FloatArray, model: Predictor
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
    fitted = (np.interp(t, model.mean_time, model.mean_value)
              + np.einsum("nk,nk->n", phi, scores[rows]))
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


def cell_counts(x: FloatArray, y: FloatArray, edges: tuple[tuple[float, float, int], ...]
                ) -> IntArray:
    """Counts of the points (x, y) in equal cells: ``edges`` gives (low, high, cells) of
    each axis; points on or past the high end fall in the last cell."""
    index = np.zeros(x.size, dtype=np.intp)
    for values, (lo, hi, n) in zip((x, y), edges, strict=True):
        cell = np.clip(((values - lo) * (n / (hi - lo))).astype(np.intp), 0, n - 1)
        index = index * n + cell
    return np.bincount(index, minlength=edges[0][2] * edges[1][2]).reshape(
        edges[0][2], edges[1][2])


def axis(lo: float, hi: float, cells: int) -> tuple[float, float, int]:
    """(low, high, cells) of an axis over [lo, hi]; a single value gets a unit-wide axis."""
    return (lo, hi, cells) if hi > lo else (lo - 0.5, hi + 0.5, cells)


def part_checks(part: Part, scores: FloatArray, cov: FloatArray, rows: IntArray,
                model: Predictor, edges: tuple[tuple[float, float, int], ...]
                ) -> tuple[Any, ...]:
    """The pass: per subject of the part, the sums of its residuals and of its squared
    standardized residuals; the density of the part's readings; and the readings of its
    subjects at ``rows`` (time, value, fitted, residual, standardized) with their counts."""
    part = part.writable()
    s = part.sample
    fitted, resid, std = standardized_residuals(s.t, s.y, s.subject, scores, cov, model)
    n = s.n_subjects
    sums = np.bincount(s.subject, resid, n), np.bincount(s.subject, std * std, n)
    index, _, sizes = s.reading_index(rows)
    kept = tuple(a[index] for a in (s.t, s.y, fitted, resid, std))
    return sums, cell_counts(s.t, s.y, edges), sizes, kept


@dataclass(frozen=True)
class ReadingChecks:
    """What the caller holds of the readings after the pass.

    Attributes
    ----------
    n_obs, residual_sum, squared_standardized_sum : ndarray of shape (n_subjects,)
        Per subject, by code.
    density : ndarray of shape DENSITY_CELLS
        Readings per cell of (time, value) over ``time_axis`` x ``value_axis``.
    chosen : ndarray
        Codes of the subjects whose readings are kept (increasing).
    readings : dict of str to ndarray
        Their readings, subject by subject in code order: ``subject`` (code), ``time``,
        ``value``, ``fitted``, ``residual``, ``standardized``.
    """

    n_obs: IntArray
    residual_sum: FloatArray
    squared_standardized_sum: FloatArray
    density: IntArray
    time_axis: tuple[float, float, int]
    value_axis: tuple[float, float, int]
    chosen: IntArray
    readings: dict[str, np.ndarray]


class _Asks(Sequence[tuple[FloatArray, FloatArray, IntArray]]):
    """Each part's arguments, made when the executor takes them, so that the parts' copies
    of their subjects' scores need not all exist at once."""

    def __init__(self, subjects: tuple[IntArray, ...], scores: FloatArray, cov: FloatArray,
                 rows: list[IntArray]) -> None:
        self.subjects, self.scores, self.cov, self.rows = subjects, scores, cov, rows

    def __len__(self) -> int:
        return len(self.subjects)

    def __getitem__(self, i: int) -> tuple[FloatArray, FloatArray, IntArray]:  # type: ignore[override]
        codes = self.subjects[i]
        return self.scores[codes], self.cov[codes], self.rows[i]


def check_readings(data: Partitioned, scores: FloatArray, cov: FloatArray, model: Predictor,
                   chosen: IntArray) -> ReadingChecks:
    """One pass over ``data``: residual sums of every subject (``scores``, ``cov`` by
    code), the density of all readings, and the readings of the subjects ``chosen``
    (increasing codes)."""
    edges = (axis(data.t_min, data.t_max, DENSITY_CELLS[0]),
             axis(data.y_min, data.y_max, DENSITY_CELLS[1]))
    rows = data.rows_of(chosen)
    asks = _Asks(data.subjects, scores, cov, rows)
    found = data.executor.map(part_checks, data.parts, asks, (model, edges))
    n = data.n_subjects
    residual_sum, squared_sum = np.empty(n), np.empty(n)
    for codes, ((a, b), *_) in zip(data.subjects, found, strict=True):
        residual_sum[codes] = a
        squared_sum[codes] = b
    density = sum((f[1] for f in found), np.zeros(DENSITY_CELLS, dtype=np.intp))
    # the chosen subjects' readings, from the parts' order into code order
    owner = np.concatenate([codes[r] for codes, r in zip(data.subjects, rows, strict=True)])
    index, sizes = in_code_order(owner, np.concatenate([f[2] for f in found]))
    kept = np.sort(owner)
    names = ("time", "value", "fitted", "residual", "standardized")
    readings = {name: np.concatenate([f[3][k] for f in found])[index]
                for k, name in enumerate(names)}
    readings = {"subject": np.repeat(kept, sizes), **readings}
    return ReadingChecks(data.n_obs, residual_sum, squared_sum, density, *edges, kept,
                         readings)
