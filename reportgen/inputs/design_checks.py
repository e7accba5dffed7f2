"""The data checks on the design of all readings: enough subjects, subjects with pairs,
the coverage of the time-pair square, and whether the fit would get past its feasibility
tests (``fpca.feasibility``). They work from per-subject reading counts and sums that add
over files (:class:`DesignSums`), so a single file and a folder of files run the same code.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from .findings import Check, Status
from .spec import Spec

if TYPE_CHECKING:
    from ..fpca.feasibility import DesignCounts

# The time-pair square is cut into CELLS x CELLS cells for the coverage check.
CELLS = 10


@dataclass(frozen=True)
class DesignSums:
    """The design checks' counts of some of the readings, added over files: pairs per cell
    pair of the 10 x 10 partition of the time-pair square (over the readings' range), and
    the feasibility test's counts on the fit's domain (None when not asked for)."""

    cells: np.ndarray
    fit: DesignCounts | None


def design_sums(
    subject: np.ndarray,
    t: np.ndarray,
    observed: tuple[float, float],
    domain: tuple[float, float],
    spec: Spec,
    fit: bool,
) -> DesignSums:
    """The counts of these readings (``subject``: codes 0 .. m - 1)."""
    from ..fpca.feasibility import count_design

    lo, hi = observed
    pairs: np.ndarray = np.zeros((CELLS, CELLS))
    if hi > lo and subject.size:
        cell = np.minimum(((t - lo) / (hi - lo) * CELLS).astype(int), CELLS - 1)
        n = int(subject.max()) + 1
        table = np.bincount(subject * CELLS + cell, minlength=n * CELLS).reshape(n, CELLS)
        table = table.astype(np.float64)
        pairs = table.T @ table - np.diag(table.sum(axis=0))  # exact: whole numbers
    return DesignSums(pairs, count_design(subject, t, domain, spec.options) if fit else None)


def add_design_sums(a: DesignSums, b: DesignSums) -> DesignSums:
    from ..fpca.feasibility import add_design

    return DesignSums(
        a.cells + b.cells,
        add_design(a.fit, b.fit) if a.fit is not None and b.fit is not None else None,
    )


def design_checks(
    spec: Spec,
    n_obs: np.ndarray,
    t_range: tuple[float, float],
    constant: bool,
    sums: Callable[[tuple[float, float], tuple[float, float], bool], DesignSums],
    failed: bool,
) -> list[Check]:
    """The checks on the design of all the readings: ``n_obs`` (readings per subject),
    their time range, whether every value is the same, and ``sums`` (observed range,
    domain, with the feasibility counts) that counts them; ``failed``: an earlier check
    failed (the feasibility test is then left out)."""
    from ..fpca.feasibility import problems_from

    c, out = spec.checks, []
    n_subj = int(n_obs.size)
    if n_subj < c.min_subjects:
        out.append(
            Check(
                "enough subjects",
                "fail",
                f"{n_subj} subjects; the spec asks for at least {c.min_subjects}",
            )
        )
    else:
        out.append(
            Check("enough subjects", "pass", f"{n_subj} subjects, {int(n_obs.sum())} readings")
        )
    single = int((n_obs == 1).sum())
    multi = n_subj - single
    status: Status = "pass" if single <= n_subj / 2 else "warn"
    if multi < 2:
        status = "fail"
    out.append(
        Check(
            "subjects with one reading",
            status,
            f"{single} of {n_subj} subjects have a single reading (allowed; they "
            f"inform the mean, and get scores); {multi} have two or more",
        )
    )
    if multi < 2:
        return out
    failed = failed or any(x.status == "fail" for x in out)
    domain = spec.options.fitted_domain(*t_range)
    found = sums(t_range, domain, not failed)
    cover = float((found.cells > 0.5).mean()) if t_range[1] > t_range[0] else 0.0
    ok = cover >= c.min_pair_coverage
    out.append(
        Check(
            "time-pair coverage",
            "pass" if ok else "warn",
            f"{cover:.0%} of the {CELLS} x {CELLS} cells of the time-pair square "
            "hold pairs" + ("" if ok else "; the covariance elsewhere is extrapolated"),
        )
    )
    if found.fit is not None:
        problems = problems_from(found.fit, n_obs, domain, constant, spec.options)
        out.append(
            Check("fit feasible", "fail", "; ".join(problems))
            if problems
            else Check(
                "fit feasible",
                "pass",
                "the mean, diagonal and covariance smoothers "
                "are defined on the whole grid at the largest bandwidth the fit "
                "may use",
            )
        )
    return out
