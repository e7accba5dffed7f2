"""Accuracy of the fit against known truth, over many seeds: the table in benchmarks/ACCURACY.md.

Run: .venv/bin/python -m tests.reference.accuracy [--seeds 20] [--write]

Four simulated designs with known mean, eigenfunctions, eigenvalues and error variance
(invented for this table; amplitudes in reading units), each fitted with the default
options, 20 seeds each. Reported: median [10th-90th percentile] of estimate / truth for the
error variance and each eigenvalue; the number of components each rule picks; coverage of
the true trajectories by each kind of band (pointwise: share of grid points inside, median
over seeds; simultaneous: share of subjects whose whole curve is inside); coverage of the
true mean by its pointwise and simultaneous bands; fits whose smoothing estimate of the
error variance was not positive. Corrected bands (50 resamples each) are measured on the
designs with at most 500 subjects. Then the bandwidth factors on design C, and the bundled
clinic example (generating error variance 1.5^2 = 2.25, specs/make_examples.py).
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from reportgen import FPCAFit, fit_sparse_fpca

Fn = Callable[[np.ndarray], np.ndarray]
ROOT = Path(__file__).resolve().parents[2]


@dataclass(frozen=True)
class Design:
    name: str
    text: str
    lo: float
    hi: float
    mean: Fn
    functions: tuple[Fn, ...]
    eigenvalues: tuple[float, ...]
    sigma2: float
    readings: tuple[int, int]
    n: int

    def sample(self, seed: int) -> tuple[pd.DataFrame, np.ndarray]:
        rng = np.random.default_rng(seed)
        m = rng.integers(self.readings[0], self.readings[1] + 1, self.n)
        subj = np.repeat(np.arange(self.n), m)
        t = rng.uniform(self.lo, self.hi, subj.size)
        xi = rng.normal(size=(self.n, len(self.eigenvalues))) * np.sqrt(self.eigenvalues)
        phi = np.column_stack([f(t) for f in self.functions])
        y = (
            self.mean(t)
            + np.sum(xi[subj] * phi, axis=1)
            + rng.normal(0, np.sqrt(self.sigma2), t.size)
        )
        return pd.DataFrame({"id": subj, "t": t, "y": y}), xi

    def truth(self, grid: np.ndarray, xi: np.ndarray) -> np.ndarray:
        phi = np.column_stack([f(grid) for f in self.functions])
        return self.mean(grid)[None, :] + xi @ phi.T


def _cos(k: int) -> Fn:
    return lambda t: np.sqrt(2) * np.cos(k * np.pi * t)


COS3 = (_cos(1), _cos(2), _cos(3))
DESIGNS = {
    "A": Design(
        "A",
        "[0,1], sqrt2 cos(k pi t) k=1..3, lambda (2, 1, 0.5), sigma^2 0.25, "
        "mean 2t + sin 2 pi t, 1-5 readings, n 200",
        0.0,
        1.0,
        lambda t: 2 * t + np.sin(2 * np.pi * t),
        COS3,
        (2.0, 1.0, 0.5),
        0.25,
        (1, 5),
        200,
    ),
    "B": Design(
        "B",
        "as A with 5-15 readings, n 2000",
        0.0,
        1.0,
        lambda t: 2 * t + np.sin(2 * np.pi * t),
        COS3,
        (2.0, 1.0, 0.5),
        0.25,
        (5, 15),
        2000,
    ),
    "C": Design(
        "C",
        "[0,100], intercept sd 6 + sd 2.5 x sqrt2 cos(pi t/100) (lambda 3600, "
        "625 for the unit-norm functions), sigma^2 1, mean 50 + 0.05t, 1-5 readings, "
        "n 2000",
        0.0,
        100.0,
        lambda t: 50 + 0.05 * t,
        (lambda t: np.full_like(t, 0.1), lambda t: np.sqrt(2 / 100) * np.cos(np.pi * t / 100)),
        (3600.0, 625.0),
        1.0,
        (1, 5),
        2000,
    ),
    "D": Design(
        "D",
        "[0,1], modes 1 and sqrt3 (2t - 1), lambda (1, 0.5), sigma^2 1, "
        "mean 1 - t^2, 5-15 readings, n 200",
        0.0,
        1.0,
        lambda t: 1 - t**2,
        (lambda t: np.ones_like(t), lambda t: np.sqrt(3) * (2 * t - 1)),
        (1.0, 0.5),
        1.0,
        (5, 15),
        200,
    ),
}


def _coverage(fit: FPCAFit, truth: np.ndarray) -> dict[str, float]:
    traj = fit.trajectories()
    shape = (fit.n_subjects, fit.grid.size)
    lo, hi = traj.lower.to_numpy().reshape(shape), traj.upper.to_numpy().reshape(shape)
    slo = traj.lower_simultaneous.to_numpy().reshape(shape)
    shi = traj.upper_simultaneous.to_numpy().reshape(shape)
    inside = (truth >= lo) & (truth <= hi)
    whole = np.all((truth >= slo) & (truth <= shi), axis=1)
    return {
        "pointwise": float(inside.mean()),
        "simultaneous_whole": float(whole.mean()),
        "pointwise_whole": float(np.all(inside, axis=1).mean()),
    }


def _mean_coverage(fit: FPCAFit, design: Design) -> tuple[float, float]:
    true = design.mean(fit.grid)
    z = fit.band_multiplier()
    point = np.abs(fit.mean - true) <= z * fit.mean_se
    simul = np.all(np.abs(fit.mean - true) <= fit.mean_simultaneous_multiplier * fit.mean_se)
    return float(point.mean()), float(simul)


# Corrected bands cost bootstrap_replicates (50) refits each: measured on the small designs.
CORRECTED_MAX_N = 500


def _fit(frame: pd.DataFrame, **options: object) -> FPCAFit:
    return fit_sparse_fpca(frame, subject="id", time="t", value="y", **options)


def run_design(design: Design, seeds: int) -> dict[str, object]:
    rows = []
    for seed in range(seeds):
        frame, xi = design.sample(seed)
        fit = _fit(frame)
        truth_k = len(design.eigenvalues)
        lam = [
            fit.all_eigenvalues[k] / design.eigenvalues[k]
            if k < fit.all_eigenvalues.size
            else np.nan
            for k in range(truth_k)
        ]
        sel = fit.selection
        picks = {
            rule: int(sel.k[np.nanargmin(crit)])
            for rule, crit in (("aic", sel.aic), ("bic", sel.bic), ("cv", sel.cv))
        }
        cov = _coverage(fit, design.truth(fit.grid, xi))
        if design.n <= CORRECTED_MAX_N:
            corrected = _coverage(_fit(frame, band="corrected"), design.truth(fit.grid, xi))
            cov.update({f"corrected_{k}": v for k, v in corrected.items()})
        mp, ms = _mean_coverage(fit, design)
        rows.append(
            {
                "sigma2": fit.error_variance / design.sigma2,
                "smooth": fit.smoothing_error_variance / design.sigma2,
                "not_positive": fit.smoothing_error_variance <= 0,
                **{f"lambda{k + 1}": v for k, v in enumerate(lam)},
                "K_fve": fit.n_components,
                **{f"K_{r}": v for r, v in picks.items()},
                **cov,
                "mean_pointwise": mp,
                "mean_simultaneous": ms,
                "h_cov": fit.covariance_bandwidth / (design.hi - design.lo),
                "h_cov_top": fit.covariance_bandwidth
                >= 0.999 * max(fit.covariance_bandwidth_choice.candidates or (np.inf,)),
            }
        )
    return {"design": design, "rows": pd.DataFrame(rows)}


def _q(col: pd.Series) -> str:
    x = col.to_numpy(dtype=float)
    return f"{np.nanmedian(x):.2f} [{np.nanquantile(x, 0.1):.2f}, {np.nanquantile(x, 0.9):.2f}]"


def _counts(col: pd.Series) -> str:
    values, counts = np.unique(col.to_numpy(), return_counts=True)
    return " ".join(f"{v}:{c}" for v, c in zip(values, counts, strict=True))


def sensitivity_c(seeds: int) -> dict[float, pd.Series]:
    """Design C refitted with all bandwidths fixed at factor x the chosen ones."""
    design = DESIGNS["C"]
    out: dict[float, list[float]] = {0.5: [], 0.75: [], 1.5: []}
    for seed in range(seeds):
        frame, _ = design.sample(seed)
        base = _fit(frame)
        for f in out:
            fit = _fit(
                frame,
                mean_bandwidth=f * base.mean_bandwidth,
                covariance_bandwidth=f * base.covariance_bandwidth,
                diagonal_bandwidth=f * base.diagonal_bandwidth,
            )
            out[f].append(fit.error_variance / design.sigma2)
    return {f: pd.Series(v) for f, v in out.items()}


def clinic() -> tuple[float, float]:
    frame = pd.read_csv(ROOT / "specs" / "clinic_visits.csv")
    fit = fit_sparse_fpca(
        frame, subject="patient", time="week", value="marker", n_grid=53, domain=[0.0, 104.0]
    )
    return fit.error_variance, fit.smoothing_error_variance


NOTES = [
    "How to read it:",
    "",
    "- The smoothing estimate of sigma^2 (a difference of two smoothed curves) is only the "
    "starting point of the likelihood refinement; 'not positive' counts fits where it was 0 "
    "or below. No fit is floored.",
    "- 'K by ...' lists K:count over the seeds. AIC and cv pick more components than the "
    "designs have, BIC less so: the eigenfunctions are estimated from the same data, and "
    "extra ones absorb real variance their estimated shapes miss (cf. Li, Wang & Carroll "
    "2013, JASA 108:1284-1294, on criteria for the number of components; from memory). FVE "
    "stays the default rule; the report says when the rules disagree.",
    "- Plug-in bands take the population quantities as known; corrected bands add their "
    "estimation by refits on resampled subjects (Goldsmith, Greven & Crainiceanu 2013). "
    "Simultaneous bands use the chi-square quantile over the components; the share of whole "
    "curves inside them is their coverage. The default band is the plug-in one: it reaches "
    "nominal pointwise coverage in B, C and D and 0.91 in the sparsest design A, at no cost; "
    "the corrected band reaches 0.95 there for 50 refits.",
    "- The mean's bands are cluster-robust but leave out smoothing bias, which shows in A "
    "(a sin 2 pi t mean seen through 600 readings).",
    "- The candidate bandwidths reach half the domain; when the criterion is smallest there "
    "the search continues up to twice the domain length (the limit). In D the true "
    "covariance is bilinear in (s, t), which a wide local linear fit reproduces, and the "
    "chosen covariance bandwidth is often above half the domain; in C the surface is nearly "
    "flat. 'at the limit' counts fits whose criterion still fell at the limit. The refined "
    "sigma^2 does not depend on that bandwidth (see the factors table).",
]


def main(seeds: int = 20, write: bool = False) -> str:
    start = time.perf_counter()
    lines = [
        "# Accuracy against known truth",
        "",
        f"Made by `python -m tests.reference.accuracy --seeds {seeds} --write` "
        "(default options). Each cell: median [10th, 90th percentile] over "
        f"{seeds} seeds of estimate / truth, unless it says otherwise.",
        "",
        "| design | sigma^2 (refined) | sigma^2 (smoothing) | not positive | "
        + "lambda_1 | lambda_2 | lambda_3 | K by fve / aic / bic / cv | "
        "plug-in band: pointwise | plug-in: whole curve in pointwise | plug-in: whole "
        "curve in simultaneous | corrected band: pointwise | corrected: whole curve in "
        "simultaneous | mean: pointwise | mean: whole curve in simultaneous | "
        "cov. bandwidth / domain length | cov. bandwidth at the limit |",
        "|" + "---|" * 18,
    ]
    details = []
    for key, design in DESIGNS.items():
        res = run_design(design, seeds)
        r = res["rows"]
        assert isinstance(r, pd.DataFrame)
        lam = [(_q(r[f"lambda{k + 1}"]) if f"lambda{k + 1}" in r else "-") for k in range(3)]
        ks = " / ".join(_counts(r[f"K_{x}"]) for x in ("fve", "aic", "bic", "cv"))
        lines.append(
            f"| {key} | {_q(r.sigma2)} | {_q(r.smooth)} | {int(r.not_positive.sum())} | "
            f"{' | '.join(lam)} | {ks} | {_q(r.pointwise)} | {_q(r.pointwise_whole)} | "
            f"{_q(r.simultaneous_whole)} | "
            + (
                f"{_q(r.corrected_pointwise)} | {_q(r.corrected_simultaneous_whole)} | "
                if "corrected_pointwise" in r
                else "not run | not run | "
            )
            + f"{_q(r.mean_pointwise)} | "
            f"{r.mean_simultaneous.mean():.2f} | {_q(r.h_cov)} | {int(r.h_cov_top.sum())} |"
        )
        details.append(f"- {key}: {design.text}; true K = {len(design.eigenvalues)}.")
    sens = sensitivity_c(seeds)
    lines += [
        "",
        "Designs:",
        *details,
        "",
        "Design C with all three bandwidths fixed at a factor times the chosen ones "
        "(refined sigma^2 / truth):",
        "",
        "| factor | sigma^2 |",
        "|---|---|",
    ]
    lines += [f"| {f:g} | {_q(v)} |" for f, v in sens.items()]
    est, smooth = clinic()
    lines += [
        "",
        f"Clinic example (specs/clinic_visits.yaml; generating sigma^2 2.25): refined "
        f"{est:.3f}, smoothing estimate {smooth:.3f}.",
        "",
        f"Wall time {time.perf_counter() - start:.0f} s.",
        "",
        *NOTES,
    ]
    text = "\n".join(lines) + "\n"
    if write:
        (ROOT / "benchmarks" / "ACCURACY.md").write_text(text, encoding="utf-8")
    return text


if __name__ == "__main__":
    parser = argparse.ArgumentParser()
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--write", action="store_true")
    args = parser.parse_args()
    print(main(args.seeds, args.write))
