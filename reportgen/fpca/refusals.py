"""Why a fit refuses the data, in one set of words: the fit raises them
(``EstimationError``) and ``feasibility`` says them in advance from the design alone
(``reportgen check``), so that "usable" and "refused" always speak alike."""

from __future__ import annotations

from .arrays import FloatArray


def outside_domain(n: int, lo: float, hi: float) -> str:
    return (
        f"{n} readings lie outside the domain [{lo:.6g}, {hi:.6g}]; leave them out or "
        "widen the domain (they would otherwise be counted at its ends)"
    )


def too_few_pairs(n_multi: int, n_subjects: int) -> str:
    return (
        "the covariance needs at least two subjects with two or more readings; "
        f"found {n_multi} among {n_subjects} subjects"
    )


def one_time(lo: float) -> str:
    return f"all readings are at one time ({lo:.6g}): a curve cannot be estimated"


def smoother_undefined(what: str, h: float, fixed: bool, bad: FloatArray, n: int) -> str:
    """The ``what`` smoother is undefined at the times ``bad`` (sorted) of the ``n`` it is
    evaluated at, with bandwidth ``h`` (``fixed``: given in the spec; otherwise the largest
    candidate, so that every candidate fails)."""
    where = (f"at {bad.size} of {n} points" if bad.size > 1 else "at 1 point") + (
        f" between times {bad[0]:.4g} and {bad[-1]:.4g}" if bad.size > 1 else f", time {bad[0]:.4g}"
    )
    if fixed:
        return (
            f"the fixed {what} bandwidth {h:.4g} is too small for this design: the "
            f"{what} smoother is undefined {where} (too few readings nearby); use a "
            'larger value or "auto"'
        )
    return (
        f"no bandwidth up to {h:.4g} gives a defined {what}: the smoother is undefined "
        f"{where} (too few readings nearby); narrow the domain or give a larger fixed "
        "bandwidth"
    )


def too_many_components(asked: int, allowed: int) -> str:
    return (
        f"n_components={asked} is more than the {allowed} positive eigenvalues that the "
        "estimated covariance allows"
    )
