"""Figures: AnalysisResult -> deterministic SVG text (fixed metadata and hash salt).

Dense data are drawn as densities (binned images), never one mark per reading.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any, cast

import matplotlib
import matplotlib.ticker

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np
from cycler import cycler
from matplotlib.figure import Figure as MplFigure
from scipy.special import ndtri

from ..analysis.adequacy import ADEQUACY_LEVEL
from ..analysis.analyse import AnalysisResult
from ..analysis.views import (
    MIN_SUPPORT,
    band_words,
    density,
    mean_multiplier_words,
    mean_variance_words,
    other_functions,
)
from .svg import figure_svg

PALETTE = ("#1f5f8b", "#c0632b", "#3f8f4f", "#8a3f8f", "#7a7a2a", "#2a7a7a")
PLOT_RC = {
    "font.size": 9,
    "axes.titlesize": 10,
    "axes.labelsize": 9,
    "axes.grid": True,
    "grid.color": "#dde2ea",
    "grid.linewidth": 0.6,
    "axes.edgecolor": "#5b6578",
    "axes.prop_cycle": cycler(color=PALETTE),
    "svg.hashsalt": "reportgen",
    "svg.fonttype": "none",
    "font.family": "DejaVu Sans",
    "figure.dpi": 100,
    "lines.linewidth": 1.6,
}
MAX_POINTS = 4000  # above this, scatter plots become densities
LABELLED = 5  # flagged subjects named in the scores figure (more overlap and cannot be read)
MAX_MARKS = 200  # above this many, marked points (flagged subjects) are drawn as an image


def make_figures(
    result: AnalysisResult, names: Sequence[str] | None = None
) -> dict[str, tuple[str, str, str]]:
    """name -> (svg, caption, alt text), for ``names`` (default: every figure) in the
    order of ``FIGURES``. Each figure depends on ``result`` only, so any subset can be
    drawn in another process with the same bytes."""
    wanted = list(FIGURES) if names is None else [n for n in FIGURES if n in names]
    out = {}
    with plt.rc_context(cast(Any, PLOT_RC)):
        for name in wanted:
            drawn = FIGURES[name](result)
            if drawn is None:  # not part of this report (e.g. no groups)
                continue
            fig, caption, alt = drawn
            out[name] = (figure_svg(fig, name), caption, alt)
    return out


Drawn = tuple[MplFigure, str, str]  # the figure, its caption, its alt text


def legend_beside(
    ax: Any, fontsize: float = 7, panels: Sequence[Any] = (), below: bool = False
) -> None:
    """The legend to the right of ``ax`` (the rightmost panel), or under it in one row
    (``below``: a row of panels keeps its width), never over a curve or a point;
    ``figure_svg``'s tight layout makes room for it. With ``panels``, the entries of all
    of them, each label once."""
    entries: dict[str, Any] = {}
    for panel in list(panels) or [ax]:
        for handle, label in zip(*panel.get_legend_handles_labels(), strict=True):
            entries.setdefault(label, handle)
    ax.legend(
        list(entries.values()),
        list(entries),
        fontsize=fontsize,
        borderaxespad=0.0,
        **(
            {"loc": "upper center", "bbox_to_anchor": (0.5, -0.3), "ncol": len(entries)}
            if below
            else {"loc": "upper left", "bbox_to_anchor": (1.02, 1.0)}
        ),
    )


def with_unit(label: str, unit: str) -> str:
    """``label (unit)``; a label that already ends in a parenthesised unit (a file's stored
    label, "Serum level (mg/dl)") has it replaced, not repeated."""
    if not unit:
        return label
    stem = label.rstrip()
    if stem.endswith(")") and "(" in stem:
        stem = stem[: stem.rfind("(")].rstrip() or stem
    return f"{stem} ({unit})"


def _time_label(r: AnalysisResult) -> str:
    return with_unit(r.time_label, r.spec.data.time_unit)


def _value_label(r: AnalysisResult) -> str:
    return with_unit(r.value_label, r.spec.value_unit)


def _level(r: AnalysisResult) -> str:
    return f"{r.fit.options.band_level:.0%}"


def _readings_per_subject(r: AnalysisResult) -> Drawn:
    fig, ax = plt.subplots(figsize=(6, 2.6))
    counts = np.bincount(r.fit.n_obs)
    ax.bar(np.arange(counts.size), counts, color=PALETTE[0])
    ax.set_xlabel("readings per subject")
    ax.set_ylabel("subjects")
    return (
        fig,
        "Readings per subject.",
        "Bar chart of the number of subjects by readings per subject.",
    )


def _pair_coverage(r: AnalysisResult) -> Drawn:
    g, tl = r.fit.grid, _time_label(r)
    fig, ax = plt.subplots(figsize=(4.2, 3.6))
    pc = r.fit.pair_counts
    img = ax.imshow(
        np.log1p(np.maximum(pc, 0)).T,
        origin="lower",
        cmap="Blues",
        extent=(g[0], g[-1], g[0], g[-1]),
        aspect="auto",
    )
    fig.colorbar(img, ax=ax, label="log(1 + pairs)")
    ax.set_xlabel("first reading, " + tl)
    ax.set_ylabel("second reading, " + tl)
    return (
        fig,
        "Pair coverage: where pairs of readings (t_j, t_l) of one subject fall; white "
        "areas have no support for the covariance.",
        "Heat map of the density of within-subject time pairs.",
    )


def _density(ax: Any, x: np.ndarray, y: np.ndarray, cells: tuple[int, int]) -> None:
    """Counts of points in a grid of ``cells`` (x by y) over their range, drawn as a grey
    image with empty cells left white: one bincount, so that millions of points cost a
    fraction of a second and no more memory than two index arrays."""
    counts, axes = density(x, y, cells)
    _draw_counts(ax, counts, axes)


def _draw_counts(ax: Any, counts: np.ndarray, axes: tuple[tuple[float, float, int], ...]) -> None:
    """Counts in equal cells (each axis: low, high, cells) as a grey image, empty cells
    white."""
    shown = counts.astype(float)
    shown[shown == 0] = np.nan
    edges = [np.linspace(lo, hi, n + 1) for lo, hi, n in axes]
    ax.pcolormesh(edges[0], edges[1], shown.T, cmap="Greys", shading="flat", rasterized=True)


def _mean(r: AnalysisResult) -> Drawn:
    fit, view, g = r.fit, r.readings, r.fit.grid
    fig, ax = plt.subplots(figsize=(6, 3.2))
    n = view.n_readings
    if n > MAX_POINTS:  # counted where the readings are (fpca.diagnostics)
        _draw_counts(ax, view.density, (view.time_axis, view.value_axis))
        ax.plot([], [], "s", color="#888", label=f"readings (density of {n:,})")
        drawn = "the density of all readings (grey cells; darker holds more)"
    else:  # then every subject is in the residual sample: the frame holds every reading
        frame = view.residuals
        ax.scatter(
            frame.time,
            frame.value,
            s=5,
            color="#777",
            alpha=0.5,
            linewidths=0,
            rasterized=True,
            label=f"readings ({n:,})",
        )
        drawn = "every reading (grey points)"
    z, zs = fit.band_multiplier(), fit.mean_simultaneous_multiplier
    level = _level(r)
    ax.fill_between(
        g,
        fit.mean_band_centre - zs * fit.mean_se,
        fit.mean_band_centre + zs * fit.mean_se,
        color=PALETTE[1],
        alpha=0.15,
        linewidth=0,
        label=f"simultaneous {level}",
    )
    ax.fill_between(
        g,
        fit.mean_band_centre - z * fit.mean_se,
        fit.mean_band_centre + z * fit.mean_se,
        color=PALETTE[1],
        alpha=0.3,
        linewidth=0,
        label=f"pointwise {level}",
    )
    banded = np.isfinite(fit.mean_se)
    ax.plot(g, fit.mean, color=PALETTE[1], alpha=0.35, linewidth=0.8)
    ax.plot(g, np.where(banded, fit.mean, np.nan), color=PALETTE[1], label="mean")
    ax.set_xlabel(_time_label(r))
    ax.set_ylabel(_value_label(r))
    legend_beside(ax)
    return (
        fig,
        f"Mean curve with a pointwise {level} band (inner) and a simultaneous "
        f"{level} band (outer; holds at every time at once), both corrected for the mean's "
        "smoothing bias (robust bias correction: centred on a local quadratic fit at the "
        "mean's bandwidth, so a band may sit off the curve where it bends), with "
        + mean_variance_words(fit)
        + f", over {drawn}"
        + (
            f". Where fewer than {MIN_SUPPORT} subjects have a reading within the mean's "
            f"bandwidth (or its variance rests in effect on fewer than {MIN_SUPPORT}: the "
            "jackknife's effective degrees of freedom), or beyond the readings, the curve is "
            "drawn faint and without a band. "
            if not np.all(banded)
            else ". "
        )
        + mean_multiplier_words(fit),
        "Grey density of readings against time with the mean curve and its two bands.",
    )


def _covariance(r: AnalysisResult) -> Drawn:
    fit, g, tl = r.fit, r.fit.grid, _time_label(r)
    fig, axes = plt.subplots(1, 3, figsize=(7.4, 2.6))
    cov = fit.retained_covariance
    sd = np.sqrt(np.diag(cov))
    with np.errstate(divide="ignore", invalid="ignore"):
        corr = np.where(np.outer(sd, sd) > 0, cov / np.outer(sd, sd), np.nan)
    unit = r.spec.units()["covariance"]
    rank_one = fit.n_components == 1
    for ax, surf, title, label in (
        (axes[0], cov, "covariance (retained)", unit),
        (axes[1], np.clip(corr, -1, 1), "correlation (retained)", "correlation"),
        (axes[2], fit.covariance, "raw smooth (diagnostic)", unit),
    ):
        if label == "correlation":
            levels = np.linspace(-1, 1, 21)
            cmap = "RdBu_r"  # diverging: the sign of a correlation is its message
        else:
            # a diverging map centred on 0 where values take both signs; a sequential one
            # where all are positive (low covariances must not read as negative)
            top = float(np.nanmax(np.abs(surf))) or 1.0
            positive = float(np.nanmin(surf)) >= 0.0
            levels = np.linspace(0.0 if positive else -top, top, 13)
            cmap = "Blues" if positive else "RdBu_r"
        cs = ax.contourf(g, g, surf, levels=levels, cmap=cmap)
        cs.set_rasterized(True)
        fig.colorbar(cs, ax=ax, label=label or None)
        ax.set_title(
            "correlation (retained): 1 or -1 everywhere with one component"
            if rank_one and label == "correlation"
            else title,
            fontsize=8 if not (rank_one and label == "correlation") else 6,
        )
        ax.set_xlabel(tl)
    axes[0].set_ylabel(tl)
    dropped = 1.0 - float(fit.cumulative_fve[fit.n_components - 1])
    return (
        fig,
        f"Covariance and correlation rebuilt from the {fit.n_components} retained "
        f"components (positive semi-definite; they leave out {dropped:.1%} of the "
        "variance), and the raw smoothed covariance surface, which need not be positive "
        "semi-definite, as a diagnostic"
        + (
            ". With one component the rebuilt correlation is 1 or -1 at every pair of "
            "times (the sign of the eigenfunction's product), so that panel says nothing "
            "beyond it."
            if rank_one
            else "."
        ),
        "Three filled contour maps: the covariance and correlation from the retained "
        "components, and the raw smoothed covariance.",
    )


def _bandwidths(r: AnalysisResult) -> Drawn:
    fit, unit = r.fit, r.spec.data.time_unit
    fig, axes = plt.subplots(1, 3, figsize=(7.4, 2.3))
    for ax, (what, choice) in zip(
        axes,
        (
            ("mean", fit.mean_bandwidth_choice),
            ("covariance", fit.covariance_bandwidth_choice),
            ("diagonal", fit.diagonal_bandwidth_choice),
        ),
        strict=True,
    ):
        if choice.candidates:
            ax.plot(choice.candidates, choice.criterion, "o-", markersize=3, color=PALETTE[0])
            ax.set_xscale("log")
            ax.xaxis.set_minor_formatter(matplotlib.ticker.NullFormatter())
            ax.xaxis.set_major_locator(matplotlib.ticker.LogLocator(subs=(1.0, 2.0, 5.0)))
            ax.xaxis.set_major_formatter(matplotlib.ticker.FormatStrFormatter("%g"))
        ax.axvline(choice.value, color=PALETTE[1], linestyle="--", linewidth=1)
        ax.set_title(f"{what}: {choice.value:.3g} ({choice.method})", fontsize=8)
        ax.set_xlabel("bandwidth" + (f" ({unit})" if unit else ""))
    axes[0].set_ylabel("criterion")
    return (
        fig,
        "Bandwidth choice: the criterion at each candidate bandwidth (lower is "
        "better), the chosen one dashed; a fixed bandwidth shows no curve.",
        "Three line plots of the bandwidth criterion against the candidate bandwidths for "
        "the mean, the covariance surface and the variance of single readings.",
    )


def _eigenvalues(r: AnalysisResult) -> Drawn:
    fit = r.fit
    fig, ax = plt.subplots(figsize=(6, 2.8))
    n_show = min(fit.all_eigenvalues.size, 10)
    ks = np.arange(1, n_show + 1)
    ax.bar(
        ks,
        fit.fve[:n_show],
        color=[PALETTE[0] if k <= fit.n_components else "#b8c2d1" for k in ks],
        label="FVE of the component",
    )
    ax.plot(ks, fit.cumulative_fve[:n_show], "o-", color=PALETTE[1], label="cumulative FVE")
    if fit.selection.rule == "fve":
        ax.axhline(
            fit.options.fve_threshold,
            color="#888",
            linestyle="--",
            linewidth=0.8,
            label=f"threshold {fit.options.fve_threshold:g}",
        )
    ax.set_xticks(ks)
    ax.set_ylim(0, 1.05)
    ax.set_xlabel("component")
    ax.set_ylabel("fraction of variance")
    legend_beside(ax)
    return (
        fig,
        "Fraction of variance explained by each component (bars; the retained ones "
        "dark) and cumulatively (line).",
        "Bar chart of each component's fraction of variance explained with a line of the "
        "cumulative fraction.",
    )


def _eigenfunctions(r: AnalysisResult) -> Drawn:
    fit, g = r.fit, r.fit.grid
    fig, ax = plt.subplots(figsize=(6, 3))
    other = other_functions(fit)
    for k in range(fit.n_components):
        line = ax.plot(g, fit.eigenfunctions[:, k], label=f"phi_{k + 1} (FVE {fit.fve[k]:.2f})")
        if other is not None:
            ax.plot(g, other[:, k], color=line[0].get_color(), linestyle="--", linewidth=0.9)
    ax.axhline(0, color="#888", linewidth=0.8)
    ax.set_xlabel(_time_label(r))
    ef_unit = r.spec.units()["eigenfunction"]
    ax.set_ylabel("eigenfunction" + (f" ({ef_unit})" if ef_unit else ""))
    legend_beside(ax)
    return (
        fig,
        "Eigenfunctions of the retained components"
        + (
            f" ({fit.functions.used} estimates); dashed: the "
            f"{'smoothing' if fit.functions.used == 'likelihood' else 'likelihood'} "
            "estimates, not used."
            if other is not None
            else "."
        ),
        "Line plot of each retained eigenfunction against time"
        + (", with the estimate not used dashed." if other is not None else "."),
    )


def _effects(r: AnalysisResult) -> Drawn:
    fit, g = r.fit, r.fit.grid
    k_show = min(fit.n_components, 3)
    fig, axes = plt.subplots(1, k_show, figsize=(2.1 * k_show + 0.4, 2.6), squeeze=False)
    for k in range(k_show):
        ax = axes[0, k]
        step = 2 * np.sqrt(fit.eigenvalues[k]) * fit.eigenfunctions[:, k]
        ax.plot(g, fit.mean, color="#333", label="mean")
        ax.plot(g, fit.mean + step, color=PALETTE[0], linestyle="--", label="+2 sd")
        ax.plot(g, fit.mean - step, color=PALETTE[1], linestyle=":", label="-2 sd")
        ax.set_title(f"component {k + 1}")
        ax.set_xlabel(_time_label(r))
    axes[0, 0].set_ylabel(_value_label(r))
    legend_beside(axes[0, k_show - 1])
    return (
        fig,
        "Effect of each component: the mean plus and minus two times "
        "sqrt(eigenvalue) times the eigenfunction.",
        "Mean curve with curves two standard deviations above and below along each component.",
    )


def _trajectories(r: AnalysisResult) -> Drawn:
    frame = r.readings.frame
    tl, vl, level = _time_label(r), _value_label(r), _level(r)
    shown = list(r.shown_subjects)
    readings = frame[frame.subject.astype(str).isin(shown)]
    traj = r.trajectories
    n = max(len(shown), 1)
    cols = min(n, 3)
    rows = int(np.ceil(n / cols))
    fig, axes = plt.subplots(
        rows, cols, figsize=(2.1 * cols + 0.3, 1.9 * rows), squeeze=False, sharex=True
    )
    for i, sid in enumerate(shown):
        ax = axes[i // cols, i % cols]
        if i % cols == 0:
            ax.set_ylabel(vl, fontsize=7)
        if i // cols == rows - 1 or i + cols >= len(shown):
            ax.set_xlabel(tl, fontsize=7)
        tr = traj[traj.subject.astype(str) == sid]
        obs = readings[readings.subject.astype(str) == sid]
        ax.fill_between(
            tr.time,
            tr.lower_simultaneous,
            tr.upper_simultaneous,
            color=PALETTE[0],
            alpha=0.12,
            linewidth=0,
        )
        ax.fill_between(tr.time, tr.lower, tr.upper, color=PALETTE[0], alpha=0.25, linewidth=0)
        ax.plot(tr.time, tr.fitted, color=PALETTE[0])
        ax.plot(obs.time, obs.value, "o", color=PALETTE[1], markersize=3)
        ax.set_title(f"subject {sid}", fontsize=8)
    for j in range(len(shown), rows * cols):
        axes[j // cols, j % cols].set_visible(False)
    lo, lo_all = traj.lower.to_numpy(dtype=float), traj.lower_simultaneous.to_numpy(dtype=float)
    coincide = bool(np.allclose(lo, lo_all, rtol=1e-9, atol=0.0, equal_nan=True))
    if r.fit.band.kind == "unavailable":
        caption = f"Recovered trajectories and the subjects' readings; bands {band_words(r.fit)}."
    elif coincide:
        caption = (
            f"Recovered trajectories with {level} bands and the subjects' readings; the "
            "pointwise and the simultaneous band coincide here (one component and none left "
            "out: a curve's error is one score's error times the eigenfunction, so a band "
            f"that holds at one time holds at all). Bands {band_words(r.fit)}."
        )
    else:
        caption = (
            f"Recovered trajectories with pointwise {level} bands (inner) and "
            f"simultaneous {level} bands (outer, the whole curve), and the subjects' "
            f"readings. Bands {band_words(r.fit)}."
        )
    return (
        fig,
        caption,
        "Small multiples: each selected subject's fitted curve, band and readings.",
    )


def _residuals(r: AnalysisResult) -> Drawn:
    res, tl, vl = r.readings.residuals, _time_label(r), _value_label(r)
    fig, axes = plt.subplots(1, 3, figsize=(6.6, 2.4))
    for ax, xcol, xl in ((axes[0], "time", tl), (axes[1], "fitted", "fitted " + vl)):
        if len(res) > MAX_POINTS:
            _density(ax, res[xcol].to_numpy(), res.standardized.to_numpy(), (50, 35))
        else:
            ax.scatter(
                res[xcol],
                res.standardized,
                s=5,
                color=PALETTE[0],
                alpha=0.5,
                linewidths=0,
                rasterized=True,
            )
        ax.axhline(0, color="#888", linewidth=0.8)
        ax.set_xlabel(xl)
        ax.set_ylabel("standardized residual")
    q = np.sort(res.standardized.to_numpy())
    if q.size > MAX_POINTS:
        q = q[np.linspace(0, q.size - 1, MAX_POINTS).astype(int)]
    theo = ndtri((np.arange(q.size) + 0.5) / q.size)  # normal quantiles
    axes[2].plot(theo, q, ".", markersize=2, color=PALETTE[0], rasterized=True)
    axes[2].plot(theo, theo, color="#888", linewidth=0.8)
    axes[2].set_xlabel("normal quantile")
    axes[2].set_ylabel("residual quantile")
    words = r.readings.sample_words(r.fit.n_subjects)
    of = f" Drawn from {words}." if words else ""
    return (
        fig,
        "Standardized residuals (reading minus fitted trajectory, over its own "
        "standard deviation under the fitted model) against time and fitted value, and a "
        "normal quantile plot." + of,
        "Three panels: residuals against time, against fitted values, and a normal quantile plot.",
    )


def _sensitivity(r: AnalysisResult) -> Drawn:
    fit, g = r.fit, r.fit.grid
    k_show = min(fit.n_components, 2)
    fig, axes = plt.subplots(1, 1 + k_show, figsize=(2.1 * (1 + k_show) + 0.3, 2.4), squeeze=False)
    axes[0, 0].plot(g, fit.mean, color="#222", label="main")
    for j, run in enumerate(r.sensitivity):
        if run.fit is None:
            continue
        color = PALETTE[(j + 1) % len(PALETTE)]
        axes[0, 0].plot(g, run.fit.mean, color=color, linewidth=1, label=f"x{run.factor:g}")
        for k in range(min(k_show, run.fit.n_components)):
            sign = np.sign(np.sum(run.fit.eigenfunctions[:, k] * fit.eigenfunctions[:, k])) or 1
            axes[0, 1 + k].plot(g, sign * run.fit.eigenfunctions[:, k], color=color, linewidth=1)
    ef_unit = r.spec.units()["eigenfunction"]
    for k in range(k_show):
        axes[0, 1 + k].plot(g, fit.eigenfunctions[:, k], color="#222")
        axes[0, 1 + k].set_title(f"phi_{k + 1}")
        axes[0, 1 + k].set_ylabel("eigenfunction" + (f" ({ef_unit})" if ef_unit else ""))
    axes[0, 0].set_title("mean")
    axes[0, 0].set_ylabel(_value_label(r))
    for ax in axes[0]:
        ax.set_xlabel(_time_label(r))
    # the legend beside the panels, not over the curves
    axes[0, 0].legend(fontsize=6, loc="upper left", bbox_to_anchor=(0.0, -0.3), ncol=3)
    return (
        fig,
        "Mean and eigenfunctions at each bandwidth factor (black: main fit).",
        "Overlaid curves of the mean and eigenfunctions under each bandwidth setting.",
    )


def _scores_figure(r: AnalysisResult) -> Drawn:
    """Scores of the first two components (a histogram of the first when K = 1), with the
    flagged subjects marked and labelled by id (the ten farthest)."""
    fit = r.fit
    su = r.spec.units()["score"]
    unit = f" ({su})" if su else ""
    view = r.subjects_view
    sc = view.scores
    flagged = view.flagged
    named = view.farthest.iloc[:LABELLED]  # the farthest flagged subjects, of every subject
    labels = named.subject.astype(str).tolist()
    which = (
        f"the {len(labels)} farthest of the {view.n_flagged} flagged labelled by id"
        if view.n_flagged > len(labels)
        else "labelled by id"
    )
    table = "tables/scores/" if r.spec.subjects.tables == "parquet" else "tables/scores.csv"
    at = named[[f"score_{k + 1}" for k in range(min(2, fit.n_components))]].to_numpy()
    over = (
        f" ({view.sample_words()}; the labelled ones of every subject)"
        if view.sample_words()
        else ""
    )
    fig, ax = plt.subplots(figsize=(4.6, 3.6))
    if fit.n_components == 1:
        ax.hist(sc[:, 0], bins=min(40, max(10, len(sc) // 10)), color=PALETTE[0])
        ax.plot(
            sc[flagged, 0],
            np.zeros(int(flagged.sum())),
            "o",
            markersize=6,
            markerfacecolor="none",
            color=PALETTE[1],
            label="flagged",
            rasterized=bool(flagged.sum() > MAX_MARKS),
        )
        for i, (label, (x,)) in enumerate(zip(labels, at, strict=True)):
            ax.annotate(
                label,
                (x, 0),
                textcoords="offset points",
                xytext=(0, 6 + 14 * (i % 3)),  # staggered: close subjects' ids do not overlap
                fontsize=6,
                rotation=90,
                ha="center",
            )
        ax.set_xlabel("score 1" + unit)
        ax.set_ylabel("subjects")
        caption = (
            "Distribution of the scores of the single retained component; flagged "
            f"subjects circled on the axis, {which}{over}; every flag is in {table}."
        )
        alt = "Histogram of the subjects' scores with flagged subjects marked."
    else:
        if len(sc) > MAX_POINTS:
            _density(ax, sc[:, 0], sc[:, 1], (50, 40))
        else:
            ax.scatter(
                sc[:, 0], sc[:, 1], s=8, color=PALETTE[0], alpha=0.6, linewidths=0, rasterized=True
            )
        # Many flagged subjects (large studies) are drawn as one image, like the density:
        # the figure's size must not grow with the number of subjects.
        ax.scatter(
            sc[flagged, 0],
            sc[flagged, 1],
            s=18,
            facecolors="none",
            edgecolors=PALETTE[1],
            label="flagged",
            rasterized=bool(flagged.sum() > MAX_MARKS),
        )
        for i, (label, (x, y)) in enumerate(zip(labels, at, strict=True)):
            # offsets in turn around the point: close subjects' ids do not overlap
            dx, dy = ((4, 4), (4, -9), (-14, 4), (-14, -9), (4, 12))[i % 5]
            ax.annotate(label, (x, y), textcoords="offset points", xytext=(dx, dy), fontsize=6)
        ax.set_xlabel("score 1" + unit)
        ax.set_ylabel("score 2" + unit)
        caption = (
            f"Scores of the first two components; flagged subjects circled, {which}{over}; "
            f"every flag is in {table}."
        )
        alt = "Scatter of subjects' first two scores with flagged subjects circled."
    if flagged.any():
        legend_beside(ax)
    return fig, caption, alt


def _group_means(r: AnalysisResult) -> Drawn | None:
    g = r.groups
    if g is None:
        return None
    fit, level = r.fit, _level(r)
    z = fit.band_multiplier()
    fig, ax = plt.subplots(figsize=(6, 3.2))
    for i, label in enumerate(g.labels):
        color = PALETTE[i % len(PALETTE)]
        style = ("-", "--", ":", "-.")[(i // len(PALETTE)) % 4]
        ax.fill_between(
            fit.grid,
            g.band_centres[i] - z * g.mean_se[i],
            g.band_centres[i] + z * g.mean_se[i],
            color=color,
            alpha=0.18,
            linewidth=0,
        )
        banded = np.isfinite(g.mean_se[i])
        ax.plot(fit.grid, g.means[i], style, color=color, alpha=0.35, linewidth=0.8)
        ax.plot(
            fit.grid,
            np.where(banded, g.means[i], np.nan),
            style,
            color=color,
            label=f"{label} ({g.n_subjects[i]} subjects)",
        )
    ax.set_xlabel(_time_label(r))
    ax.set_ylabel(_value_label(r))
    legend_beside(ax)
    return (
        fig,
        f"Mean curve of each group with a pointwise {level} band, corrected for smoothing "
        "bias and with " + mean_variance_words(fit, "the group's subjects") + ". Each curve "
        f"is smoothed at the common mean bandwidth {fit.mean_bandwidth:.4g}. Where fewer than "
        f"{MIN_SUPPORT} of a group's subjects have a reading within that bandwidth the curve "
        "is drawn faint and without a band. Descriptive: not adjusted for multiple comparisons.",
        "One mean curve per group with a shaded band, on one set of axes.",
    )


def _group_scores(r: AnalysisResult) -> Drawn | None:
    g = r.groups
    if g is None:
        return None
    fit = r.fit
    shown = min(fit.n_components, 4)
    su = r.spec.units()["score"]
    codes = {label: i for i, label in enumerate(g.labels)}
    view = r.subjects_view
    member = np.array([codes[r.subject_groups[i]] for i in view.sampled.tolist()])
    fig, axes = plt.subplots(1, shown, figsize=(min(7.4, 2.4 * shown + 1.2), 2.8), squeeze=False)
    for k in range(shown):
        ax = axes[0, k]
        data = [view.scores[member == i, k] for i in range(len(g.labels))]
        # Whiskers at the 5th and 95th percentiles and no per-subject marks: the figure's
        # size does not grow with the number of subjects.
        ax.boxplot(data, whis=(5, 95), showfliers=False, widths=0.6)
        ax.set_xticks(
            range(1, len(g.labels) + 1),
            list(g.labels),
            fontsize=7,
            rotation=30 if len(g.labels) > 3 else 0,
        )
        ax.set_title(f"score {k + 1}", fontsize=8)
        ax.set_xlabel(r.spec.data.group or "group")
        ax.axhline(0.0, color="#999", linewidth=0.8)
    axes[0, 0].set_ylabel("score" + (f" ({su})" if su else ""))
    more = f" (the first 4 of {fit.n_components} components)" if fit.n_components > shown else ""
    over = f" ({view.sample_words()})" if view.sample_words() else ""
    return (
        fig,
        f"Scores by group{more}{over}: boxes span the quartiles, whiskers the 5th to "
        "95th percentiles, the line is the median.",
        "Box plots of the subjects' scores, one panel per component, one box per group.",
    )


def _binned_panel(ax: Any, check: Any, label: str) -> None:
    """Bin means with their intervals (a bar per bin) and the model's value, marked where
    it falls outside."""
    mid = (check.lower_edge + check.upper_edge) / 2.0
    ok = np.isfinite(check.observed)
    ax.errorbar(
        mid[ok],
        check.observed[ok],
        yerr=np.vstack([(check.observed - check.low)[ok], (check.high - check.observed)[ok]]),
        fmt="o",
        markersize=3,
        color=PALETTE[0],
        linewidth=1,
        label="readings (interval)",
    )
    ax.plot(mid[ok], check.expected[ok], color=PALETTE[1], linewidth=1.2, label=label)
    bad = ok & check.outside
    if np.any(bad):
        ax.plot(mid[bad], check.observed[bad], "x", color=PALETTE[1], markersize=7, label="outside")


def _variance_check(r: AnalysisResult) -> Drawn | None:
    found = r.adequacy
    if found is None:
        return None
    fig, ax = plt.subplots(figsize=(6, 2.8))
    _binned_panel(ax, found.variance, "model")
    ax.set_xlabel(_time_label(r))
    unit = r.spec.units()["error variance"]
    ax.set_ylabel("variance of a reading" + (f" ({unit})" if unit else ""))
    legend_beside(ax)
    return (
        fig,
        "Model against readings: per bin of reading times (equal numbers of readings), the "
        "mean squared deviation of the readings from the mean curve with its interval "
        f"({ADEQUACY_LEVEL:.0%} over the bins together, cluster-robust over subjects), and "
        "the model's variance of a single reading there (retained and left-out components "
        "plus the error variance); a cross marks a bin where the model is outside.",
        "Points with intervals for the readings' variance per time bin and a line for the "
        "model's variance.",
    )


def _residual_trend(r: AnalysisResult) -> Drawn | None:
    found = r.adequacy
    if found is None:
        return None
    fig, axes = plt.subplots(1, 3, figsize=(6.9, 2.6))
    for ax, check, xl, model in (
        (axes[0], found.by_time, _time_label(r), "model value"),
        (axes[1], found.by_fitted, "fitted " + _value_label(r), "model value"),
        (axes[2], found.spread, _time_label(r), "model value"),
    ):
        _binned_panel(ax, check, model)
        ax.set_xlabel(xl)
    unit = r.spec.units()["residual"]
    axes[0].set_ylabel("mean residual" + (f" ({unit})" if unit else ""))
    axes[2].set_ylabel("mean squared standardized")
    legend_beside(axes[1], fontsize=6, panels=axes, below=True)
    return (
        fig,
        "Leave-one-reading-out residuals (a reading minus its prediction from the "
        "subject's other readings): their mean per bin of time and of fitted value (0 "
        "under the model), and their mean square over its model value per bin of time "
        "against its average over all times (one error variance: the same at every time), "
        f"with {ADEQUACY_LEVEL:.0%} intervals over the bins together (cluster-robust over "
        "subjects"
        + (
            f", and widened by how the bins move over the {len(r.fit.replicates)} "
            "resampled fits of the corrected band: the estimation of the model's parts)."
            if r.fit.replicates
            else "; the mean residuals' intervals include the mean's estimation error)."
        ),
        "Three panels of binned means with intervals: residuals against time, against "
        "fitted value, and squared standardized residuals against time, with the model's "
        "value as a line.",
    )


def _visit_pattern(r: AnalysisResult) -> Drawn | None:
    found = r.adequacy
    if found is None:
        return None
    fig, axes = plt.subplots(1, 2, figsize=(6.6, 2.6), sharey=True)
    v = found.visits
    for ax, x, xl, rho, p in (
        (
            axes[0],
            found.last_time,
            "last reading, " + _time_label(r),
            v.with_last_time[0],
            v.p_last_time[0],
        ),
        (axes[1], found.count, "readings of the subject", v.with_count[0], v.p_count[0]),
    ):
        if x.size > MAX_POINTS:
            _density(ax, x, found.first_score, (40, 30))
        else:
            ax.scatter(
                x,
                found.first_score,
                s=6,
                color=PALETTE[0],
                alpha=0.5,
                linewidths=0,
                rasterized=True,
            )
        ax.set_xlabel(xl)
        ax.set_title(f"Spearman {rho:.2f}, p = {p:.2g}", fontsize=8)
        ax.axhline(0, color="#888", linewidth=0.8)
    unit = r.spec.units()["score"]
    axes[0].set_ylabel("component 1 score" + (f" ({unit})" if unit else ""))
    return (
        fig,
        "Visit pattern against level: each subject's component 1 score against the time of "
        "its last reading and its number of readings (the residual sample). The model "
        "assumes neither depends on the subject's curve; tables/visit_pattern.csv has "
        "every component.",
        "Two scatter plots of the first score against the last reading time and against "
        "the number of readings.",
    )


# The report's figures, in report order: name -> drawing function (None: not in this report).
FIGURES: dict[str, Callable[[AnalysisResult], Drawn | None]] = {
    "readings_per_subject": _readings_per_subject,
    "pair_coverage": _pair_coverage,
    "mean": _mean,
    "covariance": _covariance,
    "bandwidths": _bandwidths,
    "eigenvalues": _eigenvalues,
    "eigenfunctions": _eigenfunctions,
    "effects": _effects,
    "scores": _scores_figure,
    "group_means": _group_means,
    "group_scores": _group_scores,
    "trajectories": _trajectories,
    "residuals": _residuals,
    "variance_check": _variance_check,
    "residual_trend": _residual_trend,
    "visit_pattern": _visit_pattern,
    "sensitivity": _sensitivity,
}
