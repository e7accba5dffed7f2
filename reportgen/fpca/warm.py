"""Compile every kernel once (or load it from numba's on-disk cache): a tiny fit touches
them all. ``python -m reportgen.fpca.warm`` before many processes start (the test suite's
workers), so that they load the kernels instead of each compiling them."""

from __future__ import annotations

import numpy as np

from .fit import fit_arrays


def main() -> None:
    rng = np.random.default_rng(0)
    subject = np.repeat(np.arange(60), 4)
    t = rng.uniform(0.0, 1.0, subject.size)
    y = np.sin(3 * t) + rng.normal(size=60)[subject] + rng.normal(0.0, 0.1, subject.size)
    fit_arrays(subject, t, y, np.arange(60))


if __name__ == "__main__":
    main()
