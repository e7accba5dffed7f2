"""Numerical edge cases: a correct fit (with a caveat where due) or a clear error that says
what is missing -- never NaN in a report."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from reportgen import EstimationError, fit_sparse_fpca
from reportgen.cli import main
from tests.designs import yao_design


def _frame(n: int = 60, seed: int = 1) -> pd.DataFrame:
    return yao_design(n, seed)


def test_constant_values() -> None:
    frame = _frame().assign(y=3.0)
    with pytest.raises(EstimationError, match="no variation between subjects"):
        fit_sparse_fpca(frame, subject="id", time="t", value="y")


def test_single_shared_time_point() -> None:
    frame = _frame().assign(t=2.0)
    with pytest.raises(EstimationError, match="all readings are at one time"):
        fit_sparse_fpca(frame, subject="id", time="t", value="y")


def test_all_subjects_one_reading() -> None:
    frame = _frame().drop_duplicates("id")
    with pytest.raises(EstimationError, match="found 0 among 60 subjects"):
        fit_sparse_fpca(frame, subject="id", time="t", value="y")


def test_two_subjects_fit_or_say_why() -> None:
    rng = np.random.default_rng(3)
    t = np.tile(np.linspace(0, 10, 12), 2)
    frame = pd.DataFrame(
        {
            "id": np.repeat([1, 2], 12),
            "t": t,
            "y": np.sin(t) + np.repeat([-1.0, 1.0], 12) + rng.normal(0, 0.1, 24),
        }
    )
    try:
        fit = fit_sparse_fpca(frame, subject="id", time="t", value="y")
    except EstimationError as e:  # a clear reason is acceptable, a crash is not
        assert "bandwidth" in str(e) or "eigenvalue" in str(e)
    else:
        assert np.all(np.isfinite(fit.mean)) and np.all(np.isfinite(fit.score_values))
        assert fit.n_subjects == 2


@pytest.mark.parametrize("scale", [1e-12, 1e12])
def test_extreme_value_scales(scale: float) -> None:
    # Scale equivariance (common practice, no source): y -> a y multiplies the mean by a and
    # the eigenvalues by a^2, with the same automatically chosen bandwidths.
    frame = _frame(200)
    base = fit_sparse_fpca(frame, subject="id", time="t", value="y")
    scaled = fit_sparse_fpca(frame.assign(y=frame.y * scale), subject="id", time="t", value="y")
    assert scaled.mean_bandwidth == pytest.approx(base.mean_bandwidth)
    assert scaled.covariance_bandwidth == pytest.approx(base.covariance_bandwidth)
    np.testing.assert_allclose(scaled.mean, base.mean * scale, rtol=1e-8)
    np.testing.assert_allclose(scaled.eigenvalues, base.eigenvalues * scale**2, rtol=1e-6)


@pytest.mark.parametrize("scale", [1e-6, 1e6])
def test_extreme_time_scales(scale: float) -> None:
    frame = _frame(200)
    base = fit_sparse_fpca(frame, subject="id", time="t", value="y")
    scaled = fit_sparse_fpca(frame.assign(t=frame.t * scale), subject="id", time="t", value="y")
    assert scaled.mean_bandwidth == pytest.approx(base.mean_bandwidth * scale)
    np.testing.assert_allclose(scaled.mean, base.mean, rtol=1e-8, atol=1e-8)
    # eigenvalues of the integral operator scale with the length of the domain
    np.testing.assert_allclose(scaled.eigenvalues, base.eigenvalues * scale, rtol=1e-6)


def test_heavy_ties() -> None:
    rng = np.random.default_rng(5)
    n = 150
    ids = np.repeat(np.arange(n), 6)
    t = np.tile(np.arange(6.0), n)  # everyone at the same six visit times
    xi = rng.normal(size=n)
    frame = pd.DataFrame(
        {"id": ids, "t": t, "y": t + xi[ids] * (1 + t / 5) + rng.normal(0, 0.3, ids.size)}
    )
    fit = fit_sparse_fpca(frame, subject="id", time="t", value="y")
    assert np.all(np.isfinite(fit.covariance)) and fit.n_components >= 1


def test_ill_conditioned_rank_one_with_tiny_noise() -> None:
    rng = np.random.default_rng(8)
    n = 300
    ids = np.repeat(np.arange(n), 5)
    t = rng.uniform(0, 1, ids.size)
    xi = rng.normal(size=n)
    frame = pd.DataFrame(
        {
            "id": ids,
            "t": t,
            "y": xi[ids] * np.sqrt(2) * np.sin(np.pi * t) + rng.normal(0, 1e-9, ids.size),
        }
    )
    fit = fit_sparse_fpca(frame, subject="id", time="t", value="y")
    assert fit.error_variance > 0
    assert np.all(np.isfinite(fit.score_values)) and np.all(np.isfinite(fit.score_cov))
    assert fit.eigenvalues[0] == pytest.approx(1.0, rel=0.25)


# --- through the pipeline: dates in the time column, and no NaN in any report -------------

SPEC = """\
report: {{id: edge, title: Edge case}}
data: {{file: d.csv, subject: id, time: when, value: y{extra}}}
checks: {{min_subjects: 2}}
sensitivity: {{factors: [0.5, 2.0]}}
"""


def _dates_frame() -> pd.DataFrame:
    frame = _frame(80)
    when = pd.Timestamp("2024-01-01") + pd.to_timedelta((frame.t * 30).round(), unit="D")
    return frame.assign(when=when.dt.strftime("%Y-%m-%d"), days=(frame.t * 30).round())


def test_dates_converted_with_the_stated_unit(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    frame = _dates_frame()
    frame.to_csv(tmp_path / "d.csv", index=False)
    (tmp_path / "s.yaml").write_text(
        SPEC.format(extra=", time_origin: '2024-01-01', time_scale: months")
    )
    assert main(["run", str(tmp_path / "s.yaml"), "--out", str(tmp_path / "runs")]) == 0
    run = next((tmp_path / "runs").glob("edge/v001"))
    mean = pd.read_csv(run / "tables" / "mean.csv")
    # days after the origin over 365.25 / 12 days per month (the spec's unit)
    assert mean.time.min() == pytest.approx(frame.days.min() / (365.25 / 12), rel=1e-9)
    assert mean.time.max() == pytest.approx(frame.days.max() / (365.25 / 12), rel=1e-9)
    html = (run / "report.html").read_text()
    assert re.search(r"(?i)[>\s,]nan[<\s,]", html) is None
    for table in (run / "tables").iterdir():
        if table.name != "sensitivity.csv":  # NaN there marks a failed setting, by design
            assert "nan" not in table.read_text().lower(), table.name


def test_dates_without_a_unit_are_a_clear_error(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _dates_frame().to_csv(tmp_path / "d.csv", index=False)
    (tmp_path / "s.yaml").write_text(SPEC.format(extra=""))
    assert main(["run", str(tmp_path / "s.yaml"), "--out", str(tmp_path / "runs")]) == 2
    err = capsys.readouterr().err
    # dates are never read as numbers; the message names the fields to set
    assert "column 'when' holds dates; set data.time_origin" in err
    assert "data.time_scale" in err
