"""Bands corrected for the estimation of the population quantities, by resampling subjects.

A plug-in band treats the mean, the eigenfunctions, the eigenvalues and the error variance as
known. Goldsmith, Greven & Crainiceanu (2013, Biometrics 69:41-51, "corrected confidence
bands") resample subjects, refit the population quantities on each resample, recompute every
subject's conditional expectation and its variance under each refit, and combine the two by
the law of total variance:

    Var(X_i(t) | Y_i) ~ mean_b Var_b(X_i(t) | Y_i) + var_b E_b(X_i(t) | Y_i)

Each resample's refit is a :class:`~reportgen.fpca.predictor.Predictor` of its own (its
mean on the main grid), keeping the main fit's bandwidths and number of components. The
band stays centred on the main fit's trajectory.
"""

from __future__ import annotations

import numpy as np

from .arrays import FloatArray
from .design import Sample
from .predictor import Predictor


def corrected_variance(replicates: tuple[Predictor, ...], sample: Sample) -> FloatArray:
    """Corrected variance of each subject's trajectory on the grid, (n_subjects, n_grid)."""
    grid = replicates[0].grid
    total = np.zeros((sample.n_subjects, grid.size))
    first = np.zeros_like(total)
    second = np.zeros_like(total)
    for rep in replicates:
        scores, cov = rep.scores(sample)
        fitted = rep.fitted(scores)
        phi = rep.eigenfunctions
        total += np.einsum("gk,nkl,gl->ng", phi, cov, phi)
        total += rep.truncation_variance[None, :]
        first += fitted
        second += fitted * fitted
    b = len(replicates)
    spread = np.maximum(second / b - (first / b) ** 2, 0.0) * b / max(b - 1, 1)
    out: FloatArray = total / b + spread
    return out
