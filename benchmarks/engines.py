"""The fit's plan on the two engines: time per pass, peak memory, and the same bits.

Run:  .venv/bin/python benchmarks/engines.py [--subjects N] [--files F] [--write]

Simulated readings (``run.simulate``: 1 to 8 readings per subject on [0, 1]) are split
into F parts by subject, as F Parquet files would be, and fitted (automatic bandwidths,
FVE rule, scores) three ways: in this process, on a Dask cluster of 2 worker threads in
this process, and on a Dask cluster of 2 worker processes. For each it prints the seconds
spent in each pass over the parts (the executor's calls, by pass) and in the steps between
them (bandwidths, smoothers, eigen-decomposition, likelihood: on the client), the peak
resident memory of the client and of each worker process, and whether every number of the
fit is bit-identical to the in-process one. Not part of the test run. With --write the
table goes to benchmarks/ENGINES.md.
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
from collections import defaultdict
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from benchmarks.run import machine, simulate, table  # noqa: E402
from reportgen.fpca import FPCAOptions  # noqa: E402
from reportgen.fpca.fit import FPCAFit, fit_parts  # noqa: E402
from reportgen.fpca.plan import Executor, InProcess, Partitioned, split_parts  # noqa: E402


class Timed:
    """An executor that adds up the wall time of each pass, by the pass's name."""

    def __init__(self, inner: Executor) -> None:
        self.inner = inner
        self.seconds: dict[str, float] = defaultdict(float)

    def map(self, fn: Callable[..., Any], parts: Sequence[Any],
            per_part: Sequence[tuple[Any, ...]] | None = None, shared: tuple[Any, ...] = ()
            ) -> list[Any]:
        start = time.perf_counter()
        out = self.inner.map(fn, parts, per_part, shared)
        self.seconds[fn.__name__] += time.perf_counter() - start
        return out

    def keep(self, fn: Callable[..., Any], parts: Sequence[Any],
            per_part: Sequence[tuple[Any, ...]] | None = None, shared: tuple[Any, ...] = ()
            ) -> list[Any]:
        start = time.perf_counter()
        out = self.inner.keep(fn, parts, per_part, shared)
        self.seconds[fn.__name__] += time.perf_counter() - start
        return out


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _fit(executor: Executor, placed: Sequence[Any], labels: np.ndarray
         ) -> tuple[FPCAFit, dict[str, float], float]:
    timed = Timed(executor)
    start = time.perf_counter()
    fit = fit_parts(Partitioned.of(timed, placed), labels, FPCAOptions())
    total = time.perf_counter() - start
    seconds = dict(timed.seconds)
    seconds["client steps"] = total - sum(seconds.values())
    return fit, seconds, total


def _numbers(fit: FPCAFit) -> bytes:
    return b"".join(np.ascontiguousarray(a, dtype=float).tobytes() for a in (
        fit.mean, fit.covariance, fit.eigenvalues, fit.eigenfunctions,
        [fit.error_variance], fit.score_values, fit.score_cov))


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--subjects", type=int, default=1_000_000)
    parser.add_argument("--files", type=int, default=32)
    parser.add_argument("--write", action="store_true")
    args = parser.parse_args()
    import distributed

    from reportgen.engine import OnDask

    n = args.subjects
    subj, t, y = simulate(n, seed=3, max_readings=8)
    part = (subj * args.files // n).astype(np.intp)  # blocks of subjects, as files hold them
    parts = split_parts(subj, t, y, part, args.files)
    del subj, t, y, part
    labels = np.arange(n)
    n_readings = sum(p.sample.t.size for p in parts)
    print(f"{n:,} subjects, {n_readings:,} readings, {args.files} parts", flush=True)

    results: dict[str, tuple[dict[str, float], float, str, str]] = {}
    _fit(InProcess(), parts[:1], np.arange(parts[0].subjects.size))  # load the kernels
    reference, seconds, total = _fit(InProcess(), parts, labels)
    results["in this process"] = (seconds, total, f"{_peak_mb():,.0f}", "-")
    print("in this process", f"{total:.1f} s", flush=True)
    expected = _numbers(reference)
    del reference
    same: dict[str, bool] = {}
    for name, processes in (("Dask, 2 threads", False), ("Dask, 2 processes", True)):
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=processes,
                                      dashboard_address=None) as cluster, \
                distributed.Client(cluster) as client:
            on = OnDask(client)
            start = time.perf_counter()
            placed = on.place(parts)
            scatter = time.perf_counter() - start
            fit, seconds, total = _fit(on, placed, labels)
            seconds = {"scatter": scatter, **seconds}
            workers = ("-" if not processes else ", ".join(
                f"{mb:,.0f}" for mb in client.run(_peak_mb).values()))
            results[name] = (seconds, total + scatter, f"{_peak_mb():,.0f}", workers)
            same[name] = _numbers(fit) == expected
            del fit, placed
        print(name, f"{total + scatter:.1f} s", "same bits" if same[name] else "DIFFERENT",
              flush=True)

    steps = sorted({s for r in results.values() for s in r[0]},
                   key=lambda s: ["scatter", "summary", "outside", "reading_sums",
                                  "residual_sums", "gather", "part_scores",
                                  "client steps"].index(s))
    rows = [[name, *(f"{r[0].get(s, 0.0):.2f}" for s in steps), f"{r[1]:.1f}", r[2], r[3],
             "yes" if same.get(name, True) else "NO"] for name, r in results.items()]
    text = (f"Machine: {machine()}\nDate: {time.strftime('%Y-%m-%d')}\n\n"
            f"{n:,} subjects, {n_readings:,} readings in {args.files} parts; the fit with "
            "automatic bandwidths (5-fold cross-validation), FVE rule and scores; seconds "
            "per pass over the parts (summed over the fit's calls), then the total.\n\n"
            + table(["engine", *steps, "total s", "client peak MB", "worker peak MB",
                     "same bits"], rows))
    base = results["in this process"][1]
    text += "\n\nRatio to the in-process engine: " + ", ".join(
        f"{name} {r[1] / base:.2f}" for name, r in results.items() if name != "in this process")
    print(text)
    if args.write:
        (ROOT / "benchmarks" / "ENGINES.md").write_text(
            "# The fit's plan on the two engines\n\nProduced by `benchmarks/engines.py "
            f"--subjects {n} --files {args.files} --write`.\n\n" + text + "\n")


if __name__ == "__main__":
    main()
