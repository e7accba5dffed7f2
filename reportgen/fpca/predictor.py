"""The one routine that turns readings into scores, curves and bands: :class:`Predictor`.

A predictor holds what conditional expectation needs (Yao, Müller & Wang 2005, eq. 4-5):
the mean (on the fine grid of the mean smoother), the retained eigenfunctions,
eigenvalues and the error variance, plus what the bands need (the variance the retained
components leave out, the level, the degrees of freedom of the simultaneous band). Every
caller goes through it: a fit's trajectories (``FPCAFit`` holds its predictor), prediction
for new subjects in memory and from a stored run (``tables/model.csv``, read back by
``reportgen predict``), the residual diagnostics, and each resample of a corrected band
(a replicate is a predictor of its own; :func:`corrected_variance`).

The fit's passes over the data (``plan``) compute the same residuals with the compiled
twin of :meth:`Predictor.mean_at` (``_kernels.interpolate_columns``, the same linear
interpolation written as ``(1 - f) a + f b``; the two agree to about 1e-13 relative).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd
from scipy.special import chdtri, ndtri

from ..errors import EstimationError
from .arrays import FloatArray
from .components import evaluate_at
from .design import Sample
from .scores import conditional_scores

SCALARS = ("error_variance", "band_level", "simultaneous_dof")
BandKind = Literal["pointwise", "simultaneous"]


def band_multiplier(level: float, kind: BandKind, dof: int) -> float:
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
    """The population parts of a fit that predict a subject's curve from its readings.

    Attributes
    ----------
    grid : ndarray of shape (n_grid,)
    mean_time, mean_value : ndarray of shape (n_mean,)
        The mean on the fine grid of its smoother (a resample's: on ``grid``).
    eigenfunctions : ndarray of shape (n_grid, K)
    eigenvalues : ndarray of shape (K,)
    error_variance : float
    truncation_variance : ndarray of shape (n_grid,)
        The variance of the refined components that K leaves out (added to every band).
    band_level : float
    simultaneous_dof : int
        Components entering a band's variance (degrees of freedom of the simultaneous one).
    """

    grid: FloatArray
    mean_time: FloatArray
    mean_value: FloatArray
    eigenfunctions: FloatArray
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

    # --- the population curves at any time ----------------------------------------------

    def mean_at(self, t: FloatArray) -> FloatArray:
        """The mean at times ``t``, interpolated linearly from its fine grid."""
        return np.interp(np.asarray(t, dtype=np.float64), self.mean_time, self.mean_value)

    def mean_on_grid(self) -> FloatArray:
        return self.mean_at(self.grid)

    def eigenfunctions_at(self, t: FloatArray) -> FloatArray:
        """The eigenfunctions at times ``t`` (linear interpolation), shape (n, K)."""
        return evaluate_at(np.asarray(t, dtype=np.float64), self.grid, self.eigenfunctions)

    def band_multiplier(self, kind: BandKind = "pointwise", level: float | None = None) -> float:
        """:func:`band_multiplier` at ``level`` (default: the stored one)."""
        return band_multiplier(
            self.band_level if level is None else level, kind, self.simultaneous_dof
        )

    # --- subjects ---------------------------------------------------------------------------

    def scores(self, sample: Sample) -> tuple[FloatArray, FloatArray]:
        """BLUP scores and their prediction-error covariance for the sample's subjects,
        shapes (n, K) and (n, K, K)."""
        resid = sample.y - self.mean_at(sample.t)
        return conditional_scores(
            sample.starts,
            resid,
            self.eigenfunctions_at(sample.t),
            self.eigenvalues,
            self.error_variance,
        )

    def fitted(self, scores: FloatArray) -> FloatArray:
        """Each subject's curve on the grid, (n, n_grid)."""
        out: FloatArray = self.mean_on_grid()[None, :] + scores @ self.eigenfunctions.T
        return out

    def curve_variance(self, cov: FloatArray) -> FloatArray:
        """The plug-in variance of each curve on the grid, (n, n_grid): the scores'
        prediction error along the eigenfunctions, plus what K components leave out."""
        phi = self.eigenfunctions
        out: FloatArray = (
            np.einsum("gk,nkl,gl->ng", phi, cov, phi) + self.truncation_variance[None, :]
        )
        return out

    def trajectories(
        self,
        labels: Sequence[object] | np.ndarray | pd.Index,
        scores: FloatArray,
        cov: FloatArray,
        level: float | None = None,
        variance: FloatArray | None = None,
    ) -> pd.DataFrame:
        """Curves on the grid and their bands, one row per subject and grid time: subject,
        time, fitted, lower, upper (pointwise), lower_simultaneous, upper_simultaneous.

        ``variance``: the curves' variance when it is not the plug-in one (a corrected
        band's, :func:`corrected_variance`).
        """
        fitted = self.fitted(scores)
        var = self.curve_variance(cov) if variance is None else variance
        sd = np.sqrt(np.maximum(var, 0.0))
        half = self.band_multiplier("pointwise", level) * sd
        wide = self.band_multiplier("simultaneous", level) * sd
        labels = np.asarray(labels) if not isinstance(labels, pd.Index) else labels
        return pd.DataFrame(
            {
                "subject": np.repeat(labels, self.grid.size),
                "time": np.tile(self.grid, len(labels)),
                "fitted": fitted.ravel(),
                "lower": (fitted - half).ravel(),
                "upper": (fitted + half).ravel(),
                "lower_simultaneous": (fitted - wide).ravel(),
                "upper_simultaneous": (fitted + wide).ravel(),
            }
        )

    def predict(
        self,
        sample: Sample,
        labels: np.ndarray,
        replicates: Sequence[Predictor] = (),
        level: float | None = None,
    ) -> pd.DataFrame:
        """Scores and curves of the sample's subjects (coded 0 .. n - 1; ``labels`` their
        ids): subject, n_obs, score_1..K, then :meth:`trajectories`' columns. With
        ``replicates`` (a corrected band's resamples) the bands are corrected ones.
        Readings outside the grid's domain are refused (the fit says nothing there)."""
        lo, hi = self.domain
        outside = np.flatnonzero((sample.t < lo) | (sample.t > hi))
        if outside.size:
            raise EstimationError(
                f"{outside.size} readings lie outside the run's time domain [{lo:g}, {hi:g}] "
                f"(first: subject {labels[sample.subject[outside[0]]]}, time "
                f"{sample.t[outside[0]]:g}); the fit says nothing there: leave them out"
            )
        scores, cov = self.scores(sample)
        variance = corrected_variance(tuple(replicates), sample) if replicates else None
        out = self.trajectories(labels, scores, cov, level, variance)
        g = self.grid.size
        out.insert(1, "n_obs", np.repeat(sample.n_obs, g))
        for j in range(self.n_components):
            out.insert(2 + j, f"score_{j + 1}", np.repeat(scores[:, j], g))
        return out

    # --- stored in a run as tables/model.csv -------------------------------------------------

    def to_frame(self) -> pd.DataFrame:
        """Long table: quantity, component (0: none), time (nan: none), value."""
        k = self.n_components
        parts = [
            ("mean", 0, self.mean_time, self.mean_value),
            *(("eigenfunction", j + 1, self.grid, self.eigenfunctions[:, j]) for j in range(k)),
            ("truncation_variance", 0, self.grid, self.truncation_variance),
            ("eigenvalue", np.arange(1, k + 1), np.full(k, np.nan), self.eigenvalues),
            *(
                (name, 0, np.full(1, np.nan), np.array([float(getattr(self, name))]))
                for name in SCALARS
            ),
        ]
        frames = [
            pd.DataFrame({"quantity": q, "component": c, "time": t, "value": v})
            for q, c, t, v in parts
        ]
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
            out = cls(
                grid,
                mean.time.to_numpy(dtype=np.float64),
                mean.value.to_numpy(dtype=np.float64),
                np.ascontiguousarray(phi),
                ev.value.to_numpy(dtype=np.float64),
                scalar["error_variance"],
                trunc.value.to_numpy(dtype=np.float64),
                scalar["band_level"],
                int(scalar["simultaneous_dof"]),
            )
        except (KeyError, ValueError, AttributeError) as e:
            raise EstimationError(f"the stored model table is incomplete or damaged ({e})") from e
        if (
            out.eigenvalues.size != k
            or out.truncation_variance.size != grid.size
            or not np.all(np.isfinite(out.eigenfunctions))
        ):
            raise EstimationError("the stored model table is inconsistent (sizes differ)")
        return out


def corrected_variance(replicates: tuple[Predictor, ...], sample: Sample) -> FloatArray:
    """Corrected variance of each subject's trajectory on the grid, (n_subjects, n_grid).

    A plug-in band treats the mean, the eigenfunctions, the eigenvalues and the error
    variance as known. Goldsmith, Greven & Crainiceanu (2013, Biometrics 69:41-51,
    "corrected confidence bands") resample subjects, refit the population quantities on
    each resample, recompute every subject's conditional expectation and its variance under
    each refit, and combine the two by the law of total variance:

        Var(X_i(t) | Y_i) ~ mean_b Var_b(X_i(t) | Y_i) + var_b E_b(X_i(t) | Y_i)

    Each resample's refit is a :class:`Predictor` of its own (its mean on the main grid),
    keeping the main fit's bandwidths and number of components (``fit``). The band stays
    centred on the main fit's trajectory.
    """
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
