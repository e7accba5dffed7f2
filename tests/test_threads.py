"""BLAS runs on one thread inside a fit and inside the numeric commands."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from threadpoolctl import threadpool_info, threadpool_limits

import reportgen.fpca.fit as fit_module
from reportgen import fit_sparse_fpca


def _blas_threads() -> list[int]:
    return [p["num_threads"] for p in threadpool_info() if p["user_api"] == "blas"]


def _frame() -> pd.DataFrame:
    rng = np.random.default_rng(2)
    subj = np.repeat(np.arange(120), 5)
    t = rng.uniform(0, 1, subj.size)
    y = np.sin(3 * t) + rng.normal(0, 1, 120)[subj] + rng.normal(0, 0.2, subj.size)
    return pd.DataFrame({"id": subj, "t": t, "y": y})


def test_fit_runs_on_one_blas_thread_whatever_the_caller_allows(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # threadpoolctl's own report of the loaded BLAS libraries (general-purpose library):
    # inside the likelihood step every BLAS has one thread, though the caller allowed two.
    seen: list[list[int]] = []
    real = fit_module.maximise

    def spy(*args: Any, **kwargs: Any) -> Any:
        seen.append(_blas_threads())
        return real(*args, **kwargs)

    monkeypatch.setattr(fit_module, "maximise", spy)
    with threadpool_limits(limits=2, user_api="blas"):
        fit_sparse_fpca(_frame(), subject="id", time="t", value="y")
    assert seen and all(threads and set(threads) == {1} for threads in seen)


def test_results_do_not_depend_on_the_callers_thread_count() -> None:
    results = []
    for threads in (1, 2):
        with threadpool_limits(limits=threads, user_api="blas"):
            fit = fit_sparse_fpca(_frame(), subject="id", time="t", value="y")
        results.append((fit.eigenvalues.copy(), fit.error_variance, fit.scores.copy()))
    np.testing.assert_array_equal(results[0][0], results[1][0])
    assert results[0][1] == results[1][1]
    np.testing.assert_array_equal(results[0][2], results[1][2])


def test_numeric_commands_pin_the_whole_command(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Any
) -> None:
    # `reportgen run` holds one BLAS thread around everything it computes, not only the fit.
    import reportgen.runs.writer
    from reportgen.cli import main

    seen: list[list[int]] = []

    def fake_run(*args: Any, **kwargs: Any) -> Any:
        seen.append(_blas_threads())
        return tmp_path / "v001"

    monkeypatch.setattr(reportgen.runs.writer, "run_spec", fake_run)
    with threadpool_limits(limits=2, user_api="blas"):
        assert main(["run", "spec.yaml", "--quiet"]) == 0
    assert seen == [[1] * len(seen[0])] and seen[0]
