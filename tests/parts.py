"""Helpers for tests: readings as the fit's parts, and group comparisons of readings held in
one part (the package reads its parts through ``inputs.loader``)."""

from __future__ import annotations

import numpy as np

from reportgen.fpca.arrays import FloatArray, IntArray
from reportgen.fpca.design import Sample
from reportgen.fpca.groups import GroupComparison, compare_groups, group_means
from reportgen.fpca.plan import Part, Partitioned
from reportgen.fpca.result import FPCAFit


def split_parts(
    codes: IntArray, t: FloatArray, y: FloatArray, part: IntArray | None, n_parts: int = 1
) -> list[Part]:
    """The readings (subject codes 0 .. n - 1) as parts; ``part`` gives each reading's part
    (None: one part). A subject must lie in one part (the loader checks it). A part left
    with no readings (a file whose rows the checks dropped) is left out."""
    codes = np.asarray(codes, dtype=np.intp)
    if part is None or n_parts == 1:
        sample = Sample.from_arrays(codes, t, y)
        return [Part(sample, np.arange(sample.n_subjects, dtype=np.intp))]
    out = []
    order = np.argsort(part, kind="stable")
    bounds = np.searchsorted(part[order], np.arange(n_parts + 1))
    for p in range(n_parts):
        rows = order[bounds[p] : bounds[p + 1]]
        if rows.size == 0:
            continue
        subjects, local = np.unique(codes[rows], return_inverse=True)
        out.append(
            Part(
                Sample.from_arrays(local.astype(np.intp), t[rows], y[rows]),
                subjects.astype(np.intp),
            )
        )
    return out


def group_mean(sample: Sample, fit: FPCAFit) -> tuple[FloatArray, FloatArray, FloatArray]:
    """One group's mean on the fit's grid, its band's centre and cluster-robust standard
    error (the readings of its subjects, in one part)."""
    data = Partitioned.local([Part(sample, np.arange(sample.n_subjects, dtype=np.intp))])
    means, centres, ses = group_means(data, fit, np.zeros(sample.n_subjects, dtype=np.intp), 1)
    return means[0], centres[0], ses[0]


def compare_groups_of(
    fit: FPCAFit,
    subject: IntArray,
    t: FloatArray,
    y: FloatArray,
    subject_group: np.ndarray,
    permutations: int = 1999,
) -> GroupComparison:
    """Group means and the test of equal mean scores, from readings in one part.

    ``subject`` holds codes into ``fit.subjects`` (one per reading); ``subject_group`` the
    group label of each of ``fit.subjects``.
    """
    data = Partitioned.local(split_parts(np.asarray(subject, dtype=np.intp), t, y, None))
    return compare_groups(data, fit, subject_group, permutations)
