"""The fit's plan on the two engines: time per pass, peak memory, and the same bits.

Run:  .venv/bin/python benchmarks/engines.py [--subjects N] [--files F] [--read FOLDER] [--write]

Simulated readings (as ``run.simulate``: 1 to 8 readings per subject on [0, 1]) in F
parts of whole subjects, each made where it is to live (as a worker would read its own
file), are fitted (automatic bandwidths, FVE rule, scores; then the diagnostics and group
passes) three ways: on a Dask cluster of 2 worker processes, on one of 2 worker threads in
this process, and in this process, one part after another. For each it prints the seconds
spent in each pass over the parts (the executor's calls, by pass) and in the steps between
them (bandwidths, smoothers, eigen-decomposition, likelihood: on the client), the peak
resident memory of the client and of each worker process, and whether every number is
bit-identical to the in-process one. Not part of the test run. With --write the
table goes to benchmarks/ENGINES.md (one section per number of subjects).
"""

from __future__ import annotations

import argparse
import hashlib
import resource
import sys
import time
from collections import defaultdict
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from benchmarks.run import machine, table  # noqa: E402
from reportgen.analysis.views import DIAGNOSTIC_MAX_SUBJECTS  # noqa: E402
from reportgen.fpca import FPCAOptions  # noqa: E402
from reportgen.fpca.design import Sample, seeded_sample  # noqa: E402
from reportgen.fpca.diagnostics import check_readings  # noqa: E402
from reportgen.fpca.fit import fit_parts  # noqa: E402
from reportgen.fpca.groups import group_means  # noqa: E402
from reportgen.fpca.plan import Executor, InProcess, Part, Partitioned, warm_up  # noqa: E402
from reportgen.fpca.result import FPCAFit  # noqa: E402
from reportgen.inputs.loader import load_dataset  # noqa: E402
from reportgen.inputs.spec import load_spec  # noqa: E402


class Timed:
    """An executor that adds up the wall time of each pass, by the pass's name."""

    def __init__(self, inner: Executor) -> None:
        self.inner = inner
        self.seconds: dict[str, float] = defaultdict(float)

    def place(self, parts: list[Part]) -> Sequence[Any]:
        return self.inner.place(parts)

    def map(
        self,
        fn: Callable[..., Any],
        parts: Sequence[Any],
        per_part: Sequence[tuple[Any, ...]] | None = None,
        shared: tuple[Any, ...] = (),
    ) -> list[Any]:
        return self._timed(self.inner.map, fn, parts, per_part, shared)

    def keep(
        self,
        fn: Callable[..., Any],
        parts: Sequence[Any],
        per_part: Sequence[tuple[Any, ...]] | None = None,
        shared: tuple[Any, ...] = (),
    ) -> list[Any]:
        return self._timed(self.inner.keep, fn, parts, per_part, shared)

    def _timed(
        self, run: Callable[..., list[Any]], fn: Callable[..., Any], *args: Any
    ) -> list[Any]:
        start = time.perf_counter()
        out = run(fn, *args)
        self.seconds[fn.__name__] += time.perf_counter() - start
        return out


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def make_part(p: int, n: int, n_parts: int, seed: int) -> Part:
    """Part ``p`` of ``n_parts``: the subjects of one block of codes, simulated as
    ``run.simulate`` does (1 to 8 readings on [0, 1], two components, noise sd 0.3), from a
    seed of its own, where the part is to live (as a worker would read its file)."""
    first, stop = p * n // n_parts, (p + 1) * n // n_parts
    rng = np.random.default_rng([seed, p])
    m = rng.integers(1, 9, stop - first)
    local = np.repeat(np.arange(stop - first), m)
    t = rng.uniform(0, 1, local.size)
    xi = rng.normal(size=(stop - first, 2)) * [1.0, 0.5]
    phi1, phi2 = np.sqrt(2) * np.cos(np.pi * t), np.sqrt(2) * np.sin(np.pi * t)
    y = (
        np.sin(2 * np.pi * t)
        + xi[local, 0] * phi1
        + xi[local, 1] * phi2
        + rng.normal(0, 0.3, t.size)
    )
    return Part(Sample.from_arrays(local, t, y), np.arange(first, stop, dtype=np.intp))


def write_files(folder: Path, n: int, n_parts: int, seed: int) -> Path:
    """The parts' readings as Parquet files of whole subjects (ids u000000000, ... in code
    order), and a spec that names the folder."""
    folder.mkdir(parents=True, exist_ok=True)
    for p in range(n_parts):
        part = make_part(p, n, n_parts, seed)
        s = part.sample
        ids = np.char.add("u", np.char.zfill(part.subjects[s.subject].astype(str), 9))
        pd.DataFrame({"unit": ids, "t": s.t, "y": s.y}).to_parquet(
            folder / f"part-{p:03d}.parquet", index=False
        )
    spec = folder.parent / "engines.yaml"
    spec.write_text(
        f"report: {{id: engines, title: '{n} simulated subjects'}}\n"
        f"data: {{file: {folder.name}, subject: unit, time: t, value: y}}\n"
    )
    return spec


def _fit(
    executor: Executor, n: int, n_parts: int, spec: Path | None
) -> tuple[bytes, dict[str, float], float]:
    """The fit, then the report's passes after it: the diagnostics (as a run makes them:
    the seeded sample of 20,000 subjects and six shown ones) and the means of three groups
    (subject code modulo 3). With ``spec``, the parts are its Parquet files, read, checked
    and cleaned where they are to live (``reportgen.inputs.loader``); otherwise simulated there."""
    timed = Timed(executor)
    start = time.perf_counter()
    if spec is not None:
        ds = load_dataset(load_spec(spec), timed, for_fit=True)
        assert not ds.failed and ds.readings is not None, ds.failed
        parts: Sequence[Any] = ds.readings.parts
    else:
        parts = timed.keep(make_part, list(range(n_parts)), shared=(n, n_parts, 3))
    made = time.perf_counter() - start
    data = Partitioned.of(timed, parts)
    del parts
    fit = fit_parts(data, np.arange(n), FPCAOptions())
    chosen = np.union1d(
        seeded_sample(n, DIAGNOSTIC_MAX_SUBJECTS, fit.options.seed),
        np.linspace(0, n - 1, 6).astype(np.intp),
    )
    checks = check_readings(data, fit.kept_scores, fit.predictor, chosen)
    means, ses = group_means(data, fit, (np.arange(n) % 3).astype(np.intp), 3)
    total = time.perf_counter() - start
    seconds = dict(timed.seconds)
    if spec is None:  # with Dask, keep() returns at once: the time is the first pass's
        seconds["make_part"] = made
    seconds["client steps"] = total - sum(seconds.values())
    extra = (*checks.sums.every(), checks.density, *checks.readings.values(), means, ses)
    return _numbers(fit, extra), seconds, total


def _numbers(fit: FPCAFit, extra: Sequence[np.ndarray]) -> bytes:
    """The SHA-256 of every number (a digest, not a copy: copies of the scores would
    count in the client's peak memory)."""
    h = hashlib.sha256()
    for a in (
        fit.mean,
        fit.covariance,
        fit.eigenvalues,
        fit.eigenfunctions,
        np.array([fit.error_variance]),
        fit.score_values,
        fit.score_cov,
        *extra,
    ):
        h.update(np.ascontiguousarray(a).data)
    return h.digest()


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--subjects", type=int, default=1_000_000)
    parser.add_argument("--files", type=int, default=32)
    parser.add_argument(
        "--read",
        type=Path,
        metavar="FOLDER",
        help="write the readings as Parquet files in FOLDER (a new folder) "
        "and read them through reportgen's checks, on each engine",
    )
    parser.add_argument("--write", action="store_true")
    args = parser.parse_args()
    import distributed

    from reportgen.analysis.engine import OnDask

    n, files = args.subjects, args.files
    spec = write_files(args.read / "readings", n, files, 3) if args.read else None
    warm_up()  # the compiled kernels, loaded here as each worker loads them
    fit_parts(
        Partitioned.local(InProcess().map(make_part, [0], shared=(2000, 1, 0))),
        np.arange(2000),
        FPCAOptions(),
    )  # and every first-use cost of the client steps
    # The peak of this process only grows: the engine that keeps the data out of it first.
    results: dict[str, tuple[dict[str, float], float, str, str]] = {}
    found: dict[str, bytes] = {}
    for name, processes in (("Dask, 2 processes", True), ("Dask, 2 threads", False)):
        with (
            distributed.LocalCluster(
                n_workers=2, threads_per_worker=1, processes=processes, dashboard_address=":0"
            ) as cluster,
            distributed.Client(cluster) as client,
        ):
            numbers, seconds, total = _fit(OnDask(client), n, files, spec)
            workers = (
                "in this process"
                if not processes
                else ", ".join(f"{mb:,.0f}" for mb in client.run(_peak_mb).values())
            )
            results[name] = (seconds, total, f"{_peak_mb():,.0f}", workers)
            found[name] = numbers
        print(name, f"{total:.1f} s", flush=True)
    numbers, seconds, total = _fit(InProcess(), n, files, spec)
    results["in this process"] = (seconds, total, f"{_peak_mb():,.0f}", "-")
    print("in this process", f"{total:.1f} s", flush=True)
    same = {name: found[name] == numbers for name in found}

    steps = (
        ["read_and_check", "file_facts", "file_design_sums", "as_part"] if spec else ["make_part"]
    )
    steps += [
        "summary",
        "outside",
        "reading_sums",
        "residual_sums",
        "gather",
        "part_scores",
        "part_checks",
        "_small",
        "group_reading_sums",
        "group_pair_sums",
        "client steps",
    ]
    rows = [
        [
            name,
            *(f"{r[0].get(s, 0.0):.2f}" for s in steps),
            f"{r[1]:.1f}",
            r[2],
            r[3],
            "yes" if same.get(name, True) else "NO",
        ]
        for name, r in results.items()
    ]
    made_where = (
        "each a Parquet file read, checked and cleaned where it is to live "
        "(`read_and_check` .. `as_part`)"
        if spec
        else "each simulated where it is to live (as a worker reads its file)"
    )
    text = (
        f"Machine: {machine()}\nDate: {time.strftime('%Y-%m-%d')}\n\n"
        f"{n:,} subjects (about {4.5 * n:,.0f} readings) in {files} parts, {made_where}; "
        "the fit with automatic bandwidths (5-fold cross-validation), FVE rule and "
        "scores, then the report's diagnostics pass (`part_checks`) and the means of three "
        "groups. Seconds per pass over the parts (summed over the fit's calls; with Dask a "
        "pass whose results stay on the workers returns at once, and its time shows in the "
        "pass that waits for them: `make_part` and `as_part` in `summary`, "
        "`read_and_check` in `file_facts`, `part_scores` and `part_checks` in `_small`, the "
        "first pass that brings back some of the diagnostics' results), the steps in the "
        "client between passes, the total (the comparison of bits, which gathers every "
        "subject's scores, comes after it), and peak resident memory.\n\n"
        + table(
            [
                "engine",
                *steps,
                "total s",
                "client peak MB",
                "worker peak MB",
                "same bits as in this process",
            ],
            rows,
        )
    )
    base = results["in this process"][1]
    text += "\n\nTotal relative to the in-process engine: " + ", ".join(
        f"{name} {r[1] / base:.2f}" for name, r in results.items() if name != "in this process"
    )
    print(text)
    if args.write:
        write_section(
            ROOT / "benchmarks" / "ENGINES.md",
            f"{n:,} subjects" + (" read from Parquet files" if spec else ""),
            text,
        )


HEAD = """# The fit's plan on the two engines

Produced by `benchmarks/engines.py --subjects N --files F --write`; each number of subjects
is a section of its own (a new run replaces its section and keeps the others).
"""


def write_section(path: Path, title: str, text: str) -> None:
    """Replace the section ``## title`` of ``path`` (or add it), keeping the rest."""
    old = path.read_text() if path.exists() else HEAD
    head, *rest = old.split("\n## ")
    sections = dict(part.split("\n", 1) for part in rest)
    sections[title] = "\n" + text + "\n"
    ordered = sorted(sections, key=lambda t: int(t.split()[0].replace(",", "")))
    path.write_text(
        head.rstrip("\n") + "\n" + "".join(f"\n## {t}\n{sections[t].rstrip()}\n" for t in ordered)
    )


if __name__ == "__main__":
    main()
