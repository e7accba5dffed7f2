"""Simulation designs used by the reference tests.

``yao_design`` follows the simulation of Yao, Müller & Wang (2005), JASA 100:577-590,
sec. 5 (design from memory): domain [0, 10], mean t + sin t, eigenfunctions
-cos(pi t / 10) / sqrt(5) and sin(pi t / 10) / sqrt(5), eigenvalues 4 and 1, Gaussian
scores and errors with variance 0.25, 2 to 5 readings per subject at uniform times.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

YAO_EIGENVALUES = (4.0, 1.0)
YAO_SIGMA2 = 0.25


def yao_mean(t: np.ndarray) -> np.ndarray:
    return t + np.sin(t)


def yao_eigenfunctions(t: np.ndarray) -> np.ndarray:
    return np.column_stack([-np.cos(np.pi * t / 10), np.sin(np.pi * t / 10)]) / np.sqrt(5)


def yao_design(n: int, seed: int, min_obs: int = 2, max_obs: int = 5) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    m = rng.integers(min_obs, max_obs + 1, n)
    subj = np.repeat(np.arange(n), m)
    t = rng.uniform(0, 10, subj.size)
    xi = rng.normal(size=(n, 2)) * np.sqrt(YAO_EIGENVALUES)
    phi = yao_eigenfunctions(t)
    y = yao_mean(t) + np.sum(xi[subj] * phi, axis=1) + rng.normal(0, np.sqrt(YAO_SIGMA2), t.size)
    return pd.DataFrame({"id": subj, "t": t, "y": y})


def l2_inner(grid: np.ndarray, f: np.ndarray, g: np.ndarray) -> float:
    """Trapezoid inner product of two functions on a grid."""
    w = np.gradient(grid)
    w[[0, -1]] = np.diff(grid)[[0, -1]] / 2
    return float(np.sum(w * f * g))
