"""What a fit would refuse, found from the design alone (no fit; numpy only, unless the
fit's compiled kernels are loaded already).

``reportgen check`` calls this so that "usable" means that ``run`` will get past its
feasibility tests: readings inside the domain, two subjects with two or more readings,
readings that vary, and smoothers that are defined everywhere on the grid at the largest
bandwidth the fit would try (a local linear fit is defined where its window holds enough
distinct binned points; a larger window holds more, so when the largest candidate leaves a
grid point undefined, every candidate does). It uses the fit's own binning (linear) and
smoothers on counts only.

Not covered: the cross-validation folds (a fold whose training part leaves a bin with data
undefined makes a candidate fail; when all fail the run says so).
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from itertools import pairwise
from typing import Any

import numpy as np

from . import refusals
from .arrays import FloatArray, IntArray
from .bandwidth import candidate_bandwidths
from .options import FPCAOptions
from .smoothing import BinGrid, get_kernel, local_linear_binned_1d, local_linear_binned_2d

_CHUNK = 20_000  # subjects per block of the pair counts (memory ~ chunk x bins x 8 bytes)


def _reading_counts(t: FloatArray, bins: BinGrid) -> FloatArray:
    left, f = bins.locate(t)
    return np.bincount(left, 1.0 - f, bins.n_bins) + np.bincount(left + 1, f, bins.n_bins)


def pair_counts(subject: IntArray, t: FloatArray, bins: BinGrid) -> FloatArray:
    """Linearly binned counts of the pairs (t_ij, t_il), j != l, shape (n_bins, n_bins).

    Per subject, the pairs' weights are the outer product of the readings' bin weights
    minus each reading's product with itself. When the fit's compiled kernels are loaded
    already (``run``, not ``check``), their pair pass counts instead: the same numbers to
    rounding (``tests/test_fast_paths.py``), several times faster.
    """
    kernels = sys.modules.get("reportgen.fpca._kernels")
    if kernels is not None and subject.size:
        return _compiled_pair_counts(kernels, subject, t, bins)
    b = bins.n_bins
    left, f = bins.locate(t)
    order = np.argsort(subject, kind="stable")
    subject, left, f = subject[order], left[order], f[order]
    out = np.zeros((b, b))
    n_subjects = int(subject.max()) + 1 if subject.size else 0
    edges = np.searchsorted(subject, np.arange(0, n_subjects + _CHUNK, _CHUNK))
    for lo, hi in pairwise(edges.tolist()):
        if hi <= lo:
            continue
        s = subject[lo:hi] - subject[lo]
        m = int(s[-1]) + 1
        w = (
            np.bincount(s * b + left[lo:hi], 1.0 - f[lo:hi], m * b)
            + np.bincount(s * b + left[lo:hi] + 1, f[lo:hi], m * b)
        ).reshape(m, b)
        out += w.T @ w
    own = np.zeros(b * b)
    for da, wa in ((0, 1.0 - f), (1, f)):
        for db, wb in ((0, 1.0 - f), (1, f)):
            own += np.bincount((left + da) * b + left + db, wa * wb, b * b)
    return np.maximum(out - own.reshape(b, b), 0.0)


def _compiled_pair_counts(
    kernels: Any, subject: IntArray, t: FloatArray, bins: BinGrid
) -> FloatArray:
    order = np.argsort(subject, kind="stable")
    sorted_codes = subject[order]
    n_subjects = int(sorted_codes[-1]) + 1
    starts = np.searchsorted(sorted_codes, np.arange(n_subjects)).astype(np.intp)
    times = np.ascontiguousarray(t[order], dtype=np.float64)
    counts = kernels.bin_pairs(
        starts,
        times,
        np.zeros_like(times),
        np.zeros(n_subjects, dtype=np.intp),
        bins.lower,
        bins.width,
        bins.n_bins,
        1,
    )[1]
    return np.asarray(counts[0])


def _largest(setting: float | str, span: float, bins: BinGrid, n_subjects: int, dim: int) -> float:
    if setting != "auto":
        return float(setting)
    return float(candidate_bandwidths(span, bins.width, n_subjects, dim)[-1])


@dataclass(frozen=True)
class DesignCounts:
    """What the feasibility tests need of some of the readings, added over parts of them
    (the design of a fit on ``domain`` = (lo, hi)): readings outside the domain, linearly
    binned reading counts inside it on the mean and covariance bins, and the pairs' counts
    on the covariance bins (zeros when not asked for)."""

    outside: int
    mean: FloatArray
    diagonal: FloatArray
    pairs: FloatArray


def count_design(
    subject: IntArray,
    t: FloatArray,
    domain: tuple[float, float],
    options: FPCAOptions,
    pairs: bool = True,
) -> DesignCounts:
    """The counts of these readings (``subject``: codes 0 .. m - 1)."""
    lo, hi = domain
    outside = int(np.count_nonzero((t < lo) | (t > hi)))
    b = options.covariance_bins
    if not hi > lo:
        return DesignCounts(outside, np.zeros(options.mean_bins), np.zeros(b), np.zeros((b, b)))
    inside = (t >= lo) & (t <= hi)
    subject, t = subject[inside], t[inside]
    cbins = BinGrid(lo, hi, b)
    return DesignCounts(
        outside,
        _reading_counts(t, BinGrid(lo, hi, options.mean_bins)),
        _reading_counts(t, cbins),
        pair_counts(subject, t, cbins) if pairs else np.zeros((b, b)),
    )


def add_design(a: DesignCounts, b: DesignCounts) -> DesignCounts:
    return DesignCounts(
        a.outside + b.outside, a.mean + b.mean, a.diagonal + b.diagonal, a.pairs + b.pairs
    )


def problems_from(
    counts: DesignCounts,
    n_obs: IntArray,
    domain: tuple[float, float],
    constant: bool,
    options: FPCAOptions,
) -> list[str]:
    """Every reason the fit of these readings would stop, in the fit's words ([] if none),
    from the counts of all readings (``n_obs``: readings per subject; ``constant``: every
    reading has the same value)."""
    lo, hi = domain
    out: list[str] = []
    if counts.outside:
        out.append(refusals.outside_domain(counts.outside, lo, hi))
    n_multi = int(np.count_nonzero(n_obs >= 2))
    if n_multi < 2:
        out.append(refusals.too_few_pairs(n_multi, int(n_obs.size)))
    if not hi > lo:
        out.append(refusals.one_time(lo))
        return out
    if constant:
        out.append("every reading has the same value: there is nothing to decompose")
    kernel = get_kernel(options.kernel)
    grid = np.linspace(lo, hi, options.n_grid)
    span, n = hi - lo, int(n_obs.size)
    mbins = BinGrid(lo, hi, options.mean_bins)
    cbins = BinGrid(lo, hi, options.covariance_bins)
    counts_m = counts.mean
    h = _largest(options.mean_bandwidth, span, mbins, n, 1)
    evals = np.concatenate([grid, mbins.centers])
    if not np.all(
        np.isfinite(
            local_linear_binned_1d(
                evals, mbins.centers, counts_m, np.zeros_like(counts_m), h, kernel
            )
        )
    ):
        out.append(_gap("mean", h, options.mean_bandwidth, evals, mbins, counts_m, kernel))
    dcounts = counts.diagonal
    h = _largest(options.diagonal_bandwidth, span, cbins, n, 1)
    if not np.all(
        np.isfinite(
            local_linear_binned_1d(grid, cbins.centers, dcounts, np.zeros_like(dcounts), h, kernel)
        )
    ):
        out.append(_gap("diagonal", h, options.diagonal_bandwidth, grid, cbins, dcounts, kernel))
    if n_multi >= 2:
        pairs = counts.pairs
        h = _largest(options.covariance_bandwidth, span, cbins, n, 2)
        surface = local_linear_binned_2d(
            grid, cbins.centers, pairs, np.zeros_like(pairs), h, kernel, symmetric=True
        )
        if not np.all(np.isfinite(surface)):
            bad = np.flatnonzero(~np.all(np.isfinite(surface), axis=1))
            out.append(
                refusals.smoother_undefined(
                    "covariance", h, options.covariance_bandwidth != "auto", grid[bad], grid.size
                )
            )
    return out


def _gap(
    what: str,
    h: float,
    setting: float | str,
    evals: FloatArray,
    bins: BinGrid,
    counts: FloatArray,
    kernel: object,
) -> str:
    est = local_linear_binned_1d(evals, bins.centers, counts, np.zeros_like(counts), h, kernel)  # type: ignore[arg-type]
    return refusals.smoother_undefined(
        what, h, setting != "auto", np.sort(evals[~np.isfinite(est)]), evals.size
    )
