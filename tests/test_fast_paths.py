"""The faster paths for large data give what the general-purpose libraries give.

References, beside each test: pandas (``DataFrame.duplicated``), scipy.stats
(``rankdata``, ``spearmanr``) and Python's ``sorted``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from reportgen.analysis.analyse import _by_readings_then_id
from reportgen.analysis.views import average_ranks, spread_trend
from reportgen.fpca import FPCAOptions, fit_arrays
from reportgen.inputs.cleaning import duplicate_mask

# few subjects and few distinct times, so that ties are common; -0.0 beside 0.0
ROWS = st.lists(
    st.tuples(st.integers(0, 4), st.sampled_from([0.0, -0.0, 1.5, 2.0, 7.25])),
    min_size=1,
    max_size=40,
)


def _pandas(codes: np.ndarray, t: np.ndarray) -> np.ndarray:
    frame = pd.DataFrame({"subject": codes, "time": t})
    return frame.duplicated(["subject", "time"], keep=False).to_numpy()


# pandas DataFrame.duplicated(keep=False): the check's definition before its rewrite
@settings(max_examples=400, deadline=None)
@given(ROWS, st.booleans())
def test_same_rows_as_pandas(rows: list[tuple[int, float]], grouped: bool) -> None:
    if grouped:  # the usual layout: readings grouped by subject, in time order
        rows = sorted(rows)
    codes = np.array([r[0] for r in rows], dtype=np.intp)
    t = np.array([r[1] for r in rows])
    assert np.array_equal(duplicate_mask(codes, t), _pandas(codes, t))


def test_large_grouped_layout_with_a_few_duplicates() -> None:
    rng = np.random.default_rng(7)
    sizes = rng.integers(1, 9, 20_000)
    codes = np.repeat(np.arange(sizes.size), sizes)
    t = np.concatenate([np.sort(rng.uniform(0, 10, n)) for n in sizes])
    i = int(np.flatnonzero(codes[1:] == codes[:-1])[50])
    t[i + 1] = t[i]  # one shared (subject, time)
    for order in (np.arange(codes.size), rng.permutation(codes.size)):
        found = duplicate_mask(codes[order], t[order])
        assert int(found.sum()) == 2
        assert np.array_equal(found, _pandas(codes[order], t[order]))


# scipy.stats.rankdata (method="average") and spearmanr
@settings(max_examples=200, deadline=None)
@given(st.lists(st.sampled_from([0.0, 1.0, 1.0, 2.5, -3.0, 7.0]), min_size=1, max_size=30))
def test_average_ranks_match_scipy(values: list[float]) -> None:
    from scipy.stats import rankdata

    x = np.array(values)
    assert np.array_equal(average_ranks(x), rankdata(x))
    assert np.array_equal(average_ranks(np.unique(x)), rankdata(np.unique(x)))  # no ties


@pytest.mark.parametrize("n", [5000, 150_000])  # the larger one ranks in two threads
def test_spread_trend_is_spearman(n: int) -> None:
    from scipy.stats import spearmanr

    rng = np.random.default_rng(3)
    fitted = np.round(rng.normal(size=n), 1)  # many ties
    std = rng.normal(size=n) * (1 + 0.3 * fitted.clip(-2, 2))
    frame = pd.DataFrame({"fitted": fitted, "standardized": std})
    ref = spearmanr(np.abs(std), fitted).statistic
    assert abs(spread_trend(frame) - ref) < 1e-12


# Python's sorted over (readings, id as text) tuples: the order's definition
def test_order_by_readings_then_id() -> None:
    rng = np.random.default_rng(1)
    for labels in (
        np.array(sorted(map(str, range(3000))), dtype=object),
        rng.permutation(3000),
        np.array([f"s{i}" for i in rng.permutation(3000)], dtype=object),
    ):
        n = rng.integers(1, 6, labels.size)
        expected = [s for _, s in sorted(zip(n, map(str, labels), strict=True))]
        assert [str(labels[i]) for i in _by_readings_then_id(n, labels)] == expected


def test_a_fit_without_scores_has_the_same_population_parts() -> None:
    # contract between the two ways of fitting (the sensitivity fits use per_subject=False)
    rng = np.random.default_rng(2)
    n = 300
    codes = np.repeat(np.arange(n), rng.integers(2, 6, n))
    t = rng.uniform(0, 1, codes.size)
    y = np.sin(3 * t) + rng.normal(size=n)[codes] * np.cos(t) + rng.normal(0, 0.2, t.size)
    full = fit_arrays(codes, t, y, np.arange(n), FPCAOptions())
    slim = fit_arrays(codes, t, y, np.arange(n), FPCAOptions(), per_subject=False)
    assert slim.score_values.shape == (0, full.n_components) and slim.n_subjects == 0
    for name in ("mean", "eigenfunctions", "all_eigenvalues", "error_variance"):
        np.testing.assert_array_equal(getattr(slim, name), getattr(full, name))


def test_pair_counts_numpy_and_compiled_agree(monkeypatch: pytest.MonkeyPatch) -> None:
    # the two ways of counting pairs (numpy for check, the fit's kernel in run); the
    # kernel's pair sums are checked against explicit enumeration in tests/fpca/test_design.py
    import sys

    import reportgen.fpca._kernels  # noqa: F401  (the compiled path needs it loaded)
    from reportgen.fpca.feasibility import pair_counts
    from reportgen.fpca.smoothing import BinGrid

    rng = np.random.default_rng(4)
    codes = rng.permutation(np.repeat(np.arange(500), rng.integers(1, 7, 500)))
    t = rng.uniform(0, 10, codes.size)
    bins = BinGrid(0.0, 10.0, 31)
    compiled = pair_counts(codes, t, bins)
    monkeypatch.delitem(sys.modules, "reportgen.fpca._kernels")
    plain = pair_counts(codes, t, bins)
    np.testing.assert_allclose(compiled, plain, rtol=1e-12, atol=1e-9)
    assert compiled.sum() > 0
