"""One plan, two executors: a fit over parts gives the same bits in this process and on a
Dask cluster (threads or processes, one worker or three), and one part gives exactly the
fit of the whole sample.

The data are the simulation design of tests/designs.py (Yao, Müller & Wang 2005, sec. 5,
from memory), split by subject into parts of unequal size. The contract checked here is
internal (the same numbers whoever adds them up); the accuracy of the fit itself is
checked against published results in test_fit_reference.py.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import replace

import numpy as np
import pytest

from reportgen.errors import EstimationError
from reportgen.fpca import FPCAOptions, fit_arrays
from reportgen.fpca.design import Sample
from reportgen.fpca.fit import fit_parts
from reportgen.fpca.plan import InProcess, Partitioned, tree_sum
from reportgen.fpca.result import FPCAFit
from reportgen.fpca.smoothing import BinGrid
from tests.counting import numbers_in
from tests.designs import yao_design
from tests.parts import compare_groups_of, split_parts

OPTIONS = FPCAOptions(n_grid=41, band="corrected", bootstrap_replicates=4, seed=3)
N_PARTS = 5


@pytest.fixture(scope="module")
def readings() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    data = yao_design(300, seed=11)
    codes = data.id.to_numpy(dtype=np.intp)
    # unequal parts, subjects interleaved (not contiguous code ranges)
    part = (codes * 7 + codes // 13) % N_PARTS
    return codes, data.t.to_numpy(), data.y.to_numpy(), part[np.argsort(codes, kind="stable")]


def _numbers(fit: FPCAFit) -> dict[str, np.ndarray]:
    """Every number of a fit that a table or figure may show."""
    out = {
        name: np.asarray(getattr(fit, name), dtype=float)
        for name in (
            "grid",
            "mean",
            "mean_se",
            "covariance",
            "diagonal_variance",
            "eigenvalues",
            "eigenfunctions",
            "all_eigenvalues",
            "fve",
            "error_variance",
            "smoothing_error_variance",
            "truncation_variance",
            "mean_simultaneous_multiplier",
            "diagonal_support",
            "score_values",
            "score_cov",
            "pair_counts",
            "n_obs",
        )
    }
    for what in ("mean", "covariance", "diagonal"):
        choice = getattr(fit, f"{what}_bandwidth_choice")
        out[f"{what} bandwidth"] = np.array([choice.value, *choice.criterion])
    sel = fit.selection
    out["criteria"] = np.concatenate([sel.aic, sel.bic, sel.cv, [sel.chosen]])
    for i, rep in enumerate(fit.replicates):
        out[f"replicate {i}"] = np.concatenate(
            [rep.mean_value, rep.eigenfunctions.ravel(), rep.eigenvalues, [rep.error_variance]]
        )
    return out


def _same_bits(a: FPCAFit, b: FPCAFit) -> None:
    na, nb = _numbers(a), _numbers(b)
    assert na.keys() == nb.keys()
    for name in na:
        assert na[name].shape == nb[name].shape, name
        assert na[name].tobytes() == nb[name].tobytes(), name


def _fit_on(executor: object, parts: list, labels: np.ndarray, sample: Sample) -> FPCAFit:
    data = Partitioned.of(executor, executor.place(parts))  # type: ignore[attr-defined]
    return fit_parts(data, labels, OPTIONS, sample=sample)


@pytest.fixture(scope="module")
def in_process(readings: tuple) -> tuple[FPCAFit, list, np.ndarray, Sample]:
    codes, t, y, part = readings
    order = np.argsort(codes, kind="stable")
    codes, t, y = codes[order], t[order], y[order]
    parts = split_parts(codes, t, y, part, N_PARTS)
    labels = np.arange(codes.max() + 1)
    sample = Sample.from_arrays(codes, t, y)
    return _fit_on(InProcess(), parts, labels, sample), parts, labels, sample


def test_one_part_is_the_whole_sample_exactly(readings: tuple) -> None:
    codes, t, y, _ = readings
    labels = np.arange(codes.max() + 1)
    whole = fit_arrays(codes, t, y, labels, OPTIONS)
    parts = split_parts(codes, t, y, None)
    _same_bits(whole, _fit_on(InProcess(), parts, labels, parts[0].sample))


def test_many_parts_differ_from_one_only_in_the_last_bits(
    readings: tuple, in_process: tuple
) -> None:
    codes, t, y, _ = readings
    whole = fit_arrays(codes, t, y, np.arange(codes.max() + 1), OPTIONS)
    many = _numbers(in_process[0])
    for name, value in _numbers(whole).items():
        # sums added in another order: rounding only (common practice, no source)
        np.testing.assert_allclose(many[name], value, rtol=1e-9, atol=1e-12, err_msg=name)


def test_the_tree_adds_in_a_fixed_order() -> None:
    # (((a + b) + (c + d)) + e): checked on strings, where order shows
    assert tree_sum(list("abcde"), lambda x, y: f"({x}+{y})") == "(((a+b)+(c+d))+e)"
    assert tree_sum(["a"], lambda x, y: x + y) == "a"
    with pytest.raises(ValueError, match="nothing to add"):
        tree_sum([], lambda x, y: x + y)


def test_gathered_subjects_are_their_readings(in_process: tuple) -> None:
    _, parts, _, sample = in_process
    data = Partitioned.local(parts)
    chosen = np.array([0, 3, 4, 17, 250, 299])
    grid = BinGrid(0.0, 10.0, 11)
    got, resid = data.gather(chosen, np.zeros(11), grid)
    want = sample.subset(chosen)
    for name in ("subject", "t", "y", "starts", "n_obs"):
        assert np.array_equal(getattr(got, name), getattr(want, name)), name
    assert np.array_equal(resid, want.y)  # the mean given is zero


@pytest.fixture(
    scope="module",
    params=[(False, 1), (False, 3), (True, 2)],
    ids=["threads-1-worker", "threads-3-workers", "processes-2-workers"],
)
def on_dask(request: pytest.FixtureRequest) -> Iterator[object]:
    distributed = pytest.importorskip("distributed")
    from reportgen.analysis.engine import OnDask

    processes, workers = request.param
    with (
        distributed.LocalCluster(
            n_workers=workers, threads_per_worker=1, processes=processes, dashboard_address=":0"
        ) as cluster,
        distributed.Client(cluster) as client,
    ):
        yield OnDask(client)


def test_a_dask_cluster_gives_the_same_bits(on_dask: object, in_process: tuple) -> None:
    fit, parts, labels, sample = in_process
    _same_bits(fit, _fit_on(on_dask, parts, labels, sample))


def test_the_sensitivity_refits_give_the_same_bits(on_dask: object, in_process: tuple) -> None:
    fit, parts, labels, _ = in_process
    options = replace(
        OPTIONS,
        band="plugin",
        mean_bandwidth=fit.mean_bandwidth * 1.5,
        covariance_bandwidth=fit.covariance_bandwidth * 1.5,
        diagonal_bandwidth=fit.diagonal_bandwidth * 1.5,
    )
    here = fit_parts(Partitioned.local(parts), labels, options, per_subject=False)
    there = fit_parts(
        Partitioned.of(on_dask, on_dask.place(parts)),  # type: ignore[attr-defined]
        labels,
        options,
        per_subject=False,
    )
    _same_bits(here, there)


def test_a_subject_in_two_parts_is_refused(in_process: tuple) -> None:
    _, parts, _, _ = in_process
    twice = [parts[0], parts[0], *parts[1:]]  # the first part's subjects twice
    with pytest.raises(EstimationError, match="must lie in exactly one part"):
        Partitioned.local(twice)


def test_a_part_without_readings_is_left_out(readings: tuple) -> None:
    codes, t, y, part = readings
    order = np.argsort(codes, kind="stable")
    codes, t, y = codes[order], t[order], y[order]
    moved = np.where(part == 2, 4, part)  # part 2 holds nothing now (a file all dropped)
    parts = split_parts(codes, t, y, moved, N_PARTS)
    assert len(parts) == N_PARTS - 1
    assert sum(p.sample.n_subjects for p in parts) == codes.max() + 1


class _Counting(InProcess):
    """Counts the numbers that each pass brings back to the caller."""

    def __init__(self) -> None:
        self.returned: dict[str, int] = {}

    def map(self, fn, parts, per_part=None, shared=()):  # type: ignore[no-untyped-def]
        out = super().map(fn, parts, per_part, shared)
        size = sum(numbers_in(x) for x in out)
        self.returned[fn.__name__] = self.returned.get(fn.__name__, 0) + size
        return out


def _parts_of(low: int, high: int) -> list:
    """300 subjects with ``low`` to ``high`` readings each, in N_PARTS parts."""
    data = yao_design(300, seed=11, min_obs=low, max_obs=high)
    codes = data.id.to_numpy(dtype=np.intp)
    return split_parts(codes, data.t.to_numpy(), data.y.to_numpy(), codes % N_PARTS, N_PARTS)


def test_what_comes_back_does_not_grow_with_the_readings(monkeypatch: pytest.MonkeyPatch) -> None:
    # A fit gathers from its parts per subject (codes, counts, scores) and per bin (the
    # sums); readings only of the likelihood's sampled subjects (capped). Twice the
    # readings per subject, same subjects: everything else comes back at the same size.
    from reportgen.fpca import fit as fit_module

    monkeypatch.setattr(fit_module, "REFINE_MAX_SUBJECTS", 40)
    returned = []
    for low, high in ((2, 5), (6, 12)):
        parts = _parts_of(low, high)
        counting = _Counting()
        fit_parts(
            Partitioned.of(counting, parts),
            np.arange(300),
            replace(OPTIONS, band="plugin", component_rule="fixed", n_components=2),
        )
        returned.append(counting.returned)
    few, many = returned
    assert few.keys() == many.keys()
    for name in few:
        if name != "gather":
            assert few[name] == many[name], name
    assert many["gather"] <= 4 * 40 * 12  # t, y, residual, count: 40 subjects, <= 12 each


def test_the_order_of_the_rows_does_not_change_a_bit(readings: tuple) -> None:
    # The readings in another row order (subjects and readings within them shuffled) are
    # the same data: every sum adds them in one canonical order, (subject, time, value).
    codes, t, y, _ = readings
    labels = np.arange(codes.max() + 1)
    shuffled = np.random.default_rng(5).permutation(codes.size)
    options = replace(OPTIONS, band="plugin")
    _same_bits(
        fit_arrays(codes, t, y, labels, options),
        fit_arrays(codes[shuffled], t[shuffled], y[shuffled], labels, options),
    )


def test_readings_are_ordered_by_time_then_value_within_a_subject() -> None:
    # against numpy's lexsort (reference library); subject 1 has more readings than the
    # insertion sort takes, and repeated times
    rng = np.random.default_rng(2)
    codes = np.repeat([0, 1, 2], [5, 80, 1])
    t = rng.integers(0, 10, codes.size).astype(float)
    y = rng.normal(size=codes.size)
    sample = Sample.from_arrays(codes, t, y)
    order = np.lexsort((y, t, codes))
    assert np.array_equal(sample.t, t[order]) and np.array_equal(sample.y, y[order])


def test_no_subjects_gathered_is_an_empty_sample(in_process: tuple) -> None:
    _, parts, _, sample = in_process
    got, resid = Partitioned.local(parts).gather(
        np.zeros(0, dtype=np.intp), np.zeros(11), BinGrid(0.0, 10.0, 11)
    )
    assert got.n_subjects == 0 and got.t.size == 0 and resid.size == 0
    assert sample.subset(np.zeros(0, dtype=np.intp)).n_subjects == 0


# --- the diagnostics pass (fpca.diagnostics) ----------------------------------------------


def _checks_on(executor: object, parts: list, fit: FPCAFit, chosen: np.ndarray) -> object:
    from reportgen.fpca.diagnostics import check_readings

    data = Partitioned.of(executor, executor.place(parts))  # type: ignore[attr-defined]
    return check_readings(data, fit.kept_scores, fit.predictor, chosen)


CHOSEN = np.array([0, 3, 4, 17, 250, 299])


def test_the_diagnostics_pass_gives_the_definitions(in_process: tuple) -> None:
    import pandas as pd

    fit, parts, _, sample = in_process
    got = _checks_on(InProcess(), parts, fit, CHOSEN)
    # the definitions on the whole sample, through the fit's own methods and numpy's einsum
    codes, t, y = sample.subject, sample.t, sample.y
    phi = fit.eigenfunctions_at(t)
    fitted = fit.mean_at(t) + np.einsum("nk,nk->n", phi, fit.score_values[codes])
    var = (
        fit.error_variance
        - np.einsum("nk,nkl,nl->n", phi, fit.score_cov[codes], phi)
        + np.interp(t, fit.grid, fit.truncation_variance)
    )
    std = (y - fitted) / np.sqrt(var)
    # pandas groupby: the per-subject summary's definition
    by = pd.DataFrame({"s": codes, "r": y - fitted, "q": std**2}).groupby("s")
    residual_sum, squared_sum = got.sums.every()
    np.testing.assert_allclose(residual_sum, by.r.sum(), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(squared_sum, by.q.sum(), rtol=1e-10)
    # numpy.histogram2d over the data's range: the density's definition
    (t0, t1, nt), (y0, y1, ny) = got.time_axis, got.value_axis
    assert (t0, t1, y0, y1) == (t.min(), t.max(), y.min(), y.max())
    ref, _, _ = np.histogram2d(
        t, y, bins=(np.linspace(t0, t1, nt + 1), np.linspace(y0, y1, ny + 1))
    )
    assert np.array_equal(got.density, ref)
    # the chosen subjects' readings, in code order
    index, _, _ = sample.reading_index(CHOSEN)
    assert np.array_equal(got.chosen, CHOSEN)
    assert np.array_equal(got.readings["subject"], codes[index])
    for name, want in (("time", t), ("value", y), ("fitted", fitted), ("standardized", std)):
        np.testing.assert_allclose(got.readings[name], want[index], rtol=1e-10, err_msg=name)


def test_the_diagnostics_pass_gives_the_same_bits(on_dask: object, in_process: tuple) -> None:
    fit, parts, _, _ = in_process
    here, there = (_checks_on(e, parts, fit, CHOSEN) for e in (InProcess(), on_dask))
    for name in ("density", "chosen"):
        assert getattr(here, name).tobytes() == getattr(there, name).tobytes(), name
    for a, b in zip(here.sums.every(), there.sums.every(), strict=True):
        assert a.tobytes() == b.tobytes()
    assert here.time_axis == there.time_axis and here.value_axis == there.value_axis
    for name, values in here.readings.items():
        assert values.tobytes() == there.readings[name].tobytes(), name


def test_the_diagnostics_bring_back_no_more_with_more_readings() -> None:
    # per cell only, plus the chosen subjects' readings (the per-subject sums are kept)
    from reportgen.fpca.diagnostics import check_readings

    returned = []
    for low, high in ((2, 5), (6, 12)):
        parts = _parts_of(low, high)
        fit = fit_parts(
            Partitioned.local(parts),
            np.arange(300),
            replace(OPTIONS, band="plugin", component_rule="fixed", n_components=2),
        )
        counting = _Counting()
        found = check_readings(
            Partitioned.of(counting, parts), fit.kept_scores, fit.predictor, CHOSEN
        )
        kept = int(found.readings["time"].size)
        assert "part_checks" not in counting.returned  # kept, not brought back
        returned.append(counting.returned["checked_found"] - 5 * kept)
    assert returned[0] == returned[1]


# --- group means as passes (fpca.groups) ----------------------------------------------------


def _groups_of(n: int) -> np.ndarray:
    # three groups; "c" holds subjects of one part only, so the other parts have none of it
    part = (np.arange(n) * 7 + np.arange(n) // 13) % N_PARTS
    return np.where(
        part == 0,
        np.where(np.arange(n) % 2 == 0, "c", "a"),
        np.where(np.arange(n) % 3 == 0, "a", "b"),
    )


def test_group_means_over_parts_are_those_of_the_whole_sample(
    readings: tuple, in_process: tuple
) -> None:
    from reportgen.fpca.groups import compare_groups

    codes, t, y, _ = readings
    fit, parts, _, _ = in_process
    groups = _groups_of(fit.n_subjects)
    many = compare_groups(Partitioned.local(parts), fit, groups)
    whole = compare_groups_of(fit, codes, t, y, groups)
    assert many.labels == whole.labels == ("a", "b", "c")
    # sums added in another order: rounding only (common practice, no source)
    np.testing.assert_allclose(many.means, whole.means, rtol=1e-10)
    np.testing.assert_allclose(many.mean_se, whole.mean_se, rtol=1e-8)
    assert (many.statistic, many.p_value) == (whole.statistic, whole.p_value)


def test_group_means_on_a_dask_cluster_give_the_same_bits(
    on_dask: object, in_process: tuple
) -> None:
    from reportgen.fpca.groups import compare_groups

    fit, parts, _, _ = in_process
    groups = _groups_of(fit.n_subjects)
    here = compare_groups(Partitioned.local(parts), fit, groups)
    there = compare_groups(
        Partitioned.of(on_dask, on_dask.place(parts)),  # type: ignore[attr-defined]
        fit,
        groups,
    )
    assert here.means.tobytes() == there.means.tobytes()
    assert here.mean_se.tobytes() == there.mean_se.tobytes()
