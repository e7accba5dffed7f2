"""The Python entry point: a long pandas frame in, a frozen fit out."""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError, SpecError
from .fpca import FPCAFit, fit_arrays
from .fpca.frame import arrays_from_frame
from .inputs.schema import make_options


def fit_sparse_fpca(
    frame: pd.DataFrame,
    *,
    subject: str,
    time: str,
    value: str,
    out_of_domain: str = "fail",
    **options: Any,
) -> FPCAFit:
    """Functional PCA of sparse, irregularly timed readings by conditional expectation.

    Parameters
    ----------
    frame : pandas.DataFrame
        Long format: one row per reading.
    subject, time, value : str
        Column names. Times and values must be finite numbers.
    out_of_domain : {"fail", "drop"}
        What to do with readings outside ``domain`` (when it is given): refuse them
        (``DataError``) or leave them out, as the spec's ``checks.out_of_domain``.
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
    if out_of_domain not in ("fail", "drop"):
        raise SpecError(f"out_of_domain must be one of fail, drop; got {out_of_domain!r}.")
    opts = make_options(options)
    codes, t, y, labels = arrays_from_frame(frame, subject, time, value)
    if opts.domain is not None:
        lo, hi = opts.domain
        outside = np.flatnonzero((t < lo) | (t > hi))
        if outside.size and out_of_domain == "fail":
            raise DataError(
                f"{outside.size} readings lie outside the domain [{lo:g}, {hi:g}] (first at "
                f'row {outside[0] + 1}, time {t[outside[0]]:g}); pass out_of_domain="drop" '
                "to leave them out"
            )
        if outside.size:
            inside = (t >= lo) & (t <= hi)
            codes, labels = _recode(codes[inside], labels)
            t, y = t[inside], y[inside]
    result = fit_arrays(codes, t, y, labels, opts)
    return replace(result, columns=(subject, time, value))


def _recode(codes: np.ndarray, labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Codes 0 .. m - 1 for the subjects that still have readings, and their labels."""
    present, new = np.unique(codes, return_inverse=True)
    return new.astype(np.intp), labels[present]
