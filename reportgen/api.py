"""The Python entry point: a long pandas frame in, a frozen fit out."""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError
from .fpca import FPCAFit, fit_arrays
from .fpca.frame import arrays_from_frame
from .validation import make_options


def fit_sparse_fpca(
    frame: pd.DataFrame, *, subject: str, time: str, value: str, **options: Any
) -> FPCAFit:
    """Functional PCA of sparse, irregularly timed readings by conditional expectation.

    Parameters
    ----------
    frame : pandas.DataFrame
        Long format: one row per reading.
    subject, time, value : str
        Column names. Times and values must be finite numbers.
    **options
        The spec's ``model`` options (see the README), e.g. ``mean_bandwidth="auto"``,
        ``component_rule="fve"``, ``fve_threshold=0.95``, ``band_level=0.95``.

    Returns
    -------
    FPCAFit
        Frozen result: ``grid``, ``mean``, ``covariance``, ``eigenvalues``,
        ``eigenfunctions``, ``error_variance``, ``n_components``, ``mean_bandwidth``,
        ``covariance_bandwidth``, ``scores`` and ``predict(frame)``.

    References
    ----------
    Yao, F., Müller, H.-G. and Wang, J.-L. (2005). Functional data analysis for sparse
    longitudinal data. JASA 100, 577-590. doi:10.1198/016214504000001745

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> rng = np.random.default_rng(1)
    >>> n = 200
    >>> subj = np.repeat(np.arange(n), 4)
    >>> t = rng.uniform(0, 1, subj.size)
    >>> xi = rng.normal(0, 1, n)
    >>> y = np.sin(2 * t) + xi[subj] * np.sqrt(2) * np.cos(np.pi * t) + rng.normal(0, .1, t.size)
    >>> fit = fit_sparse_fpca(pd.DataFrame({"id": subj, "t": t, "y": y}),
    ...                       subject="id", time="t", value="y")
    >>> round(float(fit.eigenvalues[0]), 1)  # true value 1, with phi = sqrt(2) cos(pi t)
    1.0
    """
    opts = make_options(options)
    codes, t, y, labels = arrays_from_frame(frame, subject, time, value)
    if opts.domain is not None:
        outside = np.flatnonzero((t < opts.domain[0]) | (t > opts.domain[1]))
        if outside.size:
            raise DataError(
                f"{outside.size} readings lie outside the domain {list(opts.domain)!r} "
                f"(first at row {outside[0] + 1}, time {t[outside[0]]!r})"
            )
    result = fit_arrays(codes, t, y, labels, opts)
    return replace(result, columns=(subject, time, value))
