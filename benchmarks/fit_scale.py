"""Time and memory of a full fit as the number of subjects grows.

Run: .venv/bin/python benchmarks/fit_scale.py [n ...]   (default 1000 10000 100000)
Data on [0, 1], 1 to 15 readings per subject (8 on average), two components.
Prints the median fit time of 3 runs, the pandas groupby-mean floor on the same rows,
their ratio and the peak resident memory of the process.
"""

from __future__ import annotations

import resource
import statistics
import sys
import time

import numpy as np
import pandas as pd

from reportgen.fpca import FPCAOptions, fit_arrays


def simulate(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    m = rng.integers(1, 16, n)
    subj = np.repeat(np.arange(n), m)
    t = rng.uniform(0, 1, subj.size)
    xi = rng.normal(size=(n, 2)) * [1.0, 0.5]
    phi1, phi2 = np.sqrt(2) * np.cos(np.pi * t), np.sqrt(2) * np.sin(np.pi * t)
    y = np.sin(2 * np.pi * t) + xi[subj, 0] * phi1 + xi[subj, 1] * phi2
    return subj, t, y + rng.normal(0, 0.3, t.size)


def main(sizes: list[int]) -> None:
    header = ("subjects", "readings", "fit s", "floor s", "ratio", "peak MB")
    print("{:>9} {:>10} {:>7} {:>8} {:>6} {:>8}".format(*header))
    for n in sizes:
        subj, t, y = simulate(n)
        labels = np.arange(n)
        times, floors = [], []
        for _ in range(3):
            t0 = time.perf_counter()
            fit_arrays(subj, t, y, labels, FPCAOptions())
            times.append(time.perf_counter() - t0)
            frame = pd.DataFrame({"s": subj, "y": y})
            t0 = time.perf_counter()
            frame.groupby("s")["y"].mean()
            floors.append(time.perf_counter() - t0)
        fit_s, floor_s = statistics.median(times), statistics.median(floors)
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        print(f"{n:>9} {t.size:>10} {fit_s:>7.3f} {floor_s:>8.3f} {fit_s / floor_s:>6.1f} "
              f"{peak:>8.0f}")


if __name__ == "__main__":
    main([int(a) for a in sys.argv[1:]] or [1000, 10000, 100000])
