"""Spread of the fit over repeated simulations of the Yao, Müller & Wang (2005) design.

Run: .venv/bin/python -m tests.reference.yao_spread
Prints, over 20 seeds with n = 400 subjects, the range of each estimate; the tolerances
in tests/fpca/test_fit_reference.py are set from these figures (see the comments there).
"""

from __future__ import annotations

import numpy as np

from reportgen import fit_sparse_fpca
from tests.designs import YAO_EIGENVALUES, l2_inner, yao_design, yao_eigenfunctions, yao_mean


def main(n: int = 400, seeds: int = 20, **options: object) -> None:
    rows = []
    for seed in range(seeds):
        fit = fit_sparse_fpca(yao_design(n, seed), subject="id", time="t", value="y", **options)
        phi = yao_eigenfunctions(fit.grid)
        sims = [
            abs(l2_inner(fit.grid, fit.eigenfunctions[:, k], phi[:, k]))
            if k < fit.n_components
            else np.nan
            for k in range(2)
        ]
        mean_err = np.max(np.abs(fit.mean - yao_mean(fit.grid)))
        rows.append(
            [
                fit.all_eigenvalues[0] / YAO_EIGENVALUES[0],
                fit.all_eigenvalues[1] / YAO_EIGENVALUES[1],
                fit.error_variance,
                *sims,
                mean_err,
                fit.n_components,
            ]
        )
    a = np.array(rows)
    names = ["lambda1/4", "lambda2/1", "sigma2", "|<phi1>|", "|<phi2>|", "max|mean err|", "K(fve)"]
    for name, col in zip(names, a.T, strict=True):
        print(
            f"{name:>14}: min {np.nanmin(col):.3f}  median {np.nanmedian(col):.3f}  "
            f"max {np.nanmax(col):.3f}"
        )


if __name__ == "__main__":
    main()
