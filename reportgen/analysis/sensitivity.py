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


def sensitivity_factors(spec: Spec, fit: FPCAFit) -> tuple[list[float], str]:
    """The factors to run and a sentence on how they were chosen.

    Factors given in the spec are used as given. The default ones (0.5, 0.75, 1.5, 2) below 1
    are raised to the smallest factor at which every smoother is still defined, so that the
    default settings can be computed for the data at hand.
    """
    wanted = spec.sensitivity.factors
    if spec.sensitivity.given:
        return [float(f) for f in wanted], "Factors as given in the spec."
    floor = _smallest_feasible_factor(fit)
    lifted = math.ceil(floor * 100) / 100  # the factor run: the floor rounded up
    factors = sorted({max(f, lifted) if f < 1 else f for f in wanted})
    factors = [f for f in factors if f != 1.0]
    raised = [f for f in wanted if f < floor]
    note = (
        "Default factors 0.5, 0.75, 1.5 and 2"
        + (
            f"; {', '.join(f'{f:g}' for f in raised)} raised to {lifted:g}, the smallest factor "
            "at which every automatically chosen bandwidth stays at or above its smallest "
            "feasible candidate"
            if raised
            else ""
        )
        + "."
    )
    return factors, note


def run_sensitivity(
    data: Partitioned, labels: Labels, fit: FPCAFit, factors: list[float], progress: Progress
) -> list[SensitivityRun]:
    """Refit at each bandwidth factor, keeping the main fit's number of components so that
    every component can be compared (the number the rule would pick is reported too)."""
    runs = []
    for factor in factors:
        hm, hc = factor * fit.mean_bandwidth, factor * fit.covariance_bandwidth
        hd = factor * fit.diagonal_bandwidth
        progress(f"sensitivity: bandwidths x {factor:g}")
        # Plug-in bands: the sensitivity fits are compared by their estimates, not bands.
        options = replace(
            with_bandwidths(fit.options, hm, hc, hd),
            band="plugin",
            component_rule="fixed",
            n_components=fit.n_components,
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
            runs.append(SensitivityRun(factor, hm, hc, hd, None, (), str(e)))
            continue
        sims = tuple(
            similarity(fit.grid, fit.eigenfunctions[:, k], other.eigenfunctions[:, k])
            if k < other.n_components
            else float("nan")
            for k in range(fit.n_components)
        )
        runs.append(SensitivityRun(factor, hm, hc, hd, other, sims))
    return runs


def stability(runs: list[SensitivityRun], n_components: int, threshold: float) -> list[bool | None]:
    """Per component: stable when every computed setting's similarity reaches
    ``threshold``; None when no setting could be computed."""
    computed = [r for r in runs if r.fit is not None]
    return [
        all(np.nan_to_num(r.similarity[k]) >= threshold for r in computed) if computed else None
        for k in range(n_components)
    ]
