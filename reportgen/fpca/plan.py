"""One plan of passes over parts of the data, whoever executes it.

The readings come in parts (one per data file), each holding whole subjects. Every step of
the fit that touches readings is a pass: a pure function applied to each part, whose small
results (binned sums, per-subject scores) are brought together on the caller's side. The
sums of the parts are added in a fixed binary tree over the parts' order, so that the
result depends on the data and on how they are split into parts, never on who ran the
passes, in which order they finished, or on how many workers there were (a different
order of addition changes the last bits of a sum).

An :class:`Executor` runs the passes: :class:`InProcess` here, one part after another;
the Dask engine (``reportgen.analysis.engine``) on a cluster. A data set that is one part gives
exactly the sums of the whole sample (the tree of one part is that part).

Passes of a fit: (0) ``part_summary`` (subject codes and reading counts, time and value
ranges); (1) ``reading_sums`` (binned readings per fold, for the mean); (2)
``residual_sums`` (binned raw covariances against the mean, and the sums that check the
residuals' size); then, on a seeded sample of subjects, ``gather`` (their readings, for the
likelihood); (3) ``part_scores`` (each subject's conditional expectation, kept where it
was computed: :class:`PartResults`; later passes read it there). Resampled parts
for corrected bands are made where the parts live (``resampled``). After the fit, the
report's diagnostics are one more pass (``diagnostics.check_readings``).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import Any, NamedTuple, TypeVar

import numpy as np

from .._threads import one_blas_thread
from ..errors import EstimationError
from ._kernels import interpolate_columns
from .arrays import FloatArray, IntArray
from .components import evaluate_at
from .design import BinnedStats, PairStats, Sample, mean_stats, pair_stats, subject_support
from .executor import Executor, InProcess, tree_sum
from .meanband import (
    JackknifeSums,
    LocalFits,
    ResampledMoments,
    ResampledSpread,
    jackknife_sums,
    local_fits,
    resample_fits,
    resample_moments,
    resample_spread,
)
from .scores import conditional_scores
from .smoothing import BinGrid

T = TypeVar("T")


@dataclass(frozen=True)
class Part:
    """Readings of whole subjects: a sample coded 0 .. m - 1 within the part, and the code
    of each of its subjects in the whole data set (increasing)."""

    sample: Sample
    subjects: IntArray

    def writable(self) -> Part:
        """The same part with writable arrays. Arrays that arrive over the network are often
        read-only, and numba compiles (and caches) a second version of every kernel for
        read-only arguments (numba issue 4511): copies are cheaper than that."""
        s = self.sample
        arrays = (s.subject, s.t, s.y, s.starts, s.n_obs)
        if all(a.flags.writeable for a in arrays):
            return self
        return Part(Sample(*(np.array(a) for a in arrays)), np.array(self.subjects))


def in_code_order(owner: IntArray, held: IntArray) -> tuple[IntArray, IntArray]:
    """Readings gathered from the parts, subject after subject in the parts' order
    (``owner``: each subject's code, ``held``: its reading count), put in code order: the
    index into the concatenated readings, and the counts in that order."""
    order = np.argsort(owner, kind="stable")
    sizes = held[order].astype(np.intp)
    first = (np.cumsum(held) - held).astype(np.intp)
    index = np.repeat(first[order] - (np.cumsum(sizes) - sizes), sizes) + np.arange(
        int(sizes.sum())
    )
    return index, sizes


def add_binned(a: BinnedStats, b: BinnedStats) -> BinnedStats:
    return BinnedStats(a.counts + b.counts, a.sums + b.sums, a.sumsq + b.sumsq, a.n + b.n)


def add_pair_stats(a: PairStats, b: PairStats) -> PairStats:
    return PairStats(
        add_binned(a.offdiag, b.offdiag), add_binned(a.diag, b.diag), a.cross + b.cross
    )


class ResidualSize(NamedTuple):
    """How large the readings and their residuals are: the largest |value|, the sum of the
    squared residuals and the number of readings (to tell variation from rounding)."""

    largest: float
    squares: float
    n: float


class ResidualSums(NamedTuple):
    """Pass 2's result: binned raw covariances per fold, and the residuals' size."""

    pairs: PairStats
    size: ResidualSize


def _add_pairs(a: ResidualSums, b: ResidualSums) -> ResidualSums:
    sa, sb = a.size, b.size
    return ResidualSums(
        add_pair_stats(a.pairs, b.pairs),
        ResidualSize(max(sa.largest, sb.largest), sa.squares + sb.squares, sa.n + sb.n),
    )


class PartSummary(NamedTuple):
    """Pass 0's result: a part's subject codes, their reading counts, and its time and
    value ranges."""

    subjects: IntArray
    n_obs: IntArray
    t_min: float
    t_max: float
    y_min: float
    y_max: float


class Gathered(NamedTuple):
    """The readings of chosen subjects of a part: times, values, residuals, and each
    subject's reading count."""

    t: FloatArray
    y: FloatArray
    resid: FloatArray
    sizes: IntArray


# --- the passes (module-level functions: a cluster ships them by name) -------------------


def part_summary(part: Part) -> PartSummary:
    """Pass 0: the part's subject codes, their reading counts, its time and value ranges."""
    t, y = part.sample.t, part.sample.y
    return PartSummary(
        part.subjects,
        part.sample.n_obs,
        float(t.min()),
        float(t.max()),
        float(y.min()),
        float(y.max()),
    )


def outside(part: Part, lo: float, hi: float) -> int:
    """Readings outside [lo, hi]."""
    t = part.sample.t
    return int(np.count_nonzero((t < lo) | (t > hi)))


def support(part: Part, grid: FloatArray, h: float) -> IntArray:
    """Subjects with a reading within ``h`` of each grid time (``design.subject_support``)."""
    return subject_support(part.sample, grid, h)


def reading_sums(part: Part, folds: IntArray, grid: BinGrid, n_folds: int) -> BinnedStats:
    """Pass 1: binned readings per fold (``folds``: the fold of each of the part's subjects)."""
    part = part.writable()
    return mean_stats(part.sample, grid, folds, n_folds)


def residuals(part: Part, fine: FloatArray, mean_grid: BinGrid) -> FloatArray:
    """Readings minus the mean (``fine``: the mean on ``mean_grid``'s centres). Each pass
    that needs them computes them again (a small cost beside the pass): a part keeps no
    state between passes, and a kept copy would add a third to its memory."""
    return _minus_mean(part.sample.t, part.sample.y, fine, mean_grid)


def _minus_mean(t: FloatArray, y: FloatArray, fine: FloatArray, mean_grid: BinGrid) -> FloatArray:
    return y - interpolate_columns(t, fine[:, None], mean_grid.lower, mean_grid.width)[:, 0]


def residual_sums(
    part: Part, folds: IntArray, fine: FloatArray, mean_grid: BinGrid, grid: BinGrid, n_folds: int
) -> ResidualSums:
    """Pass 2: binned raw covariances of the residuals per fold, and the residuals' size."""
    part = part.writable()
    resid = residuals(part, fine, mean_grid)
    stats = pair_stats(part.sample, resid, grid, folds, n_folds)
    return ResidualSums(
        stats,
        ResidualSize(
            float(np.max(np.abs(part.sample.y))), float(np.sum(resid * resid)), float(resid.size)
        ),
    )


def jackknife(part: Part, group: IntArray, fits: tuple[LocalFits, ...]) -> JackknifeSums:
    """The mean's jackknife sums over the part's subjects (``meanband.jackknife_sums``;
    ``group``: each subject's index into ``fits``)."""
    return jackknife_sums(part.sample, group, fits)


def resampled_moments(part: Part, draws: np.ndarray, fits: LocalFits) -> ResampledMoments:
    """The bootstrap-t's pass 1 over the part's subjects (``meanband.resample_moments``)."""
    return resample_moments(fits, part.sample, draws)


def resampled_spread(
    part: Part, draws: np.ndarray, fits: LocalFits, found: ResampledMoments, coef: FloatArray
) -> ResampledSpread:
    """The bootstrap-t's pass 2 over the part's subjects (``meanband.resample_spread``)."""
    return resample_spread(fits, part.sample, draws, found, coef)


def gather(part: Part, rows: IntArray, fine: FloatArray, mean_grid: BinGrid) -> Gathered:
    """Readings and residuals of the part's subjects at ``rows`` (in that order), and
    their reading counts."""
    part = part.writable()
    index, _, sizes = part.sample.reading_index(rows)
    t, y = part.sample.t[index], part.sample.y[index]
    return Gathered(t, y, _minus_mean(t, y, fine, mean_grid), sizes)  # of these readings only


def part_scores(
    part: Part,
    fine: FloatArray,
    mean_grid: BinGrid,
    grid: FloatArray,
    functions: FloatArray,
    values: FloatArray,
    sigma2: float,
) -> tuple[FloatArray, FloatArray]:
    """Pass 3: each subject's conditional expectation of its scores, and its covariance."""
    part = part.writable()
    resid = residuals(part, fine, mean_grid)
    phi = evaluate_at(part.sample.t, grid, functions)
    with one_blas_thread():
        return conditional_scores(part.sample.starts, resid, phi, values, sigma2)


def resampled(part: Part, rows: IntArray, codes: IntArray) -> Part:
    """The part's subjects at ``rows`` (repeats allowed), as subjects ``codes`` of a
    resample."""
    return Part(part.writable().sample.subset(rows), codes)


def warm_up() -> None:
    """Load (or compile) every compiled kernel a pass uses, on a tiny part: run once in each
    new worker process so that the first pass is not charged with it (about a second per
    process from numba's on-disk cache)."""
    t = np.array([0.0, 0.5, 0.25, 1.0])
    part = Part(Sample.from_arrays(np.array([0, 0, 1, 1]), t, t * t), np.arange(2))
    folds, grid = np.zeros(2, dtype=np.intp), BinGrid(0.0, 1.0, 5)
    reading_sums(part, folds, grid, 1)
    residual_sums(part, folds, np.zeros(5), grid, grid, 1)
    gather(part, np.arange(2), np.zeros(5), grid)
    part_scores(part, np.zeros(5), grid, grid.centers, np.ones((5, 1)), np.ones(1), 1.0)
    counts, sums = np.ones(5), grid.centers.copy()
    fits = local_fits(grid.centers, grid, counts, sums, 1.0, "epanechnikov", np.ones(5, bool))
    draws = np.ones((1, 2), dtype=np.int32)
    found = resampled_moments(part, draws, fits)
    resampled_spread(part, draws, fits, found, resample_fits(fits, found)[0])


def rows_in_parts(subjects: Sequence[IntArray], chosen: IntArray) -> list[IntArray]:
    """Each part's rows (``subjects``: each part's codes, increasing) of those of the
    subjects ``chosen`` (increasing codes) that it holds."""
    return [np.searchsorted(codes, chosen[np.isin(chosen, codes)]) for codes in subjects]


def take_rows(kept: tuple[np.ndarray, ...], rows: IntArray) -> tuple[np.ndarray, ...]:
    """The rows ``rows`` of each of a part's kept arrays."""
    return tuple(a[rows] for a in kept)


def as_they_are(kept: tuple[np.ndarray, ...]) -> tuple[np.ndarray, ...]:
    return kept


@dataclass(frozen=True, eq=False)
class PartResults:
    """Per-subject results of a pass, left where the pass computed them (on a cluster, in
    the workers' memory): for each part, a tuple of arrays whose rows are the part's
    subjects in code order (``subjects``: their codes). Passes over them take the
    ``handles`` as parts (``map``); the caller gathers only the rows it asks for (``pick``)
    or, where it must hold every subject, all of them (``every``).
    """

    executor: Executor
    handles: tuple[Any, ...]
    subjects: tuple[IntArray, ...]

    @classmethod
    def of_arrays(cls, *arrays: np.ndarray) -> PartResults:
        """Arrays of every subject (rows by code) held here, as one part."""
        n = arrays[0].shape[0]
        return cls(InProcess(), (tuple(arrays),), (np.arange(n, dtype=np.intp),))

    @property
    def n_subjects(self) -> int:
        return sum(int(c.size) for c in self.subjects)

    def map(
        self,
        fn: Any,
        per_part: Sequence[tuple[Any, ...]] | None = None,
        shared: tuple[Any, ...] = (),
    ) -> list[Any]:
        """A pass over the kept results (``fn(kept, *per_part[i], *shared)`` per part)."""
        return self.executor.map(fn, self.handles, per_part, shared)

    def pick(self, codes: IntArray) -> tuple[np.ndarray, ...]:
        """The rows of the subjects ``codes`` (increasing), in that order."""
        rows = rows_in_parts(self.subjects, np.asarray(codes, dtype=np.intp))
        found = self.map(take_rows, [(r,) for r in rows])
        owner = np.concatenate([c[r] for c, r in zip(self.subjects, rows, strict=True)])
        order = np.argsort(owner, kind="stable")
        return tuple(np.concatenate([f[j] for f in found])[order] for j in range(len(found[0])))

    def every(self) -> tuple[np.ndarray, ...]:
        """The rows of every subject, by code (one part in code order: its own arrays)."""
        found = self.map(as_they_are)
        n = self.n_subjects
        if len(found) == 1 and np.array_equal(self.subjects[0], np.arange(n)):
            return tuple(found[0])
        out = tuple(np.empty((n, *a.shape[1:]), dtype=a.dtype) for a in found[0])
        for codes, arrays in zip(self.subjects, found, strict=True):
            for target, a in zip(out, arrays, strict=True):
                target[codes] = a
        return out


# --- the data of a fit, as parts ----------------------------------------------------------


@dataclass(frozen=True)
class Partitioned:
    """The parts of one data set, where they live, and what the caller holds of them:
    subject codes and reading counts (nothing per reading).

    Attributes
    ----------
    executor : Executor
    parts : list
        The parts, or the executor's handles of them.
    subjects : list of ndarray
        The subject codes of each part.
    n_obs : ndarray of shape (n_subjects,)
        Readings per subject, by code.
    t_min, t_max, y_min, y_max : float
        The ranges of the times and of the values.
    """

    executor: Executor
    parts: Sequence[Any]
    subjects: tuple[IntArray, ...]
    n_obs: IntArray
    t_min: float
    t_max: float
    y_min: float
    y_max: float

    @classmethod
    def of(cls, executor: Executor, parts: Sequence[Any]) -> Partitioned:
        """Pass 0 over ``parts``."""
        found = executor.map(part_summary, parts)
        n_subjects = sum(int(f.subjects.size) for f in found)
        n_obs = np.zeros(n_subjects, dtype=np.intp)
        seen = np.zeros(n_subjects, dtype=np.intp)
        for codes, counts, *_ in found:
            if codes.size and (codes[0] < 0 or codes[-1] >= n_subjects):
                raise EstimationError("the parts' subject codes are not 0 .. n - 1")
            n_obs[codes] = counts
            seen[codes] += 1
        if np.any(seen != 1):
            code = int(np.flatnonzero(seen != 1)[0])
            raise EstimationError(
                f"subject code {code} is in {int(seen[code])} parts: each "
                "subject's readings must lie in exactly one part"
            )
        return cls(
            executor,
            parts,
            tuple(f.subjects for f in found),
            n_obs,
            min(f.t_min for f in found),
            max(f.t_max for f in found),
            min(f.y_min for f in found),
            max(f.y_max for f in found),
        )

    @classmethod
    def local(cls, parts: list[Part]) -> Partitioned:
        return cls.of(InProcess(), parts)

    @property
    def n_subjects(self) -> int:
        return int(self.n_obs.size)

    @property
    def n_readings(self) -> int:
        return int(self.n_obs.sum())

    def _each(self, per_subject: np.ndarray) -> list[tuple[Any, ...]]:
        return [(per_subject[codes],) for codes in self.subjects]

    def count_outside(self, lo: float, hi: float) -> int:
        return sum(self.executor.map(outside, self.parts, shared=(lo, hi)))

    def support(self, grid: FloatArray, h: float) -> IntArray:
        found = self.executor.map(support, self.parts, shared=(grid, h))
        total: IntArray = np.sum(found, axis=0)
        return total

    def reading_sums(self, folds: IntArray, grid: BinGrid, n_folds: int) -> BinnedStats:
        found = self.executor.map(reading_sums, self.parts, self._each(folds), (grid, n_folds))
        return tree_sum(found, add_binned)

    def residual_sums(
        self, folds: IntArray, fine: FloatArray, mean_grid: BinGrid, grid: BinGrid, n_folds: int
    ) -> ResidualSums:
        """Pair sums, and the residuals' size over all readings."""
        found = self.executor.map(
            residual_sums, self.parts, self._each(folds), (fine, mean_grid, grid, n_folds)
        )
        return tree_sum(found, _add_pairs)

    def jackknife(
        self,
        fits: Sequence[LocalFits],
        sandwiches: Sequence[FloatArray],
        level: float,
        group: IntArray | None = None,
    ) -> tuple[list[FloatArray], np.ndarray, FloatArray]:
        """The mean band's covariance over the grid per group by the jackknife over its
        subjects (``meanband.JackknifeSums.covariance``; ``sandwiches``: each group's
        sandwich covariance, used where the jackknife is undefined), where it is undefined
        (n_groups, n_grid), and its degrees of freedom (n_groups, n_grid). ``group``: each
        subject's index into ``fits``, by code (all in one by default)."""
        if group is None:
            group = np.zeros(self.n_subjects, dtype=np.intp)
        found = self.executor.map(jackknife, self.parts, self._each(group), (tuple(fits),))
        sums = tree_sum(found, JackknifeSums.__add__)
        covs = [sums.covariance(c, level, k) for k, c in enumerate(sandwiches)]
        df = np.stack([sums.degrees_of_freedom(k) for k in range(len(fits))])
        return covs, sums.undefined, df

    def mean_resamples(
        self, fits: LocalFits, draws: np.ndarray
    ) -> tuple[FloatArray, np.ndarray, ResampledSpread]:
        """The mean band's centre refitted on each resample of subjects (``draws``: how often
        each subject is drawn, (B, n_subjects) by code), where that fit is singular, and
        each resample's jackknife sums: two passes (``meanband.bootstrap_t`` takes them)."""
        each = [(np.ascontiguousarray(draws[:, codes]),) for codes in self.subjects]
        found = tree_sum(
            self.executor.map(resampled_moments, self.parts, each, (fits,)),
            ResampledMoments.__add__,
        )
        coef, singular = resample_fits(fits, found)
        spread = tree_sum(
            self.executor.map(resampled_spread, self.parts, each, (fits, found, coef)),
            ResampledSpread.__add__,
        )
        return coef, singular, spread

    def rows_in_parts(self, chosen: IntArray) -> list[IntArray]:
        """Each part's rows of those of the subjects ``chosen`` (increasing codes) that it
        holds."""
        return rows_in_parts(self.subjects, chosen)

    def gather(
        self, chosen: IntArray, fine: FloatArray, mean_grid: BinGrid
    ) -> tuple[Sample, FloatArray]:
        """The readings and residuals of the subjects ``chosen`` (increasing codes), as a
        sample coded 0 .. len(chosen) - 1 in that order."""
        rows = self.rows_in_parts(chosen)
        found = self.executor.map(gather, self.parts, [(r,) for r in rows], (fine, mean_grid))
        owner = np.concatenate([codes[r] for codes, r in zip(self.subjects, rows, strict=True)])
        index, sizes = in_code_order(owner, np.concatenate([f.sizes for f in found]))
        t, y, r = (np.concatenate([f[k] for f in found])[index] for k in range(3))  # t, y, resid
        starts = (np.cumsum(sizes) - sizes).astype(np.intp)
        sample = Sample(np.repeat(np.arange(chosen.size), sizes), t, y, starts, sizes)
        return sample, r

    def keep_scores(
        self,
        fine: FloatArray,
        mean_grid: BinGrid,
        grid: FloatArray,
        functions: FloatArray,
        values: FloatArray,
        sigma2: float,
    ) -> PartResults:
        """Pass 3: each subject's scores and their error covariance, kept where each part's
        were computed (nothing per subject comes back)."""
        handles = self.executor.keep(
            part_scores, self.parts, shared=(fine, mean_grid, grid, functions, values, sigma2)
        )
        return PartResults(self.executor, tuple(handles), self.subjects)

    @cached_property
    def _homes(self) -> tuple[IntArray, IntArray]:
        """Each subject's part and its row there, by code (once for every resample)."""
        home = np.empty(self.n_subjects, dtype=np.intp)
        local = np.empty(self.n_subjects, dtype=np.intp)
        for p, codes in enumerate(self.subjects):
            home[codes] = p
            local[codes] = np.arange(codes.size)
        return home, local

    def resample(self, drawn: IntArray) -> Partitioned:
        """The subjects ``drawn`` (codes, repeats allowed) as a new data set whose subject
        ``j`` is ``drawn[j]``; each part keeps the draws of its own subjects, in draw order."""
        home, local = self._homes
        where = home[drawn]
        masks = (where == p for p in range(len(self.parts)))
        asks = [(local[drawn[m]], np.flatnonzero(m).astype(np.intp)) for m in masks]
        kept = [i for i, (rows, _) in enumerate(asks) if rows.size]
        parts = self.executor.keep(
            resampled, [self.parts[i] for i in kept], [asks[i] for i in kept]
        )
        # the ranges are the original's (a resample is fitted on a fixed domain)
        return Partitioned(
            self.executor,
            parts,
            tuple(asks[i][1] for i in kept),
            self.n_obs[drawn],
            self.t_min,
            self.t_max,
            self.y_min,
            self.y_max,
        )
