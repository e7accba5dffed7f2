"""The result of a sparse FPCA fit (:class:`FPCAFit`): the population quantities, each
subject's scores where the passes left them, and the fit's :class:`Predictor`, through
which every trajectory and prediction goes. The algorithm that makes it is ``fit``."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from functools import cached_property
from typing import Any

import numpy as np
import pandas as pd

from ..errors import EstimationError
from .arrays import FloatArray, IntArray
from .bandwidth import BandwidthChoice
from .components import ComponentSelection, choose
from .design import Sample
from .frame import arrays_from_frame
from .likelihood import LikelihoodFit
from .options import FPCAOptions
from .plan import PartResults
from .predictor import BandKind, Predictor, corrected_bands, without_bands

# Subject labels: an array, or a pandas Index (immutable) of text kept as it came.
Labels = np.ndarray | pd.Index


def frozen(a: np.ndarray) -> np.ndarray:
    """``a`` contiguous and read-only (a result's arrays cannot be changed by its users)."""
    a = np.ascontiguousarray(a)
    a.flags.writeable = False
    return a


def as_labels(labels: Labels) -> Labels:
    return labels if isinstance(labels, pd.Index) else frozen(np.asarray(labels))


def rows_of(labels: Labels, wanted: Sequence[Any]) -> IntArray:
    """The row of each of the few labels ``wanted`` in ``labels`` (unique), -1 where absent:
    one scan of ``labels`` (``Index.get_indexer`` would build a hash table of every
    label, several hundred MB at 10^7 subjects)."""
    ids = pd.Index(labels)
    hit = np.flatnonzero(ids.isin(list(wanted)))
    found = dict(zip(ids[hit].tolist(), hit.tolist(), strict=True))
    return np.array([found.get(w, -1) for w in wanted], dtype=np.intp)


@dataclass(frozen=True)
class BandChoice:
    """Which band a fit's trajectories carry, and why.

    ``kind``: ``"plugin"``, ``"corrected"`` or ``"unavailable"`` (corrected bands were asked
    for and fewer than ``fit.MIN_RESAMPLES`` resamples could be fitted: no band is drawn
    rather than a thin one). ``asked``: the option (plugin, corrected, auto). ``resamples``:
    asked for; ``used``: fitted; ``widened``: fitted only with wider bandwidths (a resample
    without the sparse end's few readings cannot be smoothed at the main fit's bandwidths).
    """

    kind: str = "plugin"
    asked: str = "plugin"
    reason: str = ""
    resamples: int = 0
    used: int = 0
    widened: int = 0
    width_ratio: float = float("nan")  # band auto, plug-in: the corrected band's width ratio


@dataclass(frozen=True)
class MeanMultiplier:
    """How the multiplier of the mean's simultaneous band was found.

    ``method``: ``"bootstrap-t"`` (``meanband.bootstrap_t``: the band centre and its
    jackknife standard error recomputed on resamples of subjects, the multiplier the level
    quantile of the largest studentized deviation) or ``"normal"`` (the level quantile of
    the largest standardized deviation of a normal process with the band's covariance).
    ``normal``: the normal multiplier, kept for comparison. ``resamples``: drawn;
    ``undefined``: of those, the resamples whose fit or jackknife is undefined somewhere
    the band is drawn (counted as beyond the band). ``reason``: why the normal multiplier
    is used, when it is.
    """

    method: str = "normal"
    normal: float = float("nan")
    resamples: int = 0
    undefined: int = 0
    reason: str = ""
    value: float = float("nan")  # the multiplier used (FPCAFit.mean_simultaneous_multiplier)


@dataclass(frozen=True)
class FunctionSource:
    """Which eigenfunctions a fit uses, and the evidence (``fpca.refine``).

    ``used`` is ``"likelihood"`` (refined over a spline basis by the marginal likelihood)
    or ``"smoothing"`` (from the covariance surface); ``asked`` the ``eigenfunctions``
    option. ``held_out_*`` are the cross-validated log-likelihoods per subject of the two
    (``nan`` when not compared); ``smoothing`` and ``likelihood`` hold both sets of the
    refined components on the grid (``likelihood`` empty when not fitted).
    """

    used: str = "smoothing"
    asked: str = "smoothing"
    reason: str = ""
    held_out_smoothing: float = float("nan")
    held_out_likelihood: float = float("nan")
    folds: int = 0
    n_basis: int = 0
    subjects: int = 0
    smoothing: FloatArray = field(default_factory=lambda: np.zeros((0, 0)))
    likelihood: FloatArray = field(default_factory=lambda: np.zeros((0, 0)))


@dataclass(frozen=True)
class FPCAFit:
    """Result of a sparse FPCA fit. Arrays are read-only.

    Attributes
    ----------
    grid : ndarray of shape (n_grid,)
    mean : ndarray of shape (n_grid,)
    mean_se : ndarray of shape (n_grid,)
        Pointwise standard error of the mean's band (the bias-corrected band's:
        ``meanband.mean_band``), by the jackknife over subjects and widened where few
        subjects carry the fit (``mean_variance``).
    mean_support : ndarray of shape (n_grid,)
        Subjects with a reading within the mean's bandwidth of each grid time; no band
        (``nan``) where fewer than ``fit.MIN_SUPPORT``.
    mean_band_centre : ndarray of shape (n_grid,)
        Centre of the mean's band: the mean corrected for its smoothing bias (robust bias
        correction; the local quadratic fit at the mean's bandwidth). The band is
        ``mean_band_centre +- multiplier x mean_se``.
    covariance : ndarray of shape (n_grid, n_grid)
        Smoothed covariance surface (off-diagonal raw covariances only); not positive
        semi-definite in general. ``retained_covariance`` is the display version.
    diagonal_variance : ndarray of shape (n_grid,)
        Smoothed variance of single readings: surface diagonal plus error variance.
    eigenvalues : ndarray of shape (n_components,)
        Maximum likelihood eigenvalues of the retained components (``fpca.likelihood``).
    eigenfunctions : ndarray of shape (n_grid, n_components)
        Unit L2 norm on the domain; sign convention in ``fpca.components``.
    all_eigenvalues : ndarray of shape (n_all,)
        The first ``likelihood.eigenvalues.size`` refined by likelihood (sorted), then the
        remaining positive eigenvalues of the surface; FVE is relative to their sum.
        Components that the likelihood gives no variance are left out.
    surface_eigenvalues : ndarray of shape (n_all,)
        The smoothed surface's eigenvalue of each component of ``all_eigenvalues``.
    fve : ndarray of shape (n_all,)
    error_variance : float
        Maximum likelihood measurement-error variance (the estimate used everywhere).
    smoothing_error_variance : float
        The smoothing estimate (mean of V(t) - G(t, t) over the middle half); may be zero
        or negative, in which case it served only as a failed starting point.
    likelihood : LikelihoodFit
        The refinement: eigenvalues of the K' components, error variance, log-likelihood.
    truncation_variance : ndarray of shape (n_grid,)
        sum over the refined components beyond K of lambda_k phi_k(t)^2: the variance of
        the part of a trajectory that K components leave out (added to the bands).
    predictor : Predictor
        The population parts that turn readings into scores, curves and bands: every
        trajectory and prediction of this fit goes through it.
    mean_simultaneous_multiplier : float
        Multiplier of ``mean_se`` for a simultaneous band over the grid at ``band_level``.
    diagonal_support : ndarray of shape (n_grid,)
        ``smoothing.design_conditioning_2d`` of the covariance smoother on the diagonal:
        near 0 where few, lopsided pairs of readings carry the surface.
    n_components : int
    mean_bandwidth, covariance_bandwidth, diagonal_bandwidth : float
    mean_bandwidth_choice, covariance_bandwidth_choice, diagonal_bandwidth_choice
        BandwidthChoice
    selection : ComponentSelection
    subjects : ndarray or pandas Index of shape (n_subjects,)
        Subject labels, in the order of the score rows: an Index of text when the labels
        came as one (the ids of many files, held as Arrow text: about 30 bytes a subject
        where an array of Python strings takes about 70).
    n_obs : ndarray of shape (n_subjects,)
    kept_scores : PartResults
        Each subject's scores (n_subjects, n_components) and their error covariance
        (n_subjects, n_components, n_components), by code, where the scores pass left them
        (``fpca.plan``; on a cluster, on the workers). ``score_values`` and ``score_cov``
        gather them all; the report's passes read them where they are.
    pair_counts : ndarray of shape (n_bins, n_bins)
        Linearly binned counts of the pairs (t_ij, t_il), j != l, on ``pair_grid``.
    pair_grid : ndarray of shape (n_bins,)
    n_readings : int
    dropped_eigenvalues : int
        Eigenvalues of the surface that were negative or numerically zero.
    dropped_negative_sum : float
        Sum of the absolute values of the negative ones (a warning above 1% of the total).
    warnings : tuple of str
        Starting-point problems, dropped eigenvalues, bandwidths at the end of their range.
    replicates : tuple of Predictor
        The population quantities refitted on resampled subjects (empty for plug-in
        bands); with them, bands are corrected ones (``predictor.corrected_bands``).
    options : FPCAOptions
    functions : FunctionSource
        Whether the eigenfunctions are the smoothing or the likelihood ones, and why.
    refined_eigenfunctions : ndarray of shape (n_grid, likelihood.eigenvalues.size)
        The eigenfunctions of every refined component (the retained ones first), with
        ``likelihood.eigenvalues`` the full model beside the retained K.
    mean_covariance : ndarray of shape (n_grid, n_grid)
        Covariance over the grid of the mean's band estimate (``mean_se`` is the root of
        its diagonal; ``mean_variance`` says which estimator): how the mean's estimation
        error at one time moves with that at another (``fpca.adequacy.mean_error_variance``).
    mean_variance : str
        ``"jackknife"`` (over subjects, each time's standard error widened by the t quantile
        at ``mean_degrees_of_freedom``; ``fpca.meanband``) or ``"sandwich"`` (cluster-robust,
        above ``meanband.JACKKNIFE_MAX_SUBJECTS`` subjects).
    mean_degrees_of_freedom : ndarray of shape (n_grid,)
        The jackknife variance's effective degrees of freedom at each time (``nan`` with the
        sandwich and where no band is drawn).
    mean_multiplier : MeanMultiplier
        How ``mean_simultaneous_multiplier`` was found (bootstrap-t or normal).
    """

    grid: FloatArray
    mean: FloatArray
    mean_se: FloatArray
    mean_band_centre: FloatArray
    mean_support: IntArray
    covariance: FloatArray
    diagonal_variance: FloatArray
    eigenvalues: FloatArray
    eigenfunctions: FloatArray
    all_eigenvalues: FloatArray
    surface_eigenvalues: FloatArray
    fve: FloatArray
    error_variance: float
    smoothing_error_variance: float
    likelihood: LikelihoodFit
    truncation_variance: FloatArray
    mean_simultaneous_multiplier: float
    diagonal_support: FloatArray
    n_components: int
    mean_bandwidth_choice: BandwidthChoice
    covariance_bandwidth_choice: BandwidthChoice
    diagonal_bandwidth_choice: BandwidthChoice
    selection: ComponentSelection
    subjects: Labels
    n_obs: IntArray
    kept_scores: PartResults
    pair_counts: FloatArray
    pair_grid: FloatArray
    n_readings: int
    dropped_eigenvalues: int
    dropped_negative_sum: float
    warnings: tuple[str, ...]
    options: FPCAOptions
    predictor: Predictor
    _sample: Sample | None = field(repr=False)  # None in a fit without its subjects
    replicates: tuple[Predictor, ...] = ()
    columns: tuple[str, str, str] = ("subject", "time", "value")
    band: BandChoice = BandChoice()
    functions: FunctionSource = FunctionSource()
    refined_eigenfunctions: FloatArray = field(default_factory=lambda: np.zeros((0, 0)))
    mean_covariance: FloatArray = field(default_factory=lambda: np.zeros((0, 0)))
    mean_variance: str = "jackknife"
    mean_degrees_of_freedom: FloatArray = field(default_factory=lambda: np.zeros(0))
    mean_multiplier: MeanMultiplier = MeanMultiplier()

    @property
    def mean_bandwidth(self) -> float:
        return self.mean_bandwidth_choice.value

    @property
    def covariance_bandwidth(self) -> float:
        return self.covariance_bandwidth_choice.value

    @property
    def diagonal_bandwidth(self) -> float:
        return self.diagonal_bandwidth_choice.value

    def without_subjects(self) -> FPCAFit:
        """This fit's population parts only: no scores, readings or resamples, at a size
        that does not grow with the number of subjects (what a comparison of fits or a
        summary figure needs). ``n_obs`` stays: the design summaries use it."""
        k = self.n_components
        return replace(
            self,
            _sample=None,
            replicates=(),
            subjects=self.subjects[:0],
            kept_scores=PartResults.of_arrays(np.zeros((0, k)), np.zeros((0, k, k))),
        )

    # --- the subjects' scores --------------------------------------------------------------

    @cached_property
    def _gathered(self) -> tuple[FloatArray, FloatArray]:
        scores, cov = self.kept_scores.every()
        return frozen(scores), frozen(cov)

    @property
    def score_values(self) -> FloatArray:
        """Every subject's scores, shape (n_subjects, n_components), gathered from where
        they were computed (on a cluster: while its client is open)."""
        return self._gathered[0]

    @property
    def score_cov(self) -> FloatArray:
        """Every subject's score error covariance, (n_subjects, K, K), gathered likewise."""
        return self._gathered[1]

    def scores_of(self, rows: IntArray) -> tuple[FloatArray, FloatArray]:
        """The scores and covariances of the subjects at ``rows`` (any order), gathering
        only theirs."""
        rows = np.asarray(rows, dtype=np.intp)
        codes, back = np.unique(rows, return_inverse=True)
        scores, cov = self.kept_scores.pick(codes)
        return scores[back], cov[back]

    def rows_of_ids(self, ids: Sequence[str]) -> IntArray:
        """The rows (codes) of the subjects named by ``ids`` as text, -1 where absent."""
        return rows_of(pd.Index(self.subjects).astype(str), list(ids))

    @property
    def n_subjects(self) -> int:
        return int(self.subjects.size)

    @property
    def scores(self) -> pd.DataFrame:
        """Scores indexed by subject: n_obs, score_1 .. score_K."""
        frame = pd.DataFrame(
            self.score_values,
            columns=[f"score_{k + 1}" for k in range(self.n_components)],
            index=pd.Index(self.subjects, name="subject"),
        )
        frame.insert(0, "n_obs", self.n_obs)
        return frame

    # --- summaries -------------------------------------------------------------------------

    def rule_picks(self, rule: str) -> int:
        """The number of components that ``rule`` picks from this fit's criteria table
        (``"fixed"``: this fit's own)."""
        if rule == "fixed":
            return self.n_components
        sel = self.selection
        return choose(
            rule,
            int(sel.k.size),
            sel.cumulative_fve,
            sel.aic,
            sel.bic,
            sel.cv,
            self.options.fve_threshold,
            None,
        )

    @property
    def retained_covariance(self) -> FloatArray:
        """Covariance rebuilt from the retained components (positive semi-definite)."""
        phi = self.eigenfunctions
        return np.asarray((phi * self.eigenvalues) @ phi.T)

    @property
    def cumulative_fve(self) -> FloatArray:
        return np.cumsum(self.fve)

    # --- curves and bands (all through the predictor) -----------------------------------

    def mean_at(self, t: FloatArray) -> FloatArray:
        """Mean at arbitrary times, interpolated from the fine binned smooth."""
        return self.predictor.mean_at(t)

    def eigenfunctions_at(self, t: FloatArray) -> FloatArray:
        """Eigenfunctions at arbitrary times (linear interpolation), shape (n, K)."""
        return self.predictor.eigenfunctions_at(t)

    def band_multiplier(self, level: float | None = None, kind: BandKind = "pointwise") -> float:
        """Multiplier of the standard error for a two-sided band at ``level``."""
        return self.predictor.band_multiplier(kind, level)

    def trajectories(
        self,
        subjects: list[Any] | None = None,
        level: float | None = None,
        readings: Sample | None = None,
    ) -> pd.DataFrame:
        """Recovered trajectories on the grid: subject, time, fitted, the pointwise band
        (lower, upper) and the simultaneous band (lower_simultaneous, upper_simultaneous).

        ``readings``: the readings of ``subjects`` (coded 0 .. len - 1 in that order), which
        corrected bands need; by default the fit's own (a fit from parts holds none).
        """
        if readings is None and self._sample is None:
            raise EstimationError(
                "this fit holds no readings of its subjects (a fit "
                "without_subjects, or one fitted from parts without them)"
            )
        if subjects is None:
            rows = np.arange(self.n_subjects)
        else:
            rows = rows_of(self.subjects, subjects)
            missing = [s for s, r in zip(subjects, rows, strict=True) if r < 0]
            if missing:
                raise EstimationError(f"subjects not in the fit: {missing[:5]!r}")
        if readings is None:
            assert self._sample is not None
            readings = self._sample.subset(rows)
        elif readings.n_subjects != rows.size:
            raise EstimationError(
                f"readings of {readings.n_subjects} subjects given for {rows.size} trajectories"
            )
        scores, cov = self.scores_of(rows)
        variance, multipliers = None, None
        if self.replicates:
            variance, multipliers = corrected_bands(
                self.replicates,
                self.predictor.fitted(scores),
                readings,
                self.predictor.band_level if level is None else level,
            )
        return self._unless_unavailable(
            self.predictor.trajectories(
                self.subjects[rows], scores, cov, level, variance, multipliers
            )
        )

    def _unless_unavailable(self, frame: pd.DataFrame) -> pd.DataFrame:
        """No band (empty cells) where the corrected band was asked for and is unavailable
        (``BandChoice``): a plug-in band in its place would be drawn too thin."""
        return without_bands(frame) if self.band.kind == "unavailable" else frame

    def plugin_trajectories(self) -> pd.DataFrame:
        """Every subject's trajectory with plug-in bands, from the scores and their
        covariances alone (no readings). The simultaneous band of this bulk table is the
        chi-square (Scheffé) bound, conservative: drawing each subject's whole-curve error
        (``predictor.sup_multipliers``) would cost about a thousand curves per subject."""
        scheffe = self.predictor.band_multiplier("simultaneous")
        return self.predictor.trajectories(
            self.subjects,
            self.score_values,
            self.score_cov,
            simultaneous=np.full(self.n_subjects, scheffe),
        )

    def predict(self, frame: pd.DataFrame, level: float | None = None) -> pd.DataFrame:
        """Scores and trajectories on the grid for the subjects in ``frame`` (new or not).

        The fitted mean, eigenfunctions, eigenvalues and error variance are kept; each
        subject's scores come from its own readings in ``frame`` by conditional expectation.
        Returns the columns of a stored run's prediction: subject, n_obs, score_1..K, time,
        fitted, lower, upper, lower_simultaneous, upper_simultaneous (corrected bands when
        the fit has resamples).
        """
        codes, t, y, labels = arrays_from_frame(frame, *self.columns)
        return self._unless_unavailable(
            self.predictor.predict(Sample.from_arrays(codes, t, y), labels, self.replicates, level)
        )
