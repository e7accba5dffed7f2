"""Speed and scale benchmarks of reportgen (not part of the test run).

Run:  make bench            (or: .venv/bin/python benchmarks/run.py [--quick] [--write])

Prints, for simulated data on [0, 1] with 1 to 15 readings per subject (8 on average):
1. the full fit (mean, covariance, automatic bandwidths, components, scores) for 10^3 ..
   10^6 subjects: median of 3 runs, the floor (one pandas groupby(subject) mean over the
   same rows, same process), their ratio and the peak resident memory (each size runs in a
   fresh process so that the peak is its own);
2. binned against exact smoothing at the same bandwidth (1-D mean and 2-D covariance):
   time ratio and the largest difference relative to the range, at the boundary (within
   one bandwidth of an end) and inside;
3. the scores step: batched against a plain loop over subjects;
4. end-to-end `reportgen run` for the demo spec and for a 10^5-subject spec, split into
   data, fit, sensitivity, tables, figures, HTML and PDF (in-process, after the imports);
5. as the user waits: every command through the installed entry point in a fresh process
   (interpreter start, imports, compiled-kernel loading included), median of 3, beside a
   floor measured in the same loop (`python -c "import numpy, pandas"`), and the 10^6
   subject run from Parquet (`--waits` runs only this section, without the 10^6 run).
With --write the tables also go to benchmarks/RESULTS.md, with the machine they came from.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from reportgen.fpca import FPCAOptions, fit_arrays  # noqa: E402
from reportgen.fpca.design import Sample, assign_folds, pair_stats  # noqa: E402
from reportgen.fpca.scores import conditional_scores  # noqa: E402
from reportgen.fpca.smoothing import (  # noqa: E402
    BinGrid,
    bin_1d,
    local_linear_binned_1d,
    local_linear_binned_2d,
)
from tests.reference.exact_smoothers import local_linear_exact_1d  # noqa: E402


def simulate(
    n: int, seed: int = 0, max_readings: int = 15
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    m = rng.integers(1, max_readings + 1, n)
    subj = np.repeat(np.arange(n), m)
    t = rng.uniform(0, 1, subj.size)
    xi = rng.normal(size=(n, 2)) * [1.0, 0.5]
    phi1, phi2 = np.sqrt(2) * np.cos(np.pi * t), np.sqrt(2) * np.sin(np.pi * t)
    y = np.sin(2 * np.pi * t) + xi[subj, 0] * phi1 + xi[subj, 1] * phi2
    return subj, t, y + rng.normal(0, 0.3, t.size)


def table(header: list[str], rows: list[list[str]]) -> str:
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(header)]
    line = "| " + " | ".join(h.ljust(w) for h, w in zip(header, widths, strict=True)) + " |"
    rule = "|" + "|".join("-" * (w + 2) for w in widths) + "|"
    body = [
        "| " + " | ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)) + " |" for r in rows
    ]
    return "\n".join([line, rule, *body])


# --- 1. fit scale (one size per process) ---------------------------------------------------


def one_size(n: int, repeats: int) -> dict[str, float]:
    subj, t, y = simulate(n)
    labels = np.arange(n)
    fits, floors = [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fit_arrays(subj, t, y, labels, FPCAOptions())
        fits.append(time.perf_counter() - t0)
        frame = pd.DataFrame({"s": subj, "y": y})
        t0 = time.perf_counter()
        frame.groupby("s")["y"].mean()
        floors.append(time.perf_counter() - t0)
        del frame
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {
        "n": n,
        "readings": int(t.size),
        "fit": statistics.median(fits),
        "floor": statistics.median(floors),
        "peak_mb": peak,
    }


def fit_scale(sizes: list[int], repeats: int) -> tuple[str, list[dict[str, float]]]:
    results = []
    for n in sizes:
        out = subprocess.run(
            [sys.executable, __file__, "--one", str(n), "--repeats", str(repeats)],
            capture_output=True,
            text=True,
            check=True,
        )
        results.append(json.loads(out.stdout.strip().splitlines()[-1]))
    rows = [
        [
            f"{r['n']:,}",
            f"{r['readings']:,}",
            f"{r['fit']:.3f}",
            f"{r['floor']:.3f}",
            f"{r['fit'] / r['floor']:.1f}",
            f"{r['peak_mb']:.0f}",
        ]
        for r in results
    ]
    text = table(
        ["subjects", "readings", "fit s (median)", "floor s", "fit / floor", "peak MB"], rows
    )
    if len(results) >= 2 and results[-2]["n"] * 10 == results[-1]["n"]:
        text += (
            f"\n\ngrowth {results[-1]['n']:,} / {results[-2]['n']:,}: "
            f"{results[-1]['fit'] / results[-2]['fit']:.1f}x"
        )
    return text, results


# --- 2. binned against exact ---------------------------------------------------------------


def _rel_diff(binned: np.ndarray, exact: np.ndarray, boundary: np.ndarray) -> tuple[float, float]:
    span = float(np.nanmax(exact) - np.nanmin(exact))
    diff = np.abs(binned - exact) / span
    return float(np.nanmax(diff[boundary])), float(np.nanmax(diff[~boundary]))


def binned_vs_exact(n: int) -> tuple[str, list[float]]:
    subj, t, y = simulate(n)
    rows = []
    # 1-D mean at the demo grid (101 points), bandwidth of the order CV picks at this size
    h = 0.05
    ev = np.linspace(0, 1, 101)
    t0 = time.perf_counter()
    grid = BinGrid(0.0, 1.0, 401)
    counts, sums = bin_1d(grid, t, y)
    binned = local_linear_binned_1d(ev, grid.centers, counts[0], sums[0], h)
    tb = time.perf_counter() - t0
    t0 = time.perf_counter()
    exact = np.concatenate(
        [local_linear_exact_1d(ev[i : i + 10], t, y, h) for i in range(0, ev.size, 10)]
    )
    te = time.perf_counter() - t0
    edge = (ev < h) | (ev > 1 - h)
    b_edge, b_in = _rel_diff(binned, exact, edge)
    rows.append(
        [
            "mean (1-D), 401 bins",
            f"{h:g}",
            f"{te:.2f}",
            f"{tb:.4f}",
            f"{te / tb:.0f}x",
            f"{b_edge:.2e}",
            f"{b_in:.2e}",
        ]
    )

    # 2-D covariance of the residuals about the true mean, on a 51 x 51 evaluation grid
    # (the exact smoother costs n_eval^2 x pairs, so the comparison uses the common 51-point
    # grid rather than the report's 101 points)
    resid = y - np.sin(2 * np.pi * t)
    h2 = 0.08
    ev2 = np.linspace(0, 1, 51)
    t0 = time.perf_counter()
    sample = Sample.from_arrays(subj, t, resid)
    cgrid = BinGrid(0.0, 1.0, 101)
    # the sample orders each subject's readings by time: its own copies go with its pairs
    stats = pair_stats(sample, sample.y, cgrid, assign_folds(sample.n_subjects, 1, 0), 1)
    binned2 = local_linear_binned_2d(
        ev2, cgrid.centers, stats.offdiag.counts[0], stats.offdiag.sums[0], h2, symmetric=True
    )
    tb2 = time.perf_counter() - t0
    t0 = time.perf_counter()
    # exact: every pair j != l of every subject, moments accumulated in chunks of pairs
    pairs_a, pairs_b = _pairs(sample)
    exact2 = _exact_2d_chunked(ev2, sample.t, sample.y, pairs_a, pairs_b, h2)
    te2 = time.perf_counter() - t0
    edge2 = ((ev2 < h2) | (ev2 > 1 - h2))[:, None] | ((ev2 < h2) | (ev2 > 1 - h2))[None, :]
    b_edge, b_in = _rel_diff(binned2, exact2, edge2)
    rows.append(
        [
            f"covariance (2-D), 101 bins, {pairs_a.size:,} pairs",
            f"{h2:g}",
            f"{te2:.2f}",
            f"{tb2:.4f}",
            f"{te2 / tb2:.0f}x",
            f"{b_edge:.2e}",
            f"{b_in:.2e}",
        ]
    )
    text = f"{n:,} subjects\n\n" + table(
        [
            "smoother",
            "bandwidth",
            "exact s",
            "binned s",
            "speed-up",
            "max diff / range (edge)",
            "max diff / range (inside)",
        ],
        rows,
    )
    return text, [te / tb, te2 / tb2]


def _pairs(sample: Sample) -> tuple[np.ndarray, np.ndarray]:
    """Indices (a, b), a != b, of all within-subject pairs (benchmark reference only)."""
    n = sample.n_obs
    reps = np.repeat(n, n)  # each reading pairs with the n_i readings of its subject
    a = np.repeat(np.arange(sample.t.size), reps)
    first = np.repeat(np.repeat(sample.starts, n), reps)
    offset = np.arange(a.size) - np.repeat(np.cumsum(reps) - reps, reps)
    b = first + offset
    keep = a != b
    return a[keep], b[keep]


def _exact_2d_chunked(
    ev: np.ndarray,
    t: np.ndarray,
    r: np.ndarray,
    pa: np.ndarray,
    pb: np.ndarray,
    h: float,
    chunk: int = 400_000,
) -> np.ndarray:
    acc = None
    for i in range(0, pa.size, chunk):
        a, b = pa[i : i + chunk], pb[i : i + chunk]
        part = local_linear_exact_2d_moments(ev, t[a], t[b], r[a] * r[b], h)
        acc = part if acc is None else [x + y for x, y in zip(acc, part, strict=True)]
    assert acc is not None
    s00, s10, s01, s20, s11, s02, t00, t10, t01 = acc
    c0 = s20 * s02 - s11 * s11
    c1 = s11 * s01 - s10 * s02
    c2 = s10 * s11 - s20 * s01
    det = s00 * c0 + s10 * c1 + s01 * c2
    return (c0 * t00 + c1 * t10 + c2 * t01) / det


def local_linear_exact_2d_moments(
    ev: np.ndarray, x1: np.ndarray, x2: np.ndarray, z: np.ndarray, h: float
) -> list[np.ndarray]:
    def weights(x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        d = x[None, :] - ev[:, None]
        u = d / h
        w = np.where(np.abs(u) < 1, 0.75 * (1 - u * u), 0.0)
        return w, w * d, w * d * d

    w1, wd1, wdd1 = weights(x1)
    w2, wd2, wdd2 = weights(x2)
    return [
        w1 @ w2.T,
        wd1 @ w2.T,
        w1 @ wd2.T,
        wdd1 @ w2.T,
        wd1 @ wd2.T,
        w1 @ wdd2.T,
        (w1 * z) @ w2.T,
        (wd1 * z) @ w2.T,
        (w1 * z) @ wd2.T,
    ]


# --- 3. scores -----------------------------------------------------------------------------


def scores_batched_vs_loop(n: int) -> tuple[str, float]:
    subj, t, y = simulate(n)
    sample = Sample.from_arrays(subj, t, y)
    lam = np.array([1.0, 0.25])
    phi = np.sqrt(2) * np.column_stack([np.cos(np.pi * sample.t), np.sin(np.pi * sample.t)])
    resid = sample.y - np.sin(2 * np.pi * sample.t)
    t0 = time.perf_counter()
    batched, _ = conditional_scores(sample.starts, resid, phi, lam, 0.09)
    tb = time.perf_counter() - t0
    t0 = time.perf_counter()
    loop = np.empty_like(batched)
    ends = np.append(sample.starts[1:], resid.size)
    for i, (s0, s1) in enumerate(zip(sample.starts, ends, strict=True)):
        p = phi[s0:s1]
        sigma = (p * lam) @ p.T + 0.09 * np.eye(s1 - s0)
        loop[i] = lam * (p.T @ np.linalg.solve(sigma, resid[s0:s1]))
    tl = time.perf_counter() - t0
    assert np.allclose(loop, batched, atol=1e-8)
    text = table(
        ["subjects", "loop s", "batched s", "speed-up", "max |difference|"],
        [
            [
                f"{n:,}",
                f"{tl:.2f}",
                f"{tb:.3f}",
                f"{tl / tb:.0f}x",
                f"{np.max(np.abs(loop - batched)):.1e}",
            ]
        ],
    )
    return text, tl / tb


# --- 4. end to end -------------------------------------------------------------------------


def end_to_end(big_n: int) -> tuple[str, list[float]]:
    from reportgen.runs.writer import Timer, run_spec

    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        for name in ("clinic_visits.yaml", "clinic_visits.csv"):
            shutil.copy(ROOT / "specs" / name, work / name)
        subj, t, y = simulate(big_n, seed=3)
        pd.DataFrame({"unit": subj, "t": np.round(t, 6), "y": np.round(y, 6)}).to_csv(
            work / "big.csv", index=False
        )
        (work / "big.yaml").write_text(
            "report: {id: big, title: 'Benchmark: simulated readings'}\n"
            "data: {file: big.csv, subject: unit, time: t, value: y}\n"
        )
        for label, spec in (
            ("demo spec", "clinic_visits.yaml"),
            (f"{big_n:,} subjects", "big.yaml"),
        ):
            timer = Timer()
            t0 = time.perf_counter()
            run_spec(work / spec, work / "runs", timer=timer)
            total = time.perf_counter() - t0
            s = timer.seconds
            rows.append(
                [label]
                + [
                    f"{s.get(k, 0.0):.2f}"
                    for k in (
                        "data",
                        "fit",
                        "sensitivity",
                        "diagnostics",
                        "tables and figures",
                        "html",
                        "pdf",
                    )
                ]
                + [f"{total:.2f}"]
            )
    text = table(
        [
            "run",
            "data",
            "fit",
            "sensitivity",
            "diagnostics",
            "tables and figures",
            "html",
            "pdf",
            "total s",
        ],
        rows,
    )
    return text, [float(r[-1]) for r in rows]


# --- 5. as the user waits -------------------------------------------------------------------


# A small launcher process runs each command: Linux keeps a process's peak-memory mark
# across fork and exec, so a command started straight from this (large) benchmark process
# would report at least the benchmark's own size.
LAUNCHER = """
import json, resource, subprocess, sys, time
t0 = time.perf_counter()
done = subprocess.run(sys.argv[1:], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
wall = time.perf_counter() - t0
peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
print(json.dumps({"code": done.returncode, "wall": wall, "peak": peak,
                  "err": done.stderr.decode(errors="replace")[-2000:]}))
"""


def _wall(cmd: list[str], cwd: Path) -> tuple[float, float]:
    """Wall seconds of the command in a fresh process and its peak resident MB (the largest
    of the command and its rendering worker)."""
    out = subprocess.run(
        [sys.executable, "-c", LAUNCHER, *cmd], cwd=cwd, check=True, capture_output=True, text=True
    )
    result = json.loads(out.stdout)
    if result["code"] != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed: {result['err']}")
    return float(result["wall"]), float(result["peak"])


def as_the_user_waits(repeats: int, big: int | None) -> tuple[str, dict[str, float]]:
    """Each command as a user runs it (the installed entry point, in a fresh process),
    median of ``repeats``, beside a floor measured in the same loop: the interpreter
    importing numpy and pandas, which no command can beat."""
    exe = str(Path(sys.executable).with_name("reportgen"))
    floor_cmd = [sys.executable, "-c", "import numpy, pandas"]
    rows, medians = [], {}
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        for name in ("clinic_visits.yaml", "clinic_visits.csv"):
            shutil.copy(ROOT / "specs" / name, work / name)
        subprocess.run(
            [exe, "run", "clinic_visits.yaml", "--out", "runs"],
            cwd=work,
            check=True,
            capture_output=True,
        )
        first = "runs/clinic-visits/v001"
        commands: list[tuple[str, list[str]]] = [
            ("schema", [exe, "schema"]),
            ("init", [exe, "init", "clinic_visits.csv", "new.yaml"]),
            ("check (demo spec)", [exe, "check", "clinic_visits.yaml"]),
            ("compare (two runs)", [exe, "compare", first, first]),
            ("run (demo spec)", [exe, "run", "clinic_visits.yaml", "--out", "more"]),
            ("verify (integrity, inputs, numbers)", [exe, "verify", first]),
            ("verify --render", [exe, "verify", first, "--render"]),
        ]
        if big:
            subj, t, y = simulate(big, seed=3, max_readings=8)  # 4.5 readings on average
            pd.DataFrame({"unit": subj, "t": t, "y": y}).to_parquet(work / "big.parquet")
            (work / "big.yaml").write_text(
                "report: {id: big, title: 'Benchmark: simulated readings'}\n"
                "data: {file: big.parquet, subject: unit, time: t, value: y}\n"
            )
            commands.append(
                (f"run ({big:,} subjects, Parquet)", [exe, "run", "big.yaml", "--out", "more"])
            )
        for label, cmd in commands:
            walls, floors, peak = [], [], 0.0
            for _ in range(repeats if "subjects" not in label else 1):
                (work / "new.yaml").unlink(missing_ok=True)
                floors.append(_wall(floor_cmd, work)[0])
                wall, peak = _wall(cmd, work)
                walls.append(wall)
            medians[label] = statistics.median(walls)
            floor = statistics.median(floors)
            rows.append(
                [
                    label,
                    f"{medians[label]:.2f}",
                    f"{floor:.2f}",
                    f"{medians[label] / floor:.1f}",
                    f"{peak:.0f}",
                ]
            )
    text = table(["command", "wall s (median)", "floor s", "ratio", "peak MB"], rows)
    return text, medians


def targets(
    fits: list[dict[str, float]],
    speed: list[float],
    scores: float,
    e2e: list[float],
    waits: dict[str, float],
) -> str:
    """The issue's targets against what this run measured."""
    by_n = {int(r["n"]): r for r in fits}
    rows: list[list[str]] = []

    def add(what: str, target: str, value: float | None, ok: bool | None) -> None:
        shown = "not measured" if value is None else f"{value:.3g}"
        rows.append([what, target, shown, "—" if ok is None else ("met" if ok else "NOT met")])

    def measured(n: int, key: str) -> float | None:
        return by_n[n][key] if n in by_n else None

    def check(value: float | None, ok: bool) -> bool | None:
        return None if value is None else ok

    fit5, fit6 = measured(100_000, "fit"), measured(1_000_000, "fit")
    peak6, floor6 = measured(1_000_000, "peak_mb"), measured(1_000_000, "floor")
    add("fit 10^5 subjects (s)", "<= 0.5", fit5, check(fit5, (fit5 or 0) <= 0.5))
    add("fit 10^6 subjects (s)", "<= 4", fit6, check(fit6, (fit6 or 0) <= 4))
    add("peak memory 10^6 (MB)", "< 1536", peak6, check(peak6, (peak6 or 0) < 1536))
    growth = fit6 / fit5 if fit5 and fit6 else None
    add("growth 10^6 / 10^5", "<= 12", growth, check(growth, (growth or 0) <= 12))
    ratio = fit6 / floor6 if fit6 and floor6 else None
    add("fit / floor at 10^6", "<= 10", ratio, check(ratio, (ratio or 0) <= 10))
    add("binned / exact speed-up, mean", ">= 50x", speed[0], speed[0] >= 50)
    add("binned / exact speed-up, covariance", ">= 100x", speed[1], speed[1] >= 100)
    add("batched / loop scores", ">= 25x", scores, scores >= 25)
    add("end to end, demo (s)", "< 15", e2e[0], e2e[0] < 15)
    add("end to end, 10^5 subjects (s)", "< 30", e2e[1], e2e[1] < 30)
    for label, goal in (
        ("run (demo spec)", 9.0),
        ("schema", 1.5),
        ("init", 1.5),
        ("check (demo spec)", 1.5),
        ("compare (two runs)", 1.5),
        ("verify (integrity, inputs, numbers)", 5.0),
    ):
        add(
            f"CLI {label} (s)",
            f"<= {goal:g}",
            waits.get(label),
            check(waits.get(label), (waits.get(label) or 0) <= goal),
        )
    big = next((k for k in waits if "subjects" in k), None)
    add(
        f"CLI {big or 'run (10^6 subjects)'} (s)",
        "<= 30",
        waits.get(big or ""),
        check(waits.get(big or ""), (waits.get(big or "") or 0) <= 30),
    )
    return table(["target", "goal", "measured", "verdict"], rows)


NOTES = """## Notes on the targets

- The 10^6-subject run draws the plug-in band (`band: auto` corrects up to 10,000
  subjects) and states the width ratio of the corrected band it measured:
  `benchmarks/BANDS.md` (`benchmarks/band_ratio.py`) has that run's figures.
- `compare` of two runs of 1,000,000 subjects (data and subject tables as Parquet parts;
  the second a refresh: 5% of subjects removed, 200,000 added, one reading changed), from
  `benchmarks/compare_time.sh`, timed as whole processes, on 2026-12-03: 5.1 s median of 5 (peak
  821 MiB), 7.5 s with `--out` (the change report, HTML and PDF; median of 3); with CSV
  tables 4.8 s. It found the one subject whose reading changed (1 of 950,000 moved beyond
  its rule). Before the subject ids were matched as pandas indexes and the moves taken as one
  matrix product per chunk, it took 11.9 s (Python sets over a million ids).
- Times are wall-clock on a shared machine; repeated runs vary by about 10%, and the pandas
  floor at 10^6 varied between 0.13 s and 0.25 s across runs of this script (its own
  allocations), so fit / floor at 10^6 has been between 4 and 8.
- A command's ratio to its floor is steadier than its seconds: on this machine the floor
  (`python -c "import numpy, pandas"`) has measured 0.5 s on one day and 0.9-1.0 s on
  another, and the demo run 6.4 s and 11.8 s, both about 12 times the floor. Read a NOT met
  beside an unchanged ratio as the machine, not the code.
- The per-reading sums (binned readings, within-subject pairs, per-subject K x K sums and
  interpolation at the reading times) are compiled single passes (numba,
  `reportgen/fpca/_kernels.py`). With dense per-subject bin vectors and BLAS products
  instead, the 10^6 fit took 2.3 s (fit / floor about 18): that step alone was bound by
  2 x 10^6 x 101^2 multiply-adds.
- The fit times are steady-state: the first fit in a process also loads the compiled
  kernels from the on-disk cache (about half a second; a few seconds to compile them in a
  fresh checkout).
- Binned against exact: the exact 2-D smoother is evaluated on a 51 x 51 grid (its cost
  grows with the square of the grid); the report itself uses 101 x 101, where the binned
  smoother costs the same and the exact one four times more."""


def machine() -> str:
    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return (
        f"{os.cpu_count()} cores ({cpu}), "
        f"{os.sysconf('SC_PAGE_SIZE') * os.sysconf('SC_PHYS_PAGES') / 2**30:.0f} GiB, "
        f"Python {platform.python_version()}, numpy {np.__version__}, "
        f"pandas {pd.__version__}, {platform.platform()}"
    )


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--one", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--quick", action="store_true", help="small sizes only")
    parser.add_argument(
        "--waits",
        action="store_true",
        help="only section 5 (the commands as the user waits), demo sizes",
    )
    parser.add_argument("--write", action="store_true", help="write benchmarks/RESULTS.md")
    args = parser.parse_args()
    if args.one:
        print(json.dumps(one_size(args.one, args.repeats)))
        return
    if args.waits:
        print(as_the_user_waits(args.repeats, None)[0])
        return
    sizes = [1_000, 10_000] if args.quick else [1_000, 10_000, 100_000, 1_000_000]
    sections = [f"Machine: {machine()}", f"Date: {time.strftime('%Y-%m-%d')}"]
    mid = 10_000 if args.quick else 100_000
    scale, fits = fit_scale(sizes, args.repeats)
    sections.append("## 1. Full fit\n\n" + scale)
    print(sections[-1], flush=True)
    text, speed = binned_vs_exact(mid)
    sections.append("## 2. Binned against exact smoothing\n\n" + text)
    print(sections[-1], flush=True)
    text, score_speed = scores_batched_vs_loop(mid)
    sections.append("## 3. Scores: batched against a loop over subjects\n\n" + text)
    print(sections[-1], flush=True)
    text, e2e = end_to_end(mid)
    sections.append("## 4. End to end (`reportgen run`), seconds per step\n\n" + text)
    print(sections[-1], flush=True)
    text, waits = as_the_user_waits(args.repeats, None if args.quick else 1_000_000)
    sections.append("## 5. As the user waits: each command in a fresh process\n\n" + text)
    print(sections[-1], flush=True)
    sections.append("## Targets\n\n" + targets(fits, speed, score_speed, e2e, waits))
    print(sections[-1], flush=True)
    sections.append(NOTES)
    if args.write:
        text = "# Benchmark results\n\nProduced by `make bench` (`benchmarks/run.py --write`).\n\n"
        (ROOT / "benchmarks" / "RESULTS.md").write_text(text + "\n\n".join(sections) + "\n")


if __name__ == "__main__":
    main()
