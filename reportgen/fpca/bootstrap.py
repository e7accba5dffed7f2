"""Bands corrected for the estimation of the population quantities, by resampling subjects.

A plug-in band treats the mean, the eigenfunctions, the eigenvalues and the error variance as
known. Goldsmith, Greven & Crainiceanu (2013, Biometrics 69:41-51, "corrected confidence
bands") resample subjects, refit the population quantities on each resample, recompute every
subject's conditional expectation and its variance under each refit, and combine the two by
the law of total variance:

    Var(X_i(t) | Y_i) ~ mean_b Var_b(X_i(t) | Y_i) + var_b E_b(X_i(t) | Y_i)

Each replicate keeps the main fit's bandwidths and number of components. The band stays
centred on the main fit's trajectory.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .components import evaluate_at
from .design import Sample
from .scores import conditional_scores
from .smoothing import FloatArray


@dataclass(frozen=True)
class Replicate:
    """Population quantities refitted on one resample of subjects (all on the main grid)."""

    mean: FloatArray
    eigenfunctions: FloatArray
    eigenvalues: FloatArray
    error_variance: float
    truncation_variance: FloatArray


def total_variance(
    replicates: tuple[Replicate, ...], grid: FloatArray, sample: Sample
) -> FloatArray:
    """Corrected variance of each subject's trajectory on the grid, (n_subjects, n_grid)."""
    total = np.zeros((sample.n_subjects, grid.size))
    first = np.zeros_like(total)
    second = np.zeros_like(total)
    for rep in replicates:
        resid = sample.y - np.interp(sample.t, grid, rep.mean)
        phi = evaluate_at(sample.t, grid, rep.eigenfunctions)
        scores, cov = conditional_scores(sample.starts, resid, phi, rep.eigenvalues,
                                         rep.error_variance)
        fitted = rep.mean[None, :] + scores @ rep.eigenfunctions.T
        total += np.einsum("gk,nkl,gl->ng", rep.eigenfunctions, cov, rep.eigenfunctions)
        total += rep.truncation_variance[None, :]
        first += fitted
        second += fitted * fitted
    b = len(replicates)
    spread = np.maximum(second / b - (first / b) ** 2, 0.0) * b / max(b - 1, 1)
    out: FloatArray = total / b + spread
    return out

