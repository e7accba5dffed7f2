"""The sparse FPCA fit: the order of the steps that make an :class:`FPCAFit`.

Steps (Yao, Müller & Wang 2005, JASA 100:577-590, doi:10.1198/016214504000001745):

1. mean: local linear smooth of all pooled readings (``smoothing.local_linear_binned_1d``);
2. covariance: 2-D local linear smooth of the raw covariances of pairs j != l within a
   subject (``smoothing.local_linear_binned_2d``); the readings' own squares (j = l) carry
   sigma^2 on top and are smoothed separately in 1-D (:func:`_surfaces`);
3. eigen-decomposition with trapezoid weights (``components.eigen_decompose``), and the
   smoothing estimate of the error variance, the mean of (diagonal smooth - surface
   diagonal) over the middle half of the domain (:func:`_error_variance`; it may be zero
   or negative and is never floored: it only starts step 4);
4. likelihood refinement of the eigenvalues and the error variance with the eigenfunctions
   fixed (``likelihood.maximise``, over a seeded sample of at most REFINE_MAX_SUBJECTS);
   then the eigenfunctions too, over a spline basis, used where the held-out likelihood
   prefers them (``refine.choose_functions``; the eigenvalues and sigma^2 refitted for them);
5. number of components by FVE, AIC, BIC, leave-one-reading-out error or fixed
   (``selection``);
6. scores and their error covariance by conditional expectation (``plan`` pass 3, the
   formulas in ``scores``), kept where they were computed; with ``band: corrected`` the
   population quantities refitted on resampled subjects (``predictor.corrected_bands``).

Every step that touches readings is a pass over the data's parts (``plan``), so that the
same fit runs in this process or on a cluster with the same bits. Every number is computed
on one BLAS thread, so that it does not depend on the machine's core count or load.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
from scipy.special import ndtri

from .._threads import one_blas_thread
from ..errors import EstimationError
from . import refusals
from .arrays import FloatArray, IntArray
from .bandwidth import EXTEND_TO, BandwidthChoice, candidate_bandwidths, select_bandwidth
from .components import (
    Eigen,
    eigen_decompose,
)
from .design import BinnedStats, PairStats, Sample, assign_folds, seeded_sample
from .likelihood import LikelihoodFit, maximise, starting_error_variance
from .meanband import (
    JACKKNIFE_MAX_SUBJECTS,
    MEAN_RESAMPLES,
    LocalFits,
    bootstrap_t,
    local_fits,
    mean_band,
    resample_counts,
)
from .options import FPCAOptions
from .plan import Part, Partitioned, PartResults, ResidualSize
from .predictor import Predictor, corrected_variance
from .refine import choose_functions
from .result import BandChoice, FPCAFit, Labels, MeanMultiplier, as_labels, frozen
from .scores import SampleTerms, sample_terms
from .selection import fixed_selection, select_components
from .smoothing import (
    BinGrid,
    Kernel,
    design_conditioning_2d,
    get_kernel,
    hat_diagonal_1d,
    hat_diagonal_2d,
    local_linear_binned_1d,
    local_linear_binned_2d,
    local_quadratic_diagonal_2d,
    trapezoid_weights,
)


def _choose_bandwidth(
    setting: float | str,
    stats: BinnedStats,
    bins: BinGrid,
    n_subjects: int,
    dim: int,
    method: str,
    kernel: Kernel,
    eval_points: np.ndarray,
    what: str,
) -> BandwidthChoice:
    if dim == 1:

        def smooth(ev: FloatArray | None, c: FloatArray, s: FloatArray, h: float) -> FloatArray:
            return local_linear_binned_1d(
                bins.centers if ev is None else ev, bins.centers, c, s, h, kernel
            )

        def hat(c: FloatArray, h: float) -> FloatArray:
            return hat_diagonal_1d(bins.centers, c, h, kernel)
    else:

        def smooth(ev: FloatArray | None, c: FloatArray, s: FloatArray, h: float) -> FloatArray:
            return local_linear_binned_2d(
                bins.centers if ev is None else ev, bins.centers, c, s, h, kernel, True
            )

        def hat(c: FloatArray, h: float) -> FloatArray:
            return hat_diagonal_2d(bins.centers, c, h, kernel, True)

    if setting != "auto":
        h = float(setting)
        total = stats.total()
        est = smooth(eval_points, total.counts[0], total.sums[0], h)
        if not np.all(np.isfinite(est)):
            bad = ~np.isfinite(est) if est.ndim == 1 else ~np.all(np.isfinite(est), axis=1)
            raise EstimationError(
                refusals.smoother_undefined(
                    what, h, True, np.sort(eval_points[bad]), eval_points.size
                )
            )
        return BandwidthChoice(h, "fixed")
    span = bins.upper - bins.lower
    candidates = candidate_bandwidths(span, bins.width, n_subjects, dim)
    return select_bandwidth(
        stats, candidates, method, smooth, hat, eval_points, what, extend_to=EXTEND_TO * span
    )


def _edge_warning(choice: BandwidthChoice, what: str) -> list[str]:
    if choice.method == "fixed" or not choice.candidates:
        return []
    feasible = [
        h for h, c in zip(choice.candidates, choice.criterion, strict=True) if np.isfinite(c)
    ]
    if choice.value == min(feasible) and len(feasible) > 1:
        return [
            f"the {what} bandwidth {choice.value:.4g} is the smallest feasible candidate; "
            "the criterion may prefer a still smaller one"
        ]
    if choice.value == max(feasible) and len(feasible) > 1:
        return [
            f"the {what} bandwidth {choice.value:.4g} is the largest candidate ("
            f"{EXTEND_TO:g} x the length of the domain): the smoother is close to a global "
            "straight line or plane; the data show little structure at smaller scales"
        ]
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


def _check_variation(found: ResidualSize) -> None:
    """Readings that do not vary around the mean leave nothing to decompose.

    "Do not vary" is relative to the size of the values (1e-10 of the largest absolute
    value): constant data give residuals at rounding level, whose covariance would
    otherwise yield components made of rounding noise.
    """
    size, ss, n = found.largest, found.squares, found.n
    rms = float(np.sqrt(ss / n))
    if not rms > 1e-10 * size:
        raise EstimationError(
            f"the readings show no variation between subjects: the root mean square "
            f"deviation from the mean is {rms:.3g} for values of size up to {size:.3g}"
        )


def _check_design(data: Partitioned, lo: float, hi: float) -> None:
    outside = data.count_outside(lo, hi)
    if outside:
        raise EstimationError(refusals.outside_domain(outside, lo, hi))
    n_multi = int(np.count_nonzero(data.n_obs >= 2))
    if n_multi < 2:
        raise EstimationError(refusals.too_few_pairs(n_multi, data.n_subjects))
    if not hi > lo:
        raise EstimationError(refusals.one_time(lo))


def fit_arrays(
    subject: IntArray,
    t: FloatArray,
    y: FloatArray,
    labels: np.ndarray,
    options: FPCAOptions = FPCAOptions(),
    *,
    population_only: bool = False,
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
    with one_blas_thread():
        sample = Sample.from_arrays(subject, t, y)
        data = Partitioned.local([Part(sample, np.arange(sample.n_subjects, dtype=np.intp))])
        return _fit(data, labels, options, population_only, per_subject, sample)


def fit_parts(
    data: Partitioned,
    labels: Labels,
    options: FPCAOptions = FPCAOptions(),
    *,
    per_subject: bool = True,
    sample: Sample | None = None,
) -> FPCAFit:
    """Fit sparse FPCA to readings held in parts (``fpca.plan``), whoever executes the passes.

    ``labels[code]`` is the id of the subject with that code. The result depends on the
    data and on how they are split into parts, not on the executor. ``sample``, when the
    caller holds all readings (coded as the parts are), is kept for the trajectories'
    corrected bands; without it the fit cannot draw trajectories. A data set of one part
    gives exactly :func:`fit_arrays`'s result.
    """
    with one_blas_thread():
        return _fit(data, labels, options, False, per_subject, sample)


def _fit(
    data: Partitioned,
    labels: Labels,
    options: FPCAOptions,
    population_only: bool,
    per_subject: bool = True,
    sample: Sample | None = None,
) -> FPCAFit:
    lo, hi = options.fitted_domain(data.t_min, data.t_max)
    _check_design(data, lo, hi)
    kernel = get_kernel(options.kernel)
    grid = np.linspace(lo, hi, options.n_grid)
    auto = "auto" in (
        options.mean_bandwidth,
        options.covariance_bandwidth,
        options.diagonal_bandwidth,
    )
    n_subjects = data.n_subjects
    n_folds = min(options.cv_folds, n_subjects) if auto else 1
    method = options.bandwidth_method
    folds = assign_folds(n_subjects, n_folds, options.seed)
    messages: list[str] = []

    # 1. mean
    mbins = BinGrid(lo, hi, options.mean_bins)
    mstats = data.reading_sums(folds, mbins, n_folds)
    mean_choice = _choose_bandwidth(
        options.mean_bandwidth,
        mstats,
        mbins,
        n_subjects,
        1,
        method,
        kernel,
        np.concatenate([grid, mbins.centers]),
        "mean",
    )
    total = mstats.total()
    fine = local_linear_binned_1d(
        mbins.centers, mbins.centers, total.counts[0], total.sums[0], mean_choice.value, kernel
    )
    mean = np.interp(grid, mbins.centers, fine)

    # 2. covariance surface, and the variance of single readings on its own bandwidth
    cbins = BinGrid(lo, hi, options.covariance_bins)
    pstats, size = data.residual_sums(folds, fine, mbins, cbins, n_folds)
    _check_variation(size)
    cov_choice = _choose_bandwidth(
        options.covariance_bandwidth,
        pstats.offdiag,
        cbins,
        n_subjects,
        2,
        method,
        kernel,
        grid,
        "covariance",
    )
    diag_choice = _choose_bandwidth(
        options.diagonal_bandwidth,
        pstats.diag,
        cbins,
        n_subjects,
        1,
        method,
        kernel,
        grid,
        "diagonal",
    )
    cov, diag_var, ridge = _surfaces(
        pstats, cbins, grid, cov_choice.value, diag_choice.value, kernel
    )
    band_centre, mean_cov, quadratic = mean_band(
        pstats, total.counts[0], total.sums[0], mbins, cbins, grid, mean_choice.value, kernel
    )
    uncorrected = int(np.sum(~quadratic))
    jackknife = not population_only and n_subjects <= JACKKNIFE_MAX_SUBJECTS
    fits: LocalFits | None = None
    if jackknife:
        fits = local_fits(
            grid,
            mbins,
            total.counts[0],
            total.sums[0],
            mean_choice.value,
            options.kernel,
            quadratic,
        )
        covs, undefined, df = data.jackknife([fits], [mean_cov], options.band_level)
        mean_cov, one_subject, mean_df = covs[0], undefined[0], df[0]
    else:
        one_subject, mean_df = np.zeros(grid.size, dtype=bool), np.full(grid.size, np.nan)
    mean_se = np.sqrt(np.maximum(np.diag(mean_cov), 0.0))
    # subjects behind the mean at each grid time; no band where fewer than MIN_SUPPORT
    support = (
        np.full(grid.size, n_subjects, dtype=np.int64)
        if population_only
        else data.support(grid, mean_choice.value)
    )
    # more than a grid step beyond the readings, the curves are extrapolated
    step = (hi - lo) / max(grid.size - 1, 1)
    inside = (grid >= data.t_min - step) & (grid <= data.t_max + step)
    supported = (support >= MIN_SUPPORT) & inside & ~one_subject
    mean_se = np.where(supported, mean_se, np.nan)
    mean_df = np.where(supported, mean_df, np.nan)
    if not np.all(supported):
        messages.append(
            f"no band is drawn at {int(np.sum(~supported))} of {grid.size} grid times "
            f"({_spans(grid, ~supported)}), for the mean or the trajectories: there fewer "
            f"than {MIN_SUPPORT} subjects have a reading within the mean's bandwidth (a "
            "cluster-robust variance from so few subjects is too small)"
            + (
                ", or the time lies outside the readings' range (the curves there are extrapolated)"
                if not np.all(inside)
                else ""
            )
            + (
                ", or leaving out one subject leaves the local fit there undefined (the "
                "mean there rests on that subject's readings)"
                if np.any(one_subject)
                else ""
            )
        )
    if not jackknife and not population_only:
        messages.append(
            f"the mean's band uses the cluster-robust sandwich variance (above "
            f"{JACKKNIFE_MAX_SUBJECTS:,} subjects the jackknife over subjects costs more and "
            "changes little)"
        )
    # The mean's band needs MIN_SUPPORT subjects in effect behind its variance too: the
    # jackknife's effective degrees of freedom count them (one subject's readings that
    # dominate the local fit count as about one). Below, the variance and its bootstrap-t
    # rest on a handful of subjects: a resample without the dominant one moved the centre
    # by 58 of its own standard errors, and the multiplier to 4x the normal one
    # (benchmarks/CHOICES.md).
    few = supported & (mean_df < MIN_SUPPORT)
    banded = supported & ~few
    if np.any(few):
        mean_se = np.where(banded, mean_se, np.nan)
        mean_df = np.where(banded, mean_df, np.nan)
        messages.append(
            f"no band is drawn for the mean at {int(np.sum(few))} of {grid.size} grid times "
            f"({_spans(grid, few)}): there its variance rests in effect on fewer than "
            f"{MIN_SUPPORT} subjects (the jackknife's effective degrees of freedom: a few "
            "subjects' readings carry most of it); the trajectories keep theirs"
        )
    mean_multiplier = (
        MeanMultiplier()
        if population_only or not np.any(banded)
        else _mean_multiplier(data, fits, band_centre, mean_cov, banded, options)
    )
    if mean_multiplier.method == "bootstrap-t" and mean_multiplier.undefined:
        messages.append(
            f"{mean_multiplier.undefined} of {MEAN_RESAMPLES} resamples of subjects leave the "
            "mean's local fit or its jackknife undefined somewhere the band is drawn (too few "
            "readings there in the resample); they count as beyond the band in its "
            "bootstrap-t multiplier"
        )
    if uncorrected:
        messages.append(
            f"the mean's band is not bias-corrected at {uncorrected} of {grid.size} grid times "
            "(too few distinct reading times there for a local quadratic fit); it uses the "
            "local linear fit and its variance there"
        )

    # 3. eigen-decomposition; smoothing estimate of the error variance (a starting point)
    eig = eigen_decompose(grid, cov)
    messages += (
        _edge_warning(mean_choice, "mean")
        + _edge_warning(cov_choice, "covariance")
        + _edge_warning(diag_choice, "diagonal")
    )
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
    terms = sample_terms(
        chosen, np.arange(used.size, dtype=np.intp), chosen_resid, grid, eig.functions[:, :k_ref]
    )
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
        messages.append(
            f"the likelihood refinement stopped after {lik.iterations} "
            "iterations without meeting its convergence tolerance"
        )
    # 4b. the eigenfunctions refined by likelihood over a spline basis (started from the
    # surface's eigenvalues: a component the first step gave no variance may have one with
    # a better shape), kept where the held-out likelihood prefers them (``refine``); then
    # lambda and sigma^2 again for exactly the functions on the grid
    # one component more than step 4's: the next mode's shape on the surface may be poor
    # while the likelihood finds it (a mode dwarfed by a dominant one)
    k_fun = min(k_ref + 1, options.max_components, eig.values.size)
    funcs_ref, surface_ref = eig.functions[:, :k_ref], eig.values[:k_ref]
    source, refined = choose_functions(
        chosen,
        chosen_resid,
        grid,
        eig.functions[:, :k_fun],
        eig.values[:k_fun],
        lik,
        options,
        beyond_readings=not np.all(inside),
    )
    if refined is not None:
        new_terms = sample_terms(
            chosen, np.arange(used.size, dtype=np.intp), chosen_resid, grid, refined.functions
        )
        new_lik = maximise(new_terms.sums, refined.eigenvalues, refined.error_variance)
        try:
            _check_refined(new_lik, level)
        except EstimationError:
            # the refined functions reproduce every reading (few readings a subject, one
            # function more than step 4): no error variance is left, so they are not used
            source = replace(
                source,
                used="smoothing",
                reason="the likelihood's put the error variance at "
                f"{new_lik.error_variance:.2g}, i.e. they reproduce every reading; not used",
            )
        else:
            funcs_ref, surface_ref = refined.functions, eig.values[:k_fun]
            terms, lik = new_terms, new_lik
    # Components the likelihood gives no variance (lambda = 0) leave the refined set.
    lik, terms, order = _with_variance(lik, terms)
    funcs_ref, surface_ref = funcs_ref[:, order], surface_ref[order]
    if options.component_rule == "fixed" and (options.n_components or 0) > order.size:
        raise EstimationError(
            f"n_components={options.n_components} is more than the {order.size} components "
            "to which the likelihood gives any variance"
        )
    all_values = np.concatenate([lik.eigenvalues, eig.values[k_ref:]])
    surface_values = np.concatenate([surface_ref, eig.values[k_ref:]])
    fve = all_values / all_values.sum()

    # 5. number of components
    if population_only:
        selection = fixed_selection(lik.eigenvalues.size, fve, options)
    else:
        selection = select_components(terms, lik, fve, hi - lo, options)
    k = selection.chosen
    values, funcs = lik.eigenvalues[:k], funcs_ref[:, :k]
    left_out = funcs_ref[:, k:] * np.sqrt(np.maximum(lik.eigenvalues[k:], 0.0))
    truncation = np.sum(left_out**2, axis=1)
    # the components that enter a band's variance: the retained ones, plus the left-out
    # refined ones when they carry variance (the simultaneous band's degrees of freedom)
    dof = int(lik.eigenvalues.size if np.any(truncation > 0) else k)
    predictor = Predictor(
        frozen(grid),
        frozen(mbins.centers),
        frozen(fine),
        frozen(funcs),
        frozen(values),
        lik.error_variance,
        frozen(truncation),
        options.band_level,
        dof,
        None if population_only else frozen(supported.astype(np.float64)),
        frozen(left_out),
    )

    # 6. scores
    if per_subject:
        kept = data.keep_scores(fine, mbins, grid, funcs, values, lik.error_variance)
    else:  # not computed: the fit is returned without its subjects (below)
        kept = PartResults.of_arrays(np.zeros((0, k)), np.zeros((0, k, k)))
    fit = FPCAFit(
        grid=predictor.grid,
        mean=frozen(mean),
        mean_se=frozen(mean_se),
        mean_band_centre=frozen(band_centre),
        mean_covariance=frozen(mean_cov),
        mean_variance="jackknife" if jackknife else "sandwich",
        mean_degrees_of_freedom=frozen(mean_df),
        mean_multiplier=mean_multiplier,
        covariance=frozen(cov),
        diagonal_variance=frozen(diag_var),
        eigenvalues=predictor.eigenvalues,
        eigenfunctions=predictor.eigenfunctions,
        all_eigenvalues=frozen(all_values),
        surface_eigenvalues=frozen(surface_values),
        fve=frozen(fve),
        error_variance=lik.error_variance,
        smoothing_error_variance=sigma2_smooth,
        likelihood=lik,
        truncation_variance=predictor.truncation_variance,
        mean_simultaneous_multiplier=mean_multiplier.value,
        mean_support=frozen(support),
        diagonal_support=frozen(
            design_conditioning_2d(
                grid, cbins.centers, pstats.offdiag.total().counts[0], cov_choice.value, kernel
            )
        ),
        n_components=k,
        mean_bandwidth_choice=mean_choice,
        covariance_bandwidth_choice=cov_choice,
        diagonal_bandwidth_choice=diag_choice,
        selection=selection,
        subjects=as_labels(labels),
        n_obs=frozen(data.n_obs),
        kept_scores=kept,
        pair_counts=frozen(pstats.offdiag.counts.sum(axis=0)),
        pair_grid=frozen(cbins.centers),
        n_readings=data.n_readings,
        dropped_eigenvalues=eig.n_dropped,
        dropped_negative_sum=eig.dropped_sum,
        warnings=tuple(messages),
        options=options,
        predictor=predictor,
        _sample=sample,
        functions=source,
        refined_eigenfunctions=frozen(funcs_ref),
    )
    if not per_subject:
        return fit.without_subjects()
    if population_only:
        return fit
    return _with_band(fit, data)


def _with_variance(
    lik: LikelihoodFit, terms: SampleTerms
) -> tuple[LikelihoodFit, SampleTerms, IntArray]:
    """The components the likelihood gives variance, largest first (and their order)."""
    order = np.argsort(-lik.eigenvalues, kind="stable")
    order = order[lik.eigenvalues[order] > 0]
    return replace(lik, eigenvalues=lik.eigenvalues[order]), terms.reorder(order), order


# No band where fewer subjects than this have a reading within the mean's bandwidth: a
# cluster-robust variance from G subjects has about G - 1 degrees of freedom and is biased
# low with few of them, so that at 10 the normal quantile is already 13% short of the
# t(9) one (Cameron & Miller 2015, J. Human Resources 50:317-372, on few clusters; from
# memory).
MIN_SUPPORT = 10


def _spans(grid: FloatArray, mask: np.ndarray) -> str:
    """The grid times in ``mask`` as ranges, e.g. "0-2.5, 9-10"."""
    idx = np.flatnonzero(mask)
    breaks = np.flatnonzero(np.diff(idx) > 1)
    firsts = np.concatenate([[idx[0]], idx[breaks + 1]])
    lasts = np.concatenate([idx[breaks], [idx[-1]]])
    return ", ".join(
        f"{grid[a]:.4g}" if a == b else f"{grid[a]:.4g}-{grid[b]:.4g}"
        for a, b in zip(firsts, lasts, strict=True)
    )


# band: auto takes the corrected band up to this many subjects: its 50 refits then cost a
# few seconds (benchmarks/ACCURACY.md, "cost"); above it, plug-in.
AUTO_CORRECTED_MAX_SUBJECTS = 10000
# Fewer fitted resamples than this and the corrected band is unavailable: the variance of
# the band's variance estimate from B resamples is about 2/B of it squared (common
# practice, no source), so at 20 the band's width is uncertain by about 16%.
MIN_RESAMPLES = 20
# A resample that cannot be smoothed at the main fit's bandwidths is refitted at these
# multiples of all three; one that fails even at the widest is left out, and the band
# states how many of the resamples were fitted (unavailable under MIN_RESAMPLES).
WIDER = (1.5, 2.25, 3.375)


def _with_band(fit: FPCAFit, data: Partitioned) -> FPCAFit:
    asked = fit.options.band
    n = data.n_subjects
    if asked == "plugin":
        return replace(fit, band=BandChoice("plugin", asked, "asked for (model.band: plugin)"))
    if asked == "auto" and n > AUTO_CORRECTED_MAX_SUBJECTS:
        ratio = _width_ratio(fit, data)
        reason = (
            f"{n} subjects, above the {AUTO_CORRECTED_MAX_SUBJECTS} up to which band: auto "
            f"corrects the band; measured here, the corrected band would be {ratio:.3f} times "
            f"as wide ({WIDTH_REFITS} refits on resamples of {WIDTH_SAMPLE} subjects, the "
            "added variance scaled by 1/n to the whole study)"
        )
        return replace(fit, band=BandChoice("plugin", asked, reason, width_ratio=ratio))
    return _with_replicates(fit, data)


# What band: auto measures when it draws the plug-in band: the corrected band's width over
# the plug-in one, from refits on resamples of a seeded sample of subjects (a few seconds).
WIDTH_SAMPLE = 2000
WIDTH_REFITS = 10
_WIDTH_SUBJECTS = 200  # the subjects whose bands are compared


def _width_ratio(fit: FPCAFit, data: Partitioned) -> float:
    """The corrected over the plug-in band's width (median over sampled subjects), scaled
    to the study's size.

    The refits' spread is the population quantities' estimation variance, of order 1/n:
    measured on resamples of m subjects, the excess of the squared ratio over 1 is scaled
    by m / n (``benchmarks/BANDS.md`` has the law checked at several sizes).
    """
    n = data.n_subjects
    chosen = seeded_sample(n, WIDTH_SAMPLE, fit.options.seed)
    m = chosen.size
    mbins = BinGrid(float(fit.grid[0]), float(fit.grid[-1]), fit.options.mean_bins)
    sample, _ = data.gather(chosen, fit.predictor.mean_value, mbins)
    sub = Partitioned.local([Part(sample, np.arange(m, dtype=np.intp))])
    reps = _refits(fit, sub, WIDTH_REFITS)[0]
    if len(reps) < 2:
        return float("nan")
    test = sample.subset(np.arange(min(_WIDTH_SUBJECTS, m), dtype=np.intp))
    _, cov = fit.predictor.scores(test)
    plug = fit.predictor.curve_variance(cov)
    corrected = corrected_variance(tuple(reps), test)
    excess = float(np.median(np.mean(corrected, axis=1) / np.mean(plug, axis=1))) - 1.0
    return float(np.sqrt(1.0 + max(excess, 0.0) * m / n))


def _refits(fit: FPCAFit, data: Partitioned, count: int) -> tuple[list[Predictor], int]:
    """``count`` refits of the population quantities on subjects of ``data`` resampled with
    replacement, each at the main fit's domain, K and bandwidths, or at the multiples
    ``WIDER`` of the bandwidths when those fail (returns the refits and how many widened)."""
    opts = replace(
        fit.options,
        domain=(float(fit.grid[0]), float(fit.grid[-1])),
        component_rule="fixed",
        n_components=fit.n_components,
        band="plugin",
        eigenfunctions=fit.functions.used,  # as the fit: refined or not, without the test
    )
    hs = (fit.mean_bandwidth, fit.covariance_bandwidth, fit.diagonal_bandwidth)
    rng = np.random.default_rng([fit.options.seed, 1])
    n = data.n_subjects
    labels = np.arange(n)
    reps: list[Predictor] = []
    widened = 0
    for _ in range(count):
        drawn = data.resample(rng.integers(0, n, n))  # subjects with replacement
        for factor in (1.0, *WIDER):
            try:
                rf = _fit(
                    drawn,
                    labels,
                    with_bandwidths(opts, *(h * factor for h in hs)),
                    population_only=True,
                )
            except EstimationError:
                continue
            widened += factor != 1.0
            # each resample's predictor, its mean on the main grid
            reps.append(replace(rf.predictor, mean_time=rf.grid, mean_value=rf.mean))
            break
    return reps, widened


def _with_replicates(fit: FPCAFit, data: Partitioned) -> FPCAFit:
    """Refit the population quantities on resampled subjects (``predictor.corrected_bands``).

    Each replicate keeps the main fit's domain and number of components, and its three
    bandwidths; a resample that cannot be fitted at them is fitted at the multiples
    ``WIDER`` of them (counted as widened). Fewer than ``MIN_RESAMPLES`` fitted and the
    band is unavailable (``BandChoice``).
    """
    asked = fit.options.bootstrap_replicates
    reps, widened = _refits(fit, data, asked)
    used = len(reps)
    why = f"{used} of {asked} resamples of subjects fitted" + (
        f" ({widened} at wider bandwidths)" if widened else ""
    )
    if fit.options.band == "auto":
        why += f"; band: auto corrects up to {AUTO_CORRECTED_MAX_SUBJECTS} subjects"
    if used < MIN_RESAMPLES:
        notes = (
            *fit.warnings,
            f"the corrected band is unavailable: {why}, fewer than the {MIN_RESAMPLES} it "
            "needs; no band is drawn rather than a thin one",
        )
        return replace(
            fit,
            warnings=notes,
            band=BandChoice("unavailable", fit.options.band, why, asked, used, widened),
        )
    return replace(
        fit,
        replicates=tuple(reps),
        band=BandChoice("corrected", fit.options.band, why, asked, used, widened),
    )


# Components refined by likelihood: those reaching this share of the surface's positive
# variance (capped at max_components); the ones beyond the chosen K absorb variance outside
# the retained span, so that it does not land in sigma^2 (0.99 and "all" were worse over
# seeds: benchmarks/CHOICES.md).
REFINED_FVE = 0.999


def _refined_count(eig: Eigen, options: FPCAOptions) -> int:
    cum = np.cumsum(eig.values) / eig.values.sum()
    k = int(np.searchsorted(cum, REFINED_FVE - 1e-12) + 1)
    k = min(k, options.max_components, eig.values.size)
    if options.component_rule == "fixed" and options.n_components is not None:
        if options.n_components > eig.values.size:
            raise EstimationError(
                refusals.too_many_components(options.n_components, eig.values.size)
            )
        k = max(k, options.n_components)
    return k


# The likelihood refinement uses at most this many subjects (a seeded sample above it):
# close to the maximum over all subjects at a few percent of its cost (CHOICES.md).
REFINE_MAX_SUBJECTS = 20000


def _check_refined(lik: LikelihoodFit, level: float) -> None:
    """A likelihood maximum at sigma^2 = 0 is no estimate of the measurement error."""
    if not lik.error_variance > 1e-8 * level:
        raise EstimationError(
            f"the likelihood puts the error variance at {lik.error_variance:.3g}, i.e. zero "
            f"against an average reading variance of {level:.3g}: the components reproduce "
            "every reading exactly, so measurement error and scores cannot be told apart; "
            "lower max_components or fix n_components"
        )


def _mean_multiplier(
    data: Partitioned,
    fits: LocalFits | None,
    centre: FloatArray,
    cov: FloatArray,
    banded: np.ndarray,
    options: FPCAOptions,
) -> MeanMultiplier:
    """The mean's simultaneous multiplier over the times ``banded``: the bootstrap-t one over
    resamples of subjects (``meanband.bootstrap_t``) when the band's variance is the
    jackknife's (``fits``), else, or when too many resamples leave the fit undefined where
    the band is drawn, the normal one (kept beside the bootstrap-t for comparison)."""
    level = options.band_level
    normal = _sup_multiplier(cov[np.ix_(banded, banded)], level, options.seed)
    if fits is None:
        return MeanMultiplier(
            "normal",
            normal,
            reason=f"above {JACKKNIFE_MAX_SUBJECTS:,} subjects the mean's band has no "
            "jackknife to resample",
            value=normal,
        )
    n = data.n_subjects
    draws = resample_counts(n, MEAN_RESAMPLES, options.seed)
    coef, singular, spread = data.mean_resamples(fits, draws)
    found = bootstrap_t(centre, banded, coef, singular, spread, n, level)
    if np.isfinite(found.multiplier):
        return MeanMultiplier(
            "bootstrap-t", normal, MEAN_RESAMPLES, found.undefined, value=found.multiplier
        )
    return MeanMultiplier(
        "normal",
        normal,
        MEAN_RESAMPLES,
        found.undefined,
        reason=f"{found.undefined} of {MEAN_RESAMPLES} resamples of subjects leave the "
        "mean's local fit or its jackknife undefined where the band is drawn, too many for "
        "a bootstrap-t multiplier",
        value=normal,
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
    # (~1e-3 for the quantile), and the step is faster.
    z = np.random.default_rng(seed).standard_normal((draws, values.size), dtype=np.float32)
    z = z @ root.T.astype(np.float32)
    return float(np.quantile(np.max(np.abs(z), axis=1).astype(np.float64), level))


def _surfaces(
    pstats: PairStats,
    cbins: BinGrid,
    grid: FloatArray,
    h: float,
    h_diag: float,
    kernel: Kernel,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Covariance surface, variance of single readings, and the surface's diagonal (ridge)."""
    off, dg = pstats.offdiag.total(), pstats.diag.total()
    cov = local_linear_binned_2d(
        grid, cbins.centers, off.counts[0], off.sums[0], h, kernel, symmetric=True
    )
    cov = 0.5 * (cov + cov.T)
    diag_var = local_linear_binned_1d(grid, cbins.centers, dg.counts[0], dg.sums[0], h_diag, kernel)
    if not np.all(np.isfinite(diag_var)):
        raise EstimationError(
            f"the variance of single readings cannot be smoothed at bandwidth {h_diag:.4g}: "
            "some grid points have too few readings nearby"
        )
    ridge = local_quadratic_diagonal_2d(grid, cbins.centers, off.counts[0], off.sums[0], h, kernel)
    # Where the quadratic is undetermined (thin data at the corners), use the plane's value.
    ridge = np.where(np.isfinite(ridge), ridge, np.diag(cov))
    return cov, diag_var, ridge


def with_bandwidths(
    options: FPCAOptions, mean_h: float, cov_h: float, diag_h: float
) -> FPCAOptions:
    """The same options with the three bandwidths fixed (used by the sensitivity runs)."""
    return replace(
        options, mean_bandwidth=mean_h, covariance_bandwidth=cov_h, diagonal_bandwidth=diag_h
    )
