"""The adequacy checks through a whole fit: silent where the model holds, each firing on
the misfit it is for, and the caveats they generate."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pandas as pd
import pytest

from reportgen.analysis.adequacy import Adequacy, adequacy_caveats, adequacy_tables, model_checks
from reportgen.analysis.views import reading_view
from reportgen.api import fit_sparse_fpca
from reportgen.fpca.plan import Part, Partitioned


def _study(
    seed: int,
    error_sd: Callable[[np.ndarray], np.ndarray] = lambda t: np.ones_like(t),
    dropout: float = 0.0,
    n: int = 400,
) -> pd.DataFrame:
    """Simulated readings (the data-generating model is the reference): a level and a
    bump, 2-7 readings per subject on [0, 10]; with ``dropout`` a subject's readings stop
    earlier the higher its level."""
    rng = np.random.default_rng(seed)
    m = rng.integers(2, 8, n)
    xi = rng.normal(size=(n, 2)) * [2.0, 1.0]
    frames = []
    for i in range(n):
        t = np.sort(rng.uniform(0, 10, m[i]))
        if dropout:
            stop = 10 / (1 + np.exp(dropout * xi[i, 0])) + rng.uniform(0, 2)
            t = t[t <= max(stop, t[0])]
        bump = 1.5 * np.sin(np.pi * t / 10)
        y = 5 + 0.3 * t + xi[i, 0] + xi[i, 1] * bump + rng.normal(size=t.size) * error_sd(t)
        frames.append(pd.DataFrame({"id": i, "t": t, "y": y}))
    return pd.concat(frames, ignore_index=True)


def _checks(frame: pd.DataFrame) -> Adequacy:
    fit = fit_sparse_fpca(frame, subject="id", time="t", value="y", band="plugin")
    data = Partitioned.local([Part(fit._sample, np.arange(fit.n_subjects))])
    view, _, _ = reading_view(data, fit, np.zeros(0, dtype=np.intp))
    return model_checks(fit, view.residuals, view.residual_codes)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_silent_where_the_model_holds(seed: int) -> None:
    found = _checks(_study(seed))
    assert not found.variance.fires
    assert not found.by_time.fires and not found.by_fitted.fires and not found.spread.fires
    assert not found.visits.fires
    assert adequacy_caveats(found, "days") == []


@pytest.mark.parametrize("seed", [1, 2])
def test_an_error_variance_growing_over_time_is_found(seed: int) -> None:
    # error sd 0.2 at the start, 2.7 at the end: the model has one error variance
    found = _checks(_study(seed, error_sd=lambda t: 0.2 + 0.25 * t))
    assert found.spread.fires
    # early bins below 1, late ones above: the scatter grows
    assert found.spread.observed[0] < 1 < found.spread.observed[-1]
    words = " ".join(adequacy_caveats(found, "days"))
    assert "scatter around the subjects' curves changes over time" in words
    assert "one measurement-error variance for all times" in words


@pytest.mark.parametrize("seed", [1, 2])
def test_informative_dropout_is_found(seed: int) -> None:
    found = _checks(_study(seed, dropout=1.5))
    v = found.visits
    assert v.last_time_fires[0] and v.with_last_time[0] < 0  # high levels leave early
    words = " ".join(adequacy_caveats(found, "days"))
    assert "readings stop earlier for subjects with higher component 1 scores" in words
    assert "informative dropout" in words
    tables = adequacy_tables(found)
    row = tables["visit_pattern"].iloc[0]
    assert row.fires and row.p_value < row.threshold
    assert f"p = {row.p_value:.2g}" in words
