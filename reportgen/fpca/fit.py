"""The sparse FPCA fit: mean, covariance, error variance, components, scores.

Steps (Yao, Müller & Wang 2005, JASA 100:577-590, doi:10.1198/016214504000001745):

1. mean: local linear smooth of all pooled readings (:func:`_fit_mean`);
2. covariance: 2-D local linear smooth of the raw covariances of pairs j != l within a
   subject; the readings' own squares (j = l) carry sigma^2 on top and are smoothed
   separately in 1-D (:func:`_fit_covariance`);
3. error variance: the mean of (diagonal smooth - surface diagonal) over the middle half of
   the domain, floored when not positive (:func:`_error_variance`);
4. eigen-decomposition with trapezoid weights (``components.eigen_decompose``);
5. number of components by FVE, AIC, BIC, leave-one-reading-out error or fixed;
6. scores and their error covariance by conditional expectation (``scores``).

Every step that touches readings is a pass over the data's parts (``plan``), so that the
same fit runs in this process or on a cluster with the same bits.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from functools import cached_property
from typing import Any

import numpy as np
import pandas as pd
from scipy.special import ndtri
from threadpoolctl import threadpool_limits

from ..errors import EstimationError
from .bandwidth import EXTEND_TO, BandwidthChoice, candidate_bandwidths, select_bandwidth
from .bootstrap import Replicate, total_variance
from .components import (
    ComponentSelection,
    Eigen,
    choose,
    eigen_decompose,
    evaluate_at,
    trapezoid_weights,
)
from .design import BinnedStats, IntArray, PairStats, Sample, assign_folds
from .frame import arrays_from_frame
from .likelihood import LikelihoodFit, maximise, starting_error_variance
from .options import FPCAOptions
from .plan import Kept, Part, Partitioned
from .predictor import Predictor, band_multiplier
from .scores import SampleTerms, conditional_scores, loo_errors, sample_terms
from .smoothing import (
    BinGrid,
    FloatArray,
    Kernel,
    design_conditioning_2d,
    equivalent_kernel_1d,
    get_kernel,
    hat_diagonal_1d,
    hat_diagonal_2d,
    local_linear_binned_1d,
    local_linear_binned_2d,
    local_quadratic_diagonal_2d,
)

# Subject labels: an array, or a pandas Index (immutable) of text kept as it came.
Labels = np.ndarray | pd.Index


def _labels(labels: Labels) -> Labels:
    return labels if isinstance(labels, pd.Index) else _frozen(np.asarray(labels))


def rows_of(labels: Labels, wanted: Sequence[Any]) -> IntArray:
    """The row of each of the few labels ``wanted`` in ``labels`` (unique), -1 where absent:
    one scan of ``labels`` (``Index.get_indexer`` builds a hash table of every label: 0.69
    GB at 10^7 subjects)."""
    ids = pd.Index(labels)
    hit = np.flatnonzero(ids.isin(list(wanted)))
    found = dict(zip(ids[hit].tolist(), hit.tolist(), strict=True))
    return np.array([found.get(w, -1) for w in wanted], dtype=np.intp)


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.ascontiguousarray(a)
    a.flags.writeable = False
    return a


@dataclass(frozen=True)
class FPCAFit:
    """Result of a sparse FPCA fit. Arrays are read-only.

    Attributes
    ----------
    grid : ndarray of shape (n_grid,)
    mean : ndarray of shape (n_grid,)
    mean_se : ndarray of shape (n_grid,)
        Pointwise standard error of the mean, cluster-robust over subjects.
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
    kept_scores : Kept
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
    replicates : tuple of Replicate
        Population quantities refitted on resampled subjects (empty for plug-in bands).
    options : FPCAOptions
    """

    grid: FloatArray
    mean: FloatArray
    mean_se: FloatArray
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
    kept_scores: Kept
    pair_counts: FloatArray
    pair_grid: FloatArray
    n_readings: int
    dropped_eigenvalues: int
    dropped_negative_sum: float
    warnings: tuple[str, ...]
    options: FPCAOptions
    _mean_fine: tuple[FloatArray, FloatArray] = field(repr=False)
    _sample: Sample | None = field(repr=False)  # None in a fit without its subjects
    replicates: tuple[Replicate, ...] = ()
    columns: tuple[str, str, str] = ("subject", "time", "value")

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
        return replace(self, _sample=None, replicates=(), subjects=self.subjects[:0],
                       kept_scores=Kept.of_arrays(np.zeros((0, k)), np.zeros((0, k, k))))

    @cached_property
    def _gathered(self) -> tuple[FloatArray, FloatArray]:
        scores, cov = self.kept_scores.every()
        return _frozen(scores), _frozen(cov)

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

    @property
    def retained_covariance(self) -> FloatArray:
        """Covariance rebuilt from the retained components (positive semi-definite)."""
        phi = self.eigenfunctions
        return np.asarray((phi * self.eigenvalues) @ phi.T)

    @property
    def n_subjects(self) -> int:
        return int(self.subjects.size)

    @property
    def cumulative_fve(self) -> FloatArray:
        return np.cumsum(self.fve)

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

    def mean_at(self, t: FloatArray) -> FloatArray:
        """Mean at arbitrary times, interpolated from the fine binned smooth."""
        fine_t, fine_mu = self._mean_fine
        return np.interp(np.asarray(t, dtype=np.float64), fine_t, fine_mu)

    def eigenfunctions_at(self, t: FloatArray) -> FloatArray:
        """Eigenfunctions at arbitrary times (linear interpolation), shape (n, K)."""
        return evaluate_at(np.asarray(t, dtype=np.float64), self.grid, self.eigenfunctions)

    @property
    def simultaneous_dof(self) -> int:
        """Components that enter a trajectory band's variance: the retained ones, plus the
        left-out refined ones when they carry variance."""
        return int(self.likelihood.eigenvalues.size if np.any(self.truncation_variance > 0)
                   else self.n_components)

    def band_multiplier(self, level: float | None = None, kind: str = "pointwise") -> float:
        """Multiplier of the standard error for a two-sided band at ``level``
        (:func:`~reportgen.fpca.predictor.band_multiplier` with ``simultaneous_dof``)."""
        lvl = self.options.band_level if level is None else level
        return band_multiplier(lvl, kind, self.simultaneous_dof)

    def curves(
        self, scores: FloatArray, score_cov: FloatArray, level: float | None = None,
        kind: str = "pointwise", variance: FloatArray | None = None,
    ) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Fitted curves on the grid and a band for given scores, each (n, n_grid).

        The band's variance is ``variance`` when given (a corrected one), otherwise that of
        the scores' prediction error along the retained eigenfunctions plus
        ``truncation_variance`` (what K components leave out).
        """
        fitted = self.mean[None, :] + scores @ self.eigenfunctions.T
        var = variance
        if var is None:
            var = np.einsum("gk,nkl,gl->ng", self.eigenfunctions, score_cov,
                            self.eigenfunctions) + self.truncation_variance[None, :]
        half = self.band_multiplier(level, kind) * np.sqrt(np.maximum(var, 0.0))
        return fitted, fitted - half, fitted + half

    def trajectories(
        self, subjects: list[Any] | None = None, level: float | None = None,
        readings: Sample | None = None,
    ) -> pd.DataFrame:
        """Recovered trajectories on the grid: subject, time, fitted, the pointwise band
        (lower, upper) and the simultaneous band (lower_simultaneous, upper_simultaneous).

        ``readings``: the readings of ``subjects`` (coded 0 .. len - 1 in that order), which
        corrected bands need; by default the fit's own (a fit from parts holds none).
        """
        if readings is None and self._sample is None:
            raise EstimationError("this fit holds no readings of its subjects (a fit "
                                  "without_subjects, or one fitted from parts without them)")
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
            raise EstimationError(f"readings of {readings.n_subjects} subjects given for "
                                  f"{rows.size} trajectories")
        scores, cov = self.scores_of(rows)
        return self._curve_frame(self.subjects[rows], scores, cov, level,
                                 self._band_variance(readings))

    def plugin_trajectories(self) -> pd.DataFrame:
        """Every subject's trajectory with plug-in bands, as :meth:`trajectories` gives them
        for a fit without resamples: from the scores and their covariances alone (no
        readings)."""
        return self._curve_frame(self.subjects, self.score_values, self.score_cov, None, None)

    def band_kind(self) -> str:
        """``"corrected"`` when replicates carry the estimation uncertainty, else ``"plugin"``."""
        return "corrected" if self.replicates else "plugin"

    def _band_variance(self, sample: Sample) -> FloatArray | None:
        """The corrected band's variance for the subjects of ``sample`` (None: plug-in)."""
        return total_variance(self.replicates, self.grid, sample) if self.replicates else None

    def _curve_frame(self, labels: Labels, scores: FloatArray, cov: FloatArray,
                     level: float | None, var: FloatArray | None) -> pd.DataFrame:
        fitted, lower, upper = self.curves(scores, cov, level, variance=var)
        _, lower_s, upper_s = self.curves(scores, cov, level, "simultaneous", var)
        return pd.DataFrame({
            "subject": np.repeat(labels, self.grid.size),
            "time": np.tile(self.grid, labels.size),
            "fitted": fitted.ravel(), "lower": lower.ravel(), "upper": upper.ravel(),
            "lower_simultaneous": lower_s.ravel(), "upper_simultaneous": upper_s.ravel(),
        })

    def predictor(self) -> Predictor:
        """The population parts that score new subjects (stored in a run as model.csv)."""
        fine_t, fine_mu = self._mean_fine
        return Predictor(self.grid, fine_t, fine_mu, self.eigenfunctions, self.eigenvalues,
                         self.error_variance, self.truncation_variance,
                         self.options.band_level, self.simultaneous_dof)

    def conditional_scores(self, sample: Sample) -> tuple[FloatArray, FloatArray]:
        """BLUP scores and error covariance for readings of (new) subjects."""
        resid = sample.y - self.mean_at(sample.t)
        return conditional_scores(
            sample.starts, resid, self.eigenfunctions_at(sample.t), self.eigenvalues,
            self.error_variance,
        )

    def _new_subjects(self, frame: pd.DataFrame
                      ) -> tuple[np.ndarray, FloatArray, FloatArray, Sample]:
        codes, t, y, labels = arrays_from_frame(frame, *self.columns)
        sample = Sample.from_arrays(codes, t, y)
        scores, cov = self.conditional_scores(sample)
        return labels, scores, cov, sample

    def predict(self, frame: pd.DataFrame, level: float | None = None) -> pd.DataFrame:
        """Trajectories on the grid for the subjects in ``frame`` (new or not).

        The fitted mean, eigenfunctions, eigenvalues and error variance are kept; each
        subject's scores come from its own readings in ``frame`` by conditional expectation.
        Returns a frame with columns subject, time, fitted, lower, upper,
        lower_simultaneous, upper_simultaneous.
        """
        labels, scores, cov, sample = self._new_subjects(frame)
        return self._curve_frame(labels, scores, cov, level, self._band_variance(sample))

    def predict_at(
        self, frame: pd.DataFrame, targets: pd.DataFrame, level: float | None = None,
        new_reading: bool = True,
    ) -> pd.DataFrame:
        """Predictions at given (subject, time) rows of ``targets`` from readings in ``frame``.

        With ``new_reading=True`` the interval is for a new noisy reading (trajectory
        variance plus the error variance); otherwise for the trajectory itself.
        """
        subj_col, time_col, _ = self.columns
        labels, scores, cov, _ = self._new_subjects(frame)
        rows = pd.Index(labels).get_indexer(targets[subj_col])
        if np.any(rows < 0):
            raise EstimationError("every target subject needs at least one reading in frame")
        t = targets[time_col].to_numpy(dtype=np.float64)
        phi = self.eigenfunctions_at(t)
        fitted = self.mean_at(t) + np.einsum("nk,nk->n", phi, scores[rows])
        var = np.einsum("nk,nkl,nl->n", phi, cov[rows], phi)
        var = var + np.interp(t, self.grid, self.truncation_variance)
        if new_reading:
            var = var + self.error_variance
        half = self.band_multiplier(level) * np.sqrt(var)
        return pd.DataFrame({
            "subject": targets[subj_col].to_numpy(), "time": t, "fitted": fitted,
            "lower": fitted - half, "upper": fitted + half,
        })


# ---------------------------------------------------------------------------------------


def _choose_bandwidth(
    setting: float | str, stats: BinnedStats, bins: BinGrid, n_subjects: int, dim: int,
    method: str, kernel: Kernel, eval_points: np.ndarray, what: str,
) -> BandwidthChoice:
    if dim == 1:
        def smooth(ev: FloatArray | None, c: FloatArray, s: FloatArray, h: float) -> FloatArray:
            return local_linear_binned_1d(
                bins.centers if ev is None else ev, bins.centers, c, s, h, kernel)

        def hat(c: FloatArray, h: float) -> FloatArray:
            return hat_diagonal_1d(bins.centers, c, h, kernel)
    else:
        def smooth(ev: FloatArray | None, c: FloatArray, s: FloatArray, h: float) -> FloatArray:
            return local_linear_binned_2d(
                bins.centers if ev is None else ev, bins.centers, c, s, h, kernel, True)

        def hat(c: FloatArray, h: float) -> FloatArray:
            return hat_diagonal_2d(bins.centers, c, h, kernel, True)

    if setting != "auto":
        h = float(setting)
        total = stats.total()
        est = smooth(eval_points, total.counts[0], total.sums[0], h)
        if not np.all(np.isfinite(est)):
            raise EstimationError(
                f"the fixed {what} bandwidth {h:.4g} is too small for this design: some grid "
                "points have fewer readings in their window than a local linear fit needs; "
                'use a larger value or "auto"'
            )
        return BandwidthChoice(h, "fixed")
    span = bins.upper - bins.lower
    candidates = candidate_bandwidths(span, bins.width, n_subjects, dim)
    return select_bandwidth(stats, candidates, method, smooth, hat, eval_points, what,
                            extend_to=EXTEND_TO * span)


def _edge_warning(choice: BandwidthChoice, what: str) -> list[str]:
    if choice.method == "fixed" or not choice.candidates:
        return []
    feasible = [h for h, c in zip(choice.candidates, choice.criterion, strict=True)
                if np.isfinite(c)]
    if choice.value == min(feasible) and len(feasible) > 1:
        return [f"the {what} bandwidth {choice.value:.4g} is the smallest feasible candidate; "
                "the criterion may prefer a still smaller one"]
    if choice.value == max(feasible) and len(feasible) > 1:
        return [f"the {what} bandwidth {choice.value:.4g} is the largest candidate ("
                f"{EXTEND_TO:g} x the length of the domain): the smoother is close to a global "
                "straight line or plane; the data show little structure at smaller scales"]
    return []


def _error_variance(
    grid: FloatArray, diag_var: FloatArray, ridge: FloatArray
) -> tuple[float, float]:
    """Smoothing estimate of sigma^2 and the average reading variance, over the middle half.

    sigma^2 is the average of V(t) - G(t, t) over the middle half of the domain (Yao, Müller
    & Wang 2005, eq. 2, which integrates over the middle half to avoid boundary effects of
    the smoothers); ``ridge`` is G(t, t) from ``local_quadratic_diagonal_2d``. It is a small
    difference of two smoothed curves and may be zero or negative; it only starts the
    likelihood refinement.
    """
    lo, hi = grid[0], grid[-1]
    span = hi - lo
    mid = (grid >= lo + span / 4 - 1e-12 * span) & (grid <= hi - span / 4 + 1e-12 * span)
    w = trapezoid_weights(grid[mid])
    raw = float(w @ (diag_var[mid] - ridge[mid]) / w.sum())
    level = float(w @ diag_var[mid] / w.sum())
    if not level > 0:
        raise EstimationError(
            f"the readings have no variance around the mean (average {level:.3g} over the "
            "middle half of the domain): there is nothing to decompose"
        )
    return raw, level


def _check_variation(check: FloatArray) -> None:
    """Readings that do not vary around the mean leave nothing to decompose.

    ``check`` holds (max |y|, sum of squared residuals, number of readings). "Do not vary"
    is relative to the size of the values (1e-10 of the largest absolute value): constant
    data give residuals at rounding level, whose covariance would otherwise yield
    components made of rounding noise.
    """
    size, ss, n = (float(x) for x in check)
    rms = float(np.sqrt(ss / n))
    if not rms > 1e-10 * size:
        raise EstimationError(
            f"the readings show no variation between subjects: the root mean square "
            f"deviation from the mean is {rms:.3g} for values of size up to {size:.3g}"
        )


def _check_design(data: Partitioned, lo: float, hi: float) -> None:
    outside = data.count_outside(lo, hi)
    if outside:
        raise EstimationError(
            f"{outside} readings lie outside the domain [{lo:.6g}, {hi:.6g}]; leave them out "
            "or widen the domain (they would otherwise be counted at its ends)"
        )
    n_multi = int(np.count_nonzero(data.n_obs >= 2))
    if n_multi < 2:
        raise EstimationError(
            "the covariance needs at least two subjects with two or more readings; "
            f"found {n_multi} among {data.n_subjects} subjects"
        )
    if not hi > lo:
        raise EstimationError(
            f"all readings are at one time ({lo:.6g}): a curve cannot be estimated"
        )


def fit_arrays(
    subject: IntArray, t: FloatArray, y: FloatArray, labels: np.ndarray,
    options: FPCAOptions = FPCAOptions(), *, population_only: bool = False,
    per_subject: bool = True,
) -> FPCAFit:
    """Fit sparse FPCA to readings given as arrays.

    With ``population_only`` (used for the resamples of the corrected bands) the criteria
    for the number of components, the mean's simultaneous multiplier and the corrected
    bands are skipped (``nan`` / empty); ``component_rule`` must then be ``"fixed"``.
    With ``per_subject=False`` (fits compared by their population parts) the scores are
    not computed: the fit comes as :meth:`FPCAFit.without_subjects` returns it.

    Parameters
    ----------
    subject : ndarray of int, shape (n_obs,)
        Codes 0 .. n_subjects - 1 (every code present); ``labels[code]`` is the subject id.
    t, y : ndarray of float, shape (n_obs,)
        Finite reading times and values.
    labels : ndarray of shape (n_subjects,)
    options : FPCAOptions

    The dense linear algebra runs on one BLAS thread (``threadpoolctl``), so that the
    results do not depend on the machine's core count or load.
    """
    with threadpool_limits(limits=1, user_api="blas"):
        sample = Sample.from_arrays(subject, t, y)
        data = Partitioned.local([Part(sample, np.arange(sample.n_subjects, dtype=np.intp))])
        return _fit(data, labels, options, population_only, per_subject, sample)


def fit_parts(data: Partitioned, labels: Labels, options: FPCAOptions = FPCAOptions(),
              *, per_subject: bool = True, sample: Sample | None = None) -> FPCAFit:
    """Fit sparse FPCA to readings held in parts (``fpca.plan``), whoever executes the passes.

    ``labels[code]`` is the id of the subject with that code. The result depends on the
    data and on how they are split into parts, not on the executor. ``sample``, when the
    caller holds all readings (coded as the parts are), is kept for the trajectories'
    corrected bands; without it the fit cannot draw trajectories. A data set of one part
    gives exactly :func:`fit_arrays`'s result.
    """
    with threadpool_limits(limits=1, user_api="blas"):
        return _fit(data, labels, options, False, per_subject, sample)


def _fit(data: Partitioned, labels: Labels, options: FPCAOptions, population_only: bool,
         per_subject: bool = True, sample: Sample | None = None) -> FPCAFit:
    lo, hi = options.fitted_domain(data.t_min, data.t_max)
    _check_design(data, lo, hi)
    kernel = get_kernel(options.kernel)
    grid = np.linspace(lo, hi, options.n_grid)
    auto = "auto" in (options.mean_bandwidth, options.covariance_bandwidth,
                      options.diagonal_bandwidth)
    n_subjects = data.n_subjects
    n_folds = min(options.cv_folds, n_subjects) if auto else 1
    method = options.bandwidth_method
    folds = assign_folds(n_subjects, n_folds, options.seed)
    messages: list[str] = []

    # 1. mean
    mbins = BinGrid(lo, hi, options.mean_bins)
    mstats = data.reading_sums(folds, mbins, n_folds)
    mean_choice = _choose_bandwidth(
        options.mean_bandwidth, mstats, mbins, n_subjects, 1, method, kernel,
        np.concatenate([grid, mbins.centers]), "mean",
    )
    total = mstats.total()
    fine = local_linear_binned_1d(
        mbins.centers, mbins.centers, total.counts[0], total.sums[0], mean_choice.value, kernel
    )
    mean = np.interp(grid, mbins.centers, fine)

    # 2. covariance surface, and the variance of single readings on its own bandwidth
    cbins = BinGrid(lo, hi, options.covariance_bins)
    pstats, check = data.residual_sums(folds, fine, mbins, cbins, n_folds)
    _check_variation(check)
    cov_choice = _choose_bandwidth(
        options.covariance_bandwidth, pstats.offdiag, cbins, n_subjects, 2, method,
        kernel, grid, "covariance",
    )
    diag_choice = _choose_bandwidth(
        options.diagonal_bandwidth, pstats.diag, cbins, n_subjects, 1, method,
        kernel, grid, "diagonal",
    )
    cov, diag_var, ridge = _surfaces(pstats, cbins, grid, cov_choice.value, diag_choice.value,
                                     kernel)
    mean_cov = _mean_covariance(pstats, cbins, grid, mean_choice.value, kernel)
    mean_se = np.sqrt(np.maximum(np.diag(mean_cov), 0.0))

    # 3. eigen-decomposition; smoothing estimate of the error variance (a starting point)
    eig = eigen_decompose(grid, cov)
    messages += (_edge_warning(mean_choice, "mean") + _edge_warning(cov_choice, "covariance")
                 + _edge_warning(diag_choice, "diagonal"))
    # Smoothing always leaves some small negative eigenvalues; warn when they are material.
    if eig.dropped_sum > 0.01 * eig.values.sum():
        messages.append(
            f"{eig.n_dropped} non-positive eigenvalues of the covariance surface were dropped "
            f"(negative ones sum to {eig.dropped_sum:.3g}, "
            f"{eig.dropped_sum / eig.values.sum():.1%} of the positive total)"
        )
    sigma2_smooth, level = _error_variance(grid, diag_var, ridge)

    # 4. likelihood refinement of (lambda_1..K', sigma^2) with the eigenfunctions fixed
    k_ref = _refined_count(eig, options)
    used = seeded_sample(n_subjects, REFINE_MAX_SUBJECTS, options.seed)
    chosen, chosen_resid = data.gather(used, fine, mbins)
    terms = sample_terms(chosen, np.arange(used.size, dtype=np.intp), chosen_resid, grid,
                         eig.functions[:, :k_ref])
    start = starting_error_variance(sigma2_smooth, level)
    if start != sigma2_smooth:
        messages.append(
            f"the smoothing estimate of the error variance was {sigma2_smooth:.3g} (not "
            f"positive); the likelihood started from {start:.3g} (a tenth of the average "
            f"reading variance {level:.3g}) and its maximum is the estimate"
        )
    lik = maximise(terms.sums, eig.values[:k_ref], start)
    _check_refined(lik, level)
    if not lik.converged:
        messages.append(f"the likelihood refinement stopped after {lik.iterations} "
                        "iterations without meeting its convergence tolerance")
    # Components the likelihood gives no variance (lambda = 0) leave the refined set.
    order = np.argsort(-lik.eigenvalues, kind="stable")
    order = order[lik.eigenvalues[order] > 0]
    lik = replace(lik, eigenvalues=lik.eigenvalues[order])
    terms = terms.reorder(order)
    funcs_ref = eig.functions[:, :k_ref][:, order]
    if options.component_rule == "fixed" and (options.n_components or 0) > order.size:
        raise EstimationError(
            f"n_components={options.n_components} is more than the {order.size} components "
            "to which the likelihood gives any variance"
        )
    all_values = np.concatenate([lik.eigenvalues, eig.values[k_ref:]])
    surface_values = np.concatenate([eig.values[:k_ref][order], eig.values[k_ref:]])
    fve = all_values / all_values.sum()

    # 5. number of components
    if population_only:
        selection = _fixed_selection(lik.eigenvalues.size, fve, options)
    else:
        selection = _select_components(terms, lik, fve, hi - lo, options)
    k = selection.chosen
    values, funcs = lik.eigenvalues[:k], funcs_ref[:, :k]
    truncation = np.sum(lik.eigenvalues[k:] * funcs_ref[:, k:] ** 2, axis=1)

    # 6. scores
    if per_subject:
        kept = data.keep_scores(fine, mbins, grid, funcs, values, lik.error_variance)
    else:  # not computed: the fit is returned without its subjects (below)
        kept = Kept.of_arrays(np.zeros((0, k)), np.zeros((0, k, k)))
    fit = FPCAFit(
        grid=_frozen(grid), mean=_frozen(mean), mean_se=_frozen(mean_se),
        covariance=_frozen(cov), diagonal_variance=_frozen(diag_var),
        eigenvalues=_frozen(values), eigenfunctions=_frozen(funcs),
        all_eigenvalues=_frozen(all_values), surface_eigenvalues=_frozen(surface_values),
        fve=_frozen(fve), error_variance=lik.error_variance,
        smoothing_error_variance=sigma2_smooth, likelihood=lik,
        truncation_variance=_frozen(truncation),
        mean_simultaneous_multiplier=np.nan if population_only else _sup_multiplier(
            mean_cov, options.band_level, options.seed),
        diagonal_support=_frozen(design_conditioning_2d(
            grid, cbins.centers, pstats.offdiag.total().counts[0], cov_choice.value, kernel)),
        n_components=k, mean_bandwidth_choice=mean_choice,
        covariance_bandwidth_choice=cov_choice, diagonal_bandwidth_choice=diag_choice,
        selection=selection,
        subjects=_labels(labels), n_obs=_frozen(data.n_obs),
        kept_scores=kept,
        pair_counts=_frozen(pstats.offdiag.counts.sum(axis=0)), pair_grid=_frozen(cbins.centers),
        n_readings=data.n_readings, dropped_eigenvalues=eig.n_dropped,
        dropped_negative_sum=eig.dropped_sum,
        warnings=tuple(messages), options=options,
        _mean_fine=(_frozen(mbins.centers), _frozen(fine)), _sample=sample,
    )
    if not per_subject:
        return fit.without_subjects()
    if options.band == "corrected" and not population_only:
        fit = _with_replicates(fit, data)
    return fit


def _with_replicates(fit: FPCAFit, data: Partitioned) -> FPCAFit:
    """Refit the population quantities on resampled subjects (``fpca.bootstrap``).

    Each replicate keeps the main fit's three bandwidths, domain and number of components;
    a resample on which that fit is impossible (too few positive eigenvalues) is skipped
    and counted in a warning.
    """
    opts = replace(
        with_bandwidths(fit.options, fit.mean_bandwidth, fit.covariance_bandwidth,
                        fit.diagonal_bandwidth),
        domain=(float(fit.grid[0]), float(fit.grid[-1])), component_rule="fixed",
        n_components=fit.n_components, band="plugin",
    )
    rng = np.random.default_rng([fit.options.seed, 1])
    n = data.n_subjects
    labels = np.arange(n)
    reps: list[Replicate] = []
    skipped = 0
    for _ in range(fit.options.bootstrap_replicates):
        drawn = data.resample(rng.integers(0, n, n))  # subjects with replacement
        try:
            rf = _fit(drawn, labels, opts, population_only=True)
        except EstimationError:
            skipped += 1
            continue
        reps.append(Replicate(rf.mean, rf.eigenfunctions, rf.eigenvalues, rf.error_variance,
                              rf.truncation_variance))
    notes = list(fit.warnings)
    if skipped:
        notes.append(f"{skipped} of {fit.options.bootstrap_replicates} resamples for the "
                     "corrected bands could not be fitted and were skipped")
    if len(reps) < 2:
        raise EstimationError("the corrected bands need at least two resamples that can be "
                              f"fitted; {len(reps)} could")
    return replace(fit, replicates=tuple(reps), warnings=tuple(notes))


# Components refined by likelihood: those reaching this share of the surface's positive
# variance (capped at max_components); the ones beyond the chosen K absorb variance outside
# the retained span, so that it does not land in sigma^2. Measured over seeds
# (tests/reference/accuracy.py): 0.99 left sigma^2 at 1.6x the truth in the sparsest design
# (an oversmoothed surface misses a component, whose variance then goes to sigma^2); all
# positive components pulled sigma^2 down to 0.5x in some fits of another; 0.999 did neither.
REFINED_FVE = 0.999


def _refined_count(eig: Eigen, options: FPCAOptions) -> int:
    cum = np.cumsum(eig.values) / eig.values.sum()
    k = int(np.searchsorted(cum, REFINED_FVE - 1e-12) + 1)
    k = min(k, options.max_components, eig.values.size)
    if options.component_rule == "fixed" and options.n_components is not None:
        if options.n_components > eig.values.size:
            raise EstimationError(
                f"n_components={options.n_components} is more than the {eig.values.size} "
                "positive eigenvalues that the estimated covariance allows"
            )
        k = max(k, options.n_components)
    return k


# The likelihood refinement uses at most this many subjects (a seeded sample above it).
# Measured at 10^6 subjects: 20 000 give sigma^2 within 0.1% and the eigenvalues within
# 0.5% of the maximum over all subjects, at a few percent of its cost.
REFINE_MAX_SUBJECTS = 20000


def seeded_sample(n_subjects: int, cap: int, seed: int) -> IntArray:
    """All subjects, or a seeded sample of ``cap`` of them (sorted)."""
    if n_subjects <= cap:
        return np.arange(n_subjects, dtype=np.intp)
    rng = np.random.default_rng(seed)
    return np.sort(rng.choice(n_subjects, cap, replace=False)).astype(np.intp)


def _check_refined(lik: LikelihoodFit, level: float) -> None:
    """A likelihood maximum at sigma^2 = 0 is no estimate of the measurement error."""
    if not lik.error_variance > 1e-8 * level:
        raise EstimationError(
            f"the likelihood puts the error variance at {lik.error_variance:.3g}, i.e. zero "
            f"against an average reading variance of {level:.3g}: the components reproduce "
            "every reading exactly, so measurement error and scores cannot be told apart; "
            "lower max_components or fix n_components"
        )


def _sup_multiplier(cov: FloatArray, level: float, seed: int, draws: int = 20000) -> float:
    """Quantile of max_t |Z(t)| / sd(t) for Z ~ N(0, cov): a simultaneous band multiplier.

    Monte Carlo from the estimated covariance of the estimator on the grid (seeded; the
    "sup-t" construction, e.g. Ruppert, Wand & Carroll 2003, Semiparametric Regression,
    sec. 6.5; from memory). Points with zero variance are left out.
    """
    sd = np.sqrt(np.maximum(np.diag(cov), 0.0))
    keep = sd > 1e-12 * max(float(sd.max()), 1e-300)
    if not np.any(keep):
        return float(ndtri(0.5 + level / 2.0))
    corr = cov[np.ix_(keep, keep)] / np.outer(sd[keep], sd[keep])
    values, vectors = np.linalg.eigh(0.5 * (corr + corr.T))
    root = vectors * np.sqrt(np.maximum(values, 0.0))
    # Single precision: the draws' rounding (~1e-7) is far below their Monte Carlo error
    # (~1e-3 for the quantile), and it makes this step 2.5x faster.
    z = np.random.default_rng(seed).standard_normal((draws, values.size), dtype=np.float32)
    z = z @ root.T.astype(np.float32)
    return float(np.quantile(np.max(np.abs(z), axis=1).astype(np.float64), level))


def _surfaces(
    pstats: PairStats, cbins: BinGrid, grid: FloatArray, h: float, h_diag: float,
    kernel: Kernel,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Covariance surface, variance of single readings, and the surface's diagonal (ridge)."""
    off, dg = pstats.offdiag.total(), pstats.diag.total()
    cov = local_linear_binned_2d(grid, cbins.centers, off.counts[0], off.sums[0], h, kernel,
                                 symmetric=True)
    cov = 0.5 * (cov + cov.T)
    diag_var = local_linear_binned_1d(grid, cbins.centers, dg.counts[0], dg.sums[0], h_diag,
                                      kernel)
    if not np.all(np.isfinite(diag_var)):
        raise EstimationError(
            f"the variance of single readings cannot be smoothed at bandwidth {h_diag:.4g}: "
            "some grid points have too few readings nearby"
        )
    ridge = local_quadratic_diagonal_2d(
        grid, cbins.centers, off.counts[0], off.sums[0], h, kernel
    )
    # Where the quadratic is undetermined (thin data at the corners), use the plane's value.
    ridge = np.where(np.isfinite(ridge), ridge, np.diag(cov))
    return cov, diag_var, ridge


def _mean_covariance(
    pstats: PairStats, cbins: BinGrid, grid: FloatArray, h: float, kernel: Kernel
) -> FloatArray:
    """Cluster-robust covariance of the mean smoother on the grid, (n_grid, n_grid).

    With equivalent-kernel weights l(x) on the covariance bins, the estimate's deviation is
    sum_i l(x)' u_i over subjects (u_i: the subject's binned residuals), so its covariance
    is estimated by L (sum_i u_i u_i') L': the sandwich estimator with subjects as
    clusters (Liang & Zeger 1986, Biometrika 73:13-22; applied to a linear smoother).
    Smoothing bias is not included.
    """
    counts = pstats.diag.counts.sum(axis=0)
    weights = equivalent_kernel_1d(grid, cbins.centers, counts, h, kernel)
    out: FloatArray = weights @ pstats.cross @ weights.T
    return 0.5 * (out + out.T)


def _select_components(
    terms: SampleTerms, lik: LikelihoodFit, fve: FloatArray, span: float,
    options: FPCAOptions,
) -> ComponentSelection:
    """Every criterion for K = 1 .. K', each K with its own likelihood maximum.

    For K < K' the likelihood is maximised again over (lambda_1..K, sigma^2) with the first
    K eigenfunctions, so that AIC and BIC compare maxima (the error variance of a smaller
    model absorbs the components it leaves out). Parameters counted: K eigenvalues and
    sigma^2. BIC's sample size is the number of subjects (the independent units).
    """
    k_max = lik.eigenvalues.size
    cum = np.cumsum(fve)[:k_max]
    n_used = terms.sums.rr.size
    if n_used > options.criteria_max_subjects:
        keep = seeded_sample(n_used, options.criteria_max_subjects, options.seed)
        terms = terms.subjects(keep)
    params: list[tuple[FloatArray, float]] = []
    loglik = np.empty(k_max)
    for k in range(1, k_max + 1):
        left_out = float(np.sum(lik.eigenvalues[k:])) / span  # average of sum phi^2
        fit_k = maximise(terms.sums.leading(k), lik.eigenvalues[:k],
                         lik.error_variance + left_out)
        params.append((fit_k.eigenvalues, fit_k.error_variance))
        loglik[k - 1] = fit_k.loglik
    loo = loo_errors(terms, params)
    ks = np.arange(1, k_max + 1)
    n_crit = terms.sums.rr.size
    aic = -2.0 * loglik + 2.0 * (ks + 1)
    bic = -2.0 * loglik + (ks + 1) * np.log(n_crit)
    chosen = choose(
        options.component_rule, k_max, cum, aic, bic, loo, options.fve_threshold,
        options.n_components,
    )
    return ComponentSelection(options.component_rule, chosen, ks, cum, aic, bic, loo, n_crit)


def _fixed_selection(k_max: int, fve: FloatArray, options: FPCAOptions) -> ComponentSelection:
    """The selection record of a fit whose K is fixed and whose criteria were skipped."""
    if options.component_rule != "fixed" or options.n_components is None:
        raise EstimationError("population_only fits need a fixed number of components")
    none = np.full(k_max, np.nan)
    return ComponentSelection("fixed", options.n_components, np.arange(1, k_max + 1),
                              np.cumsum(fve)[:k_max], none, none, none, 0)


def with_bandwidths(options: FPCAOptions, mean_h: float, cov_h: float, diag_h: float
                    ) -> FPCAOptions:
    """The same options with the three bandwidths fixed (used by the sensitivity runs)."""
    return replace(options, mean_bandwidth=mean_h, covariance_bandwidth=cov_h,
                   diagonal_bandwidth=diag_h)
