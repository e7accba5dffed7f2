"""The one routine that turns readings into scores, curves and bands: :class:`Predictor`.

A predictor holds what conditional expectation needs (Yao, Müller & Wang 2005, eq. 4-5):
the mean (on the fine grid of the mean smoother), the retained eigenfunctions,
eigenvalues and the error variance, plus what the bands need (the variance the retained
components leave out, the level, the degrees of freedom of the simultaneous band). Every
caller goes through it: a fit's trajectories (``FPCAFit`` holds its predictor), prediction
for new subjects in memory and from a stored run (``tables/model.csv``, read back by
``reportgen predict``), the residual diagnostics, and each resample of a corrected band
(a replicate is a predictor of its own; :func:`corrected_bands`).

The fit's passes over the data (``plan``) compute the same residuals with the compiled
twin of :meth:`Predictor.mean_at` (``_kernels.interpolate_columns``, the same linear
interpolation written as ``(1 - f) a + f b``; the two agree to about 1e-13 relative).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal, NamedTuple

import numpy as np
import pandas as pd
from scipy.special import chdtri, ndtri

from ..errors import EstimationError
from .arrays import FloatArray
from .components import evaluate_at
from .design import Sample
from .scores import conditional_scores

SCALARS = ("error_variance", "band_level", "simultaneous_dof")
BAND_COLUMNS = (
    "lower",
    "upper",
    "lower_simultaneous",
    "upper_simultaneous",
    "lower_new_reading",
    "upper_new_reading",
)


def without_bands(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` (trajectories or predictions) with every band column emptied: what a fit
    whose corrected band is unavailable shows, rather than a band drawn too thin."""
    frame.loc[:, list(BAND_COLUMNS)] = np.nan
    return frame


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
    supported : ndarray of shape (n_grid,) or None
        1 where at least ``fit.MIN_SUPPORT`` subjects have a reading within the mean's bandwidth
        and the time lies within the readings' range,
        0 elsewhere: no band is drawn at the unsupported times (None: every time supported).
    truncation_modes : ndarray of shape (n_grid, m) or None
        The left-out components themselves, each eigenfunction times the root of its
        eigenvalue (``truncation_variance`` is the sum of their squares): the simultaneous
        band draws them with their shapes. None (a run stored before they were kept): one
        smooth mode along sqrt(truncation_variance) stands for them.
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
    supported: FloatArray | None = None
    truncation_modes: FloatArray | None = None

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
        simultaneous: FloatArray | None = None,
    ) -> pd.DataFrame:
        """Curves on the grid and their bands, one row per subject and grid time: subject,
        time, fitted, lower, upper (pointwise), lower_simultaneous, upper_simultaneous
        (the whole curve), lower_new_reading, upper_new_reading (pointwise, for a new
        reading at that time: the curve's variance plus the error variance).

        ``variance``: the curves' variance when it is not the plug-in one (a corrected
        band's, :func:`corrected_bands`). ``simultaneous``: each subject's simultaneous
        multiplier (:func:`sup_multipliers`); by default the plug-in one from the scores'
        covariance.
        """
        fitted = self.fitted(scores)
        var = self.curve_variance(cov) if variance is None else variance
        sd = np.sqrt(np.maximum(var, 0.0))
        z = self.band_multiplier("pointwise", level)
        if simultaneous is None:
            simultaneous = self.plugin_sup_multipliers(cov, sd, level)
        half = z * sd
        wide = simultaneous[:, None] * sd
        reading = z * np.sqrt(np.maximum(var, 0.0) + self.error_variance)
        if self.supported is not None:  # no band where too few subjects support the mean
            gap = np.where(self.supported > 0, 0.0, np.nan)[None, :]
            half, wide, reading = half + gap, wide + gap, reading + gap
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
                "lower_new_reading": (fitted - reading).ravel(),
                "upper_new_reading": (fitted + reading).ravel(),
            }
        )

    def left_out_modes(self) -> FloatArray:
        """The left-out components as modes on the grid, (n_grid, m): ``truncation_modes``,
        or one smooth mode along sqrt(truncation_variance) when they were not kept."""
        if self.truncation_modes is not None:
            return self.truncation_modes
        root = np.sqrt(np.maximum(self.truncation_variance, 0.0))
        # none left out writes no mode rows: read back as none, not as one mode of zeros
        # (which would draw other random numbers for the simultaneous multiplier)
        return root[:, None] if np.any(root > 0) else np.zeros((root.size, 0))

    def plugin_sup_multipliers(
        self, cov: FloatArray, sd: FloatArray, level: float | None = None
    ) -> FloatArray:
        """Each subject's simultaneous multiplier for the plug-in band (:func:`sup_multipliers`
        with this predictor as the only source)."""
        lvl = self.band_level if level is None else level
        source = Source(np.zeros_like(sd), cov, self.eigenfunctions, self.left_out_modes())
        return sup_multipliers([source], sd, lvl)

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
        variance, multipliers = None, None
        if replicates:
            variance, multipliers = corrected_bands(
                tuple(replicates), self.fitted(scores), sample, level or self.band_level
            )
        out = self.trajectories(labels, scores, cov, level, variance, multipliers)
        g = self.grid.size
        out.insert(1, "n_obs", np.repeat(sample.n_obs, g))
        for j in range(self.n_components):
            out.insert(2 + j, f"score_{j + 1}", np.repeat(scores[:, j], g))
        return out

    # --- stored in a run as tables/model.csv -------------------------------------------------

    def to_frame(self) -> pd.DataFrame:
        """Long table: quantity, component (0: none), time (nan: none), value."""
        k = self.n_components
        modes = self.truncation_modes if self.truncation_modes is not None else np.zeros((0, 0))
        parts = [
            ("mean", 0, self.mean_time, self.mean_value),
            *(("eigenfunction", j + 1, self.grid, self.eigenfunctions[:, j]) for j in range(k)),
            ("truncation_variance", 0, self.grid, self.truncation_variance),
            *(("truncation_mode", j + 1, self.grid, modes[:, j]) for j in range(modes.shape[1])),
            *([("supported", 0, self.grid, self.supported)] if self.supported is not None else []),
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
            held = by.get("supported")
            kept = by.get("truncation_mode")
            modes = (
                None
                if kept is None
                else np.ascontiguousarray(
                    kept.sort_values(["component", "time"], kind="stable")
                    .value.to_numpy(dtype=np.float64)
                    .reshape(-1, grid.size)
                    .T
                )
            )
            supported = (
                None
                if held is None
                else held.sort_values("time", kind="stable").value.to_numpy(dtype=np.float64)
            )
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
                supported,
                modes,
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


class Source(NamedTuple):
    """One equally weighted part of the distribution of the curves' errors on the grid:
    ``offset`` (n, n_grid) plus a Gaussian along ``eigenfunctions`` with the scores'
    covariance ``cov`` (n, K, K), plus independent standard normal multiples of the
    left-out ``modes`` (n_grid, m; ``Predictor.left_out_modes``)."""

    offset: FloatArray
    cov: FloatArray
    eigenfunctions: FloatArray
    modes: FloatArray


# Draws of the whole curve's error for a simultaneous multiplier: the Monte Carlo error of
# a 95% quantile from 1000 draws is about 1% of the multiplier (binomial standard error of
# the 950th order statistic; common practice, no source). The same seeded draws serve every
# subject, so a subject's band does not depend on which other subjects are predicted.
SUP_DRAWS = 1000
SUP_SEED = 7
_CHUNK = 128  # subjects at a time: the draws take CHUNK x SUP_DRAWS x n_grid floats


def _roots(cov: FloatArray) -> FloatArray:
    """Symmetric square roots of a stack of covariance matrices (n, K, K)."""
    values, vectors = np.linalg.eigh(cov)
    out: FloatArray = vectors * np.sqrt(np.maximum(values, 0.0))[:, None, :]
    return out


def sup_multipliers(
    sources: Sequence[Source], sd: FloatArray, level: float, draws: int = SUP_DRAWS
) -> FloatArray:
    """Each subject's simultaneous multiplier, (n,): the ``level`` quantile of
    max over the grid of |error(t)| / sd(t), the error drawn from the equal mixture of
    ``sources`` (the "sup-t" construction; e.g. Ruppert, Wand & Carroll 2003,
    Semiparametric Regression, sec. 6.5; from memory), not the chi-square bound, which is
    conservative when the components' functions are smooth.

    The left-out components enter with their own shapes (``Source.modes``): a left-out
    mode that changes sign moves the two ends of a curve apart, which one mode along the
    root of their variance would miss. Grid times with zero variance are left out of the
    maximum.
    """
    n = sd.shape[0]
    per = max(draws // len(sources), 20)
    rng = np.random.default_rng(SUP_SEED)
    noise = [
        rng.standard_normal((per, src.eigenfunctions.shape[1] + src.modes.shape[1]))
        for src in sources
    ]
    safe = np.where(sd > 1e-12 * max(float(sd.max(initial=0.0)), 1e-300), sd, np.inf)
    out = np.empty(n)
    for lo in range(0, n, _CHUNK):
        rows = slice(lo, min(lo + _CHUNK, n))
        stats = []
        for src, z in zip(sources, noise, strict=True):
            k = src.eigenfunctions.shape[1]
            scores = np.einsum("ckl,ml->cmk", _roots(src.cov[rows]), z[:, :k])
            err = scores @ src.eigenfunctions.T  # (c, m, g)
            err += (z[:, k:] @ src.modes.T)[None, :, :]
            err += src.offset[rows][:, None, :]
            stats.append(np.max(np.abs(err) / safe[rows][:, None, :], axis=2))
        out[rows] = np.quantile(np.concatenate(stats, axis=1), level, axis=1)
    return out


def _over_refits(
    replicates: tuple[Predictor, ...], sample: Sample
) -> tuple[FloatArray, list[FloatArray], list[FloatArray]]:
    """The corrected variance (``corrected_variance``), and each refit's curves and scores'
    covariance for the sample's subjects."""
    b = len(replicates)
    per_rep = [rep.scores(sample) for rep in replicates]
    curves = [rep.fitted(scores) for rep, (scores, _) in zip(replicates, per_rep, strict=True)]
    covs = [cov for _, cov in per_rep]
    within = sum(rep.curve_variance(cov) for rep, cov in zip(replicates, covs, strict=True))
    first = sum(curves)
    second = sum(c * c for c in curves)
    spread = np.maximum(second / b - (first / b) ** 2, 0.0) * b / max(b - 1, 1)
    variance: FloatArray = within / b + spread
    return variance, curves, covs


def corrected_variance(replicates: tuple[Predictor, ...], sample: Sample) -> FloatArray:
    """Corrected variance of each subject's trajectory on the grid, (n_subjects, n_grid).

    A plug-in band treats the mean, the eigenfunctions, the eigenvalues and the error
    variance as known. Goldsmith, Greven & Crainiceanu (2013, Biometrics 69:41-51,
    "corrected confidence bands") resample subjects, refit the population quantities on
    each resample, recompute every subject's conditional expectation and its variance under
    each refit, and combine the two by the law of total variance:

        Var(X_i(t) | Y_i) ~ mean_b Var_b(X_i(t) | Y_i) + var_b E_b(X_i(t) | Y_i)

    Each resample's refit is a :class:`Predictor` of its own (its mean on the main grid).
    """
    return _over_refits(replicates, sample)[0]


def corrected_bands(
    replicates: tuple[Predictor, ...], fitted: FloatArray, sample: Sample, level: float
) -> tuple[FloatArray, FloatArray]:
    """Corrected variance of each subject's trajectory on the grid (``corrected_variance``),
    (n_subjects, n_grid), and each subject's corrected simultaneous multiplier,
    (n_subjects,): from the distribution of the whole curve's error under the mixture of
    the refits (each refit's curve, minus the main fit's ``fitted``, plus its own Gaussian
    error; :func:`sup_multipliers`). The band stays centred on the main fit's trajectory.
    """
    variance, curves, covs = _over_refits(replicates, sample)
    sources = [
        Source(curve - fitted, cov, rep.eigenfunctions, rep.left_out_modes())
        for rep, curve, cov in zip(replicates, curves, covs, strict=True)
    ]
    return variance, sup_multipliers(sources, np.sqrt(variance), level)
