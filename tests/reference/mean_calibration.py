"""Calibration of the mean's band over many seeds: where does its standard error fall short?

Run: .venv/bin/python -m tests.reference.mean_calibration [--designs ABCDEFGH] [--seeds 100]
[--write] (--write: benchmarks/MEAN_BAND.md, about 2 minutes on 2 cores)

For each design of ``tests.reference.accuracy`` (the data-generating model is the
reference), the studentized error of the mean's band centre, (centre - true mean) / se, at
every grid time of every seed: its standard deviation over seeds per tenth of the domain
(1 where the standard error is right), the share of seeds whose whole true mean lies in the
simultaneous band, and that share were the standard errors wider by 5, 10 or 15%. Fits use
the plug-in band and the smoothing eigenfunctions: the mean's band does not depend on
either, and the runs are quicker.
"""

from __future__ import annotations

import argparse
import warnings
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

from reportgen import fit_sparse_fpca
from tests.reference.accuracy import DESIGNS


def _studentized(job: tuple[str, int]) -> tuple[np.ndarray, float, np.ndarray]:
    key, seed = job
    design = DESIGNS[key]
    frame, _ = design.sample(seed)
    fit = fit_sparse_fpca(
        frame,
        subject="id",
        time="t",
        value="y",
        band="plugin",
        eigenfunctions="smoothing",
        **design.options(),  # type: ignore[arg-type]
    )
    z = (fit.mean_band_centre - design.mean(fit.grid)) / fit.mean_se
    return np.asarray(z), float(fit.mean_simultaneous_multiplier), np.asarray(fit.grid)


def calibration(key: str, seeds: int) -> str:
    with ProcessPoolExecutor(2) as pool:
        found = list(pool.map(_studentized, [(key, 1000 + s) for s in range(seeds)]))
    z = np.array([f[0] for f in found])
    multiplier = np.array([f[1] for f in found])
    grid = found[0][2]
    sd = np.nanstd(z, axis=0)
    tenths = np.array_split(np.arange(grid.size), 10)
    by_tenth = " ".join(f"{np.nanmedian(sd[idx]):.2f}" for idx in tenths)
    largest = np.nanmax(np.abs(z), axis=1)
    whole = {c: float(np.mean(largest <= c * multiplier)) for c in (1.0, 1.05, 1.1, 1.15)}
    return (
        f"| {key} | {seeds} | {by_tenth} | {whole[1.0]:.2f} | {whole[1.05]:.2f} | "
        f"{whole[1.1]:.2f} | {whole[1.15]:.2f} |"
    )


NOTES = """
Read: a standard deviation above 1 is a standard error that falls short there. Over 100
seeds the mean's simultaneous band (nominal 0.95) holds the whole true mean in fewer seeds
than the 20-seed table of benchmarks/ACCURACY.md suggests for A (0.88 here, 0.95 there),
and the shortfall grows where readings are few: in E and F (few late readings) the
standard deviation rises to 1.2-1.4 over the last third, although 175 or more of the 200
subjects have a reading within the mean's bandwidth there (the support rule does not
catch it: the local fit leans on the few late readings). G and H, NOT met in the 20-seed
table (0.85, 0.80), are at 0.93 and 0.91 here: those figures were 20-seed noise. A
standard error 10% wider would bring every design but F to 0.91 or more. What is left to
try: a leave-one-subject-out (jackknife) variance of the mean smoother, which counts how
much each subject moves the fit where its readings carry the local fit.
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--designs", default="ABCDEFGH")
    parser.add_argument("--seeds", type=int, default=100)
    parser.add_argument("--write", action="store_true", help="write benchmarks/MEAN_BAND.md")
    args = parser.parse_args()
    lines = [
        "| design | seeds | sd of the studentized error, per tenth of the domain | whole mean "
        "inside | se x 1.05 | x 1.10 | x 1.15 |",
        "|---|---|---|---|---|---|---|",
    ]
    print("\n".join(lines), flush=True)
    with warnings.catch_warnings():
        # design H has no band past its readings: those tenths are all-NaN
        warnings.filterwarnings("ignore", "All-NaN slice", RuntimeWarning)
        warnings.filterwarnings("ignore", "Degrees of freedom", RuntimeWarning)
        for key in args.designs:
            lines.append(calibration(key, args.seeds))
            print(lines[-1], flush=True)
    if args.write:
        text = (
            "# The mean's band: calibration over many seeds\n\n"
            "Produced by `.venv/bin/python -m tests.reference.mean_calibration --write` "
            "(designs of benchmarks/ACCURACY.md).\n\n" + "\n".join(lines) + "\n" + NOTES
        )
        Path(__file__).resolve().parents[2].joinpath("benchmarks", "MEAN_BAND.md").write_text(text)


if __name__ == "__main__":
    main()
