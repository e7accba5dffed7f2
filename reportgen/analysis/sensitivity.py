"""How the estimates move when the bandwidths move: refits at each factor times the main
fit's three bandwidths, and a stable / not stable verdict per component."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, replace

import numpy as np

from ..errors import EstimationError
from ..fpca.fit import fit_parts, with_bandwidths
from ..fpca.plan import Partitioned
from ..fpca.result import FPCAFit, Labels
from ..fpca.smoothing import trapezoid_weights
from ..inputs.spec import Spec

Progress = Callable[[str], None]


@dataclass(frozen=True)
class SensitivityRun:
    factor: float
    mean_bandwidth: float
    covariance_bandwidth: float
    diagonal_bandwidth: float
    fit: FPCAFit | None
    similarity: tuple[float, ...]  # |<phi_k main, phi_k run>| for k = 1..K of the main fit
    error: str = ""


def similarity(grid: np.ndarray, a: np.ndarray, b: np.ndarray) -> float:
    """|<a, b>| in L2 over the grid (trapezoid weights)."""
    return float(abs(trapezoid_weights(grid) @ (a * b)))


def _smallest_feasible_factor(fit: FPCAFit) -> float:
    """The smallest factor at which every automatically chosen bandwidth stays feasible:
    the largest ratio of a smoother's smallest feasible candidate to its chosen bandwidth."""
    ratios = [
        min(h for h, c in zip(ch.candidates, ch.criterion, strict=True) if np.isfinite(c))
        / ch.value
        for ch in (
            fit.mean_bandwidth_choice,
            fit.covariance_bandwidth_choice,
            fit.diagonal_bandwidth_choice,
        )
        if ch.candidates
    ]
    return max(ratios, default=0.0)


def sensitivity_factors(spec: Spec, fit: FPCAFit) -> tuple[list[float], str, float | None]:
    """The factors to run, a sentence on how they were chosen, and the factor a default
    one below 1 is raised to when it cannot be fitted (``None``: factors given in the spec,
    which are used as given, or no such factor below 1).

    The default factors (0.5, 0.75, 1.5, 2) are tried as they are; the fallback is the
    smallest factor at which every automatically chosen bandwidth stays at or above its
    smallest feasible candidate, rounded up to two decimals.
    """
    wanted = spec.sensitivity.factors
    if spec.sensitivity.given:
        return [float(f) for f in wanted], "Factors as given in the spec.", None
    lifted = math.ceil(_smallest_feasible_factor(fit) * 100) / 100  # the factor run
    factors = sorted({float(f) for f in wanted if f != 1.0})
    return factors, "Default factors 0.5, 0.75, 1.5 and 2.", lifted if lifted < 1 else None


def run_sensitivity(
    data: Partitioned,
    labels: Labels,
    fit: FPCAFit,
    factors: list[float],
    progress: Progress,
    fallback: float | None = None,
) -> tuple[list[SensitivityRun], str]:
    """Refit at each bandwidth factor, keeping the main fit's number of components so that
    every component can be compared (the number the rule would pick is reported too).

    A factor below 1 that cannot be fitted is tried at ``fallback`` instead (once, when
    that is larger); returns the runs and a sentence on what was raised ("" if nothing)."""
    runs: list[SensitivityRun] = []
    raised: list[tuple[float, str]] = []
    for factor in factors:
        run = _refit(data, labels, fit, factor, progress)
        if run.fit is None and fallback is not None and factor < fallback:
            raised.append((factor, run.error))
            if any(r.factor == fallback for r in runs):
                continue
            run = _refit(data, labels, fit, fallback, progress)
        runs.append(run)
    runs.sort(key=lambda r: r.factor)
    if not raised:
        return runs, ""
    which = ", ".join(f"{f:g}" for f, _ in raised)
    ok = any(r.factor == fallback and r.fit is not None for r in runs)
    return runs, (
        f" {which} could not be fitted ({raised[0][1]})"
        + (
            f"; raised to {fallback:g}, the smallest factor at which every automatically "
            "chosen bandwidth stays at or above its smallest feasible candidate."
            if ok
            else "."
        )
    )


def _refit(
    data: Partitioned, labels: Labels, fit: FPCAFit, factor: float, progress: Progress
) -> SensitivityRun:
    hm, hc = factor * fit.mean_bandwidth, factor * fit.covariance_bandwidth
    hd = factor * fit.diagonal_bandwidth
    progress(f"sensitivity: bandwidths x {factor:g}")
    # Plug-in bands: the sensitivity fits are compared by their estimates, not bands.
    # the main fit's eigenfunctions' source (refined or not), without its held-out test:
    # a setting changes the bandwidths only
    options = replace(
        with_bandwidths(fit.options, hm, hc, hd),
        band="plugin",
        component_rule="fixed",
        n_components=fit.n_components,
        eigenfunctions=fit.functions.used,
    )
    # only the population parts are compared: the refit's scores and readings would
    # double the memory of the run at large sizes
    try:
        try:
            other = fit_parts(data, labels, options, per_subject=False)
        except EstimationError:  # fewer positive eigenvalues than the main fit's K
            other = fit_parts(
                data, labels, replace(options, component_rule="fve"), per_subject=False
            )
    except EstimationError as e:
        return SensitivityRun(factor, hm, hc, hd, None, (), str(e))
    sims = tuple(
        similarity(fit.grid, fit.eigenfunctions[:, k], other.eigenfunctions[:, k])
        if k < other.n_components
        else float("nan")
        for k in range(fit.n_components)
    )
    return SensitivityRun(factor, hm, hc, hd, other, sims)


def directions(runs: list[SensitivityRun]) -> str:
    """ "" when settings both below and above 1 were computed; otherwise which side was
    tried (a verdict from one side only is weaker, and says so)."""
    below = any(r.fit is not None and r.factor < 1 for r in runs)
    above = any(r.fit is not None and r.factor > 1 for r in runs)
    if below and above:
        return ""
    if above:
        return "only larger bandwidths tried"
    if below:
        return "only smaller bandwidths tried"
    return "no setting computed"


@dataclass(frozen=True)
class MeanMove:
    """How far a setting's mean strays from the main fit's: the largest ratio of the
    difference to the main mean's simultaneous band half-width, and where."""

    factor: float
    ratio: float
    time: float
    main: float
    moved: float


def mean_moves(runs: list[SensitivityRun], fit: FPCAFit) -> list[MeanMove]:
    """Per computed setting, the mean's largest move in units of the main fit's
    simultaneous band half-width (over grid times with a band). The mean is stable when
    every ratio is at most 1: each setting's mean inside the band."""
    half = fit.mean_simultaneous_multiplier * fit.mean_se
    ok = np.isfinite(half) & (half > 0)
    out = []
    for r in runs:
        if r.fit is None or not np.any(ok):
            continue
        ratio = np.where(ok, np.abs(r.fit.mean - fit.mean) / np.where(ok, half, 1.0), 0.0)
        j = int(np.argmax(ratio))
        out.append(
            MeanMove(
                r.factor,
                float(ratio[j]),
                float(fit.grid[j]),
                float(fit.mean[j]),
                float(r.fit.mean[j]),
            )
        )
    return out


def stability(runs: list[SensitivityRun], n_components: int, threshold: float) -> list[bool | None]:
    """Per component: stable when every computed setting's similarity reaches
    ``threshold``; None when no setting could be computed."""
    computed = [r for r in runs if r.fit is not None]
    return [
        all(np.nan_to_num(r.similarity[k]) >= threshold for r in computed) if computed else None
        for k in range(n_components)
    ]
