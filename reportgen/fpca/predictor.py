"""Scores and trajectories of new subjects from the population parts of a fit.

A :class:`Predictor` holds what conditional expectation needs (Yao, Müller & Wang 2005,
eq. 4-5): the mean (on the fine grid of the mean smoother), the retained eigenfunctions,
eigenvalues and the error variance, plus what the bands need (the variance the retained
components leave out, the level, the degrees of freedom of the simultaneous band). It is
written into every run as ``tables/model.csv`` and read back by ``reportgen predict``.

Bands are the plug-in ones: the population parts are taken as known (the corrected bands
need the resampled fits, which a run does not store).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.special import chdtri, ndtri

from ..errors import EstimationError
from .components import evaluate_at
from .design import IntArray, Sample
from .scores import conditional_scores
from .smoothing import FloatArray

SCALARS = ("error_variance", "band_level", "simultaneous_dof")


def band_multiplier(level: float, kind: str, dof: int) -> float:
    """Multiplier of the standard error for a two-sided band at ``level``.

    ``"pointwise"``: the normal quantile. ``"simultaneous"``: sqrt of the chi-square
    quantile with ``dof`` degrees of freedom, as many as components enter the band's
    variance. The trajectory's error then lies in their span, and the Cauchy-Schwarz
    inequality turns the chi-square region of the scores into a band that holds at every
    time at once (Yao, Müller & Wang 2005, sec. 3; Scheffé's method).
    """
    if kind == "pointwise":
        return float(ndtri(0.5 + level / 2.0))
    return float(np.sqrt(chdtri(dof, 1.0 - level)))


@dataclass(frozen=True)
class Predictor:
    grid: FloatArray
    mean_time: FloatArray
    mean_value: FloatArray
    eigenfunctions: FloatArray  # (n_grid, K)
    eigenvalues: FloatArray
    error_variance: float
    truncation_variance: FloatArray
    band_level: float
    simultaneous_dof: int

    @property
    def domain(self) -> tuple[float, float]:
        return float(self.grid[0]), float(self.grid[-1])

    @property
    def n_components(self) -> int:
        return int(self.eigenvalues.size)

    def to_frame(self) -> pd.DataFrame:
        """Long table: quantity, component (0: none), time (nan: none), value."""
        k = self.n_components
        parts = [
            ("mean", 0, self.mean_time, self.mean_value),
            *(("eigenfunction", j + 1, self.grid, self.eigenfunctions[:, j]) for j in range(k)),
            ("truncation_variance", 0, self.grid, self.truncation_variance),
            ("eigenvalue", np.arange(1, k + 1), np.full(k, np.nan), self.eigenvalues),
            *((name, 0, np.full(1, np.nan), np.array([float(getattr(self, name))]))
              for name in SCALARS),
        ]
        frames = [pd.DataFrame({"quantity": q, "component": c, "time": t, "value": v})
                  for q, c, t, v in parts]
        return pd.concat(frames, ignore_index=True)

    @classmethod
    def from_frame(cls, frame: pd.DataFrame) -> Predictor:
        """Read :meth:`to_frame`'s table back; raises EstimationError when it is damaged."""
        try:
            by = {q: part for q, part in frame.groupby("quantity", sort=False)}
            ef = by["eigenfunction"].sort_values(["component", "time"], kind="stable")
            k = int(ef.component.max())
            grid = ef[ef.component == 1].time.to_numpy(dtype=np.float64)
            phi = ef.value.to_numpy(dtype=np.float64).reshape(k, grid.size).T
            mean = by["mean"].sort_values("time", kind="stable")
            ev = by["eigenvalue"].sort_values("component", kind="stable")
            trunc = by["truncation_variance"].sort_values("time", kind="stable")
            scalar = {name: float(by[name].value.iloc[0]) for name in SCALARS}
            out = cls(grid, mean.time.to_numpy(dtype=np.float64),
                      mean.value.to_numpy(dtype=np.float64), np.ascontiguousarray(phi),
                      ev.value.to_numpy(dtype=np.float64), scalar["error_variance"],
                      trunc.value.to_numpy(dtype=np.float64), scalar["band_level"],
                      int(scalar["simultaneous_dof"]))
        except (KeyError, ValueError, AttributeError) as e:
            raise EstimationError(f"the stored model table is incomplete or damaged ({e})"
                                  ) from e
        if out.eigenvalues.size != k or out.truncation_variance.size != grid.size or \
                not np.all(np.isfinite(out.eigenfunctions)):
            raise EstimationError("the stored model table is inconsistent (sizes differ)")
        return out

    def band_multiplier(self, kind: str = "pointwise") -> float:
        """:func:`band_multiplier` at the stored level and degrees of freedom."""
        return band_multiplier(self.band_level, kind, self.simultaneous_dof)

    def scores(self, sample: Sample) -> tuple[FloatArray, FloatArray]:
        """BLUP scores and their prediction-error covariance for the sample's subjects."""
        resid = sample.y - np.interp(sample.t, self.mean_time, self.mean_value)
        phi = evaluate_at(sample.t, self.grid, self.eigenfunctions)
        return conditional_scores(sample.starts, resid, phi, self.eigenvalues,
                                  self.error_variance)

    def predict(self, subject: IntArray, t: FloatArray, y: FloatArray, labels: np.ndarray
                ) -> pd.DataFrame:
        """One row per subject and grid time: subject, n_obs, score_1..K, time, fitted and
        the pointwise and simultaneous bands at the stored level."""
        lo, hi = self.domain
        outside = np.flatnonzero((t < lo) | (t > hi))
        if outside.size:
            raise EstimationError(
                f"{outside.size} readings lie outside the run's time domain [{lo:g}, {hi:g}] "
                f"(first: subject {labels[subject[outside[0]]]}, time {t[outside[0]]:g}); "
                "the fit says nothing there: leave them out")
        sample = Sample.from_arrays(subject, t, y)
        scores, cov = self.scores(sample)
        phi = self.eigenfunctions
        fitted = self.mean_at_grid()[None, :] + scores @ phi.T
        var = np.einsum("gk,nkl,gl->ng", phi, cov, phi) + self.truncation_variance[None, :]
        sd = np.sqrt(np.maximum(var, 0.0))
        zp, zs = self.band_multiplier(), self.band_multiplier("simultaneous")
        n, g = scores.shape[0], self.grid.size
        out = pd.DataFrame({"subject": np.repeat(labels, g),
                            "n_obs": np.repeat(sample.n_obs, g)})
        for j in range(self.n_components):
            out[f"score_{j + 1}"] = np.repeat(scores[:, j], g)
        out["time"] = np.tile(self.grid, n)
        out["fitted"] = fitted.ravel()
        out["lower"] = (fitted - zp * sd).ravel()
        out["upper"] = (fitted + zp * sd).ravel()
        out["lower_simultaneous"] = (fitted - zs * sd).ravel()
        out["upper_simultaneous"] = (fitted + zs * sd).ravel()
        return out

    def mean_at_grid(self) -> FloatArray:
        return np.interp(self.grid, self.mean_time, self.mean_value)
