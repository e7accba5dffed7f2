"""The model's adequacy checks (``fpca.adequacy``) against reference libraries, and their
false-alarm and detection rates on simulated readings."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.special import ndtri
from scipy.stats import spearmanr

from reportgen.fpca.adequacy import binned_means, spearman, variance_by_time, visit_pattern


def test_spearman_equals_scipy_with_ties() -> None:
    # Reference: scipy.stats.spearmanr (rho, and the two-sided p-value of its t
    # approximation), on data with many ties (general-purpose library).
    rng = np.random.default_rng(2)
    x = rng.integers(0, 6, 150).astype(float)
    y = x * 0.3 + rng.normal(size=150)
    y[:40] = np.round(y[:40])
    rho, p = spearman(x, y)
    ref = spearmanr(x, y)
    assert rho == pytest.approx(ref.statistic, rel=1e-12)
    assert p == pytest.approx(ref.pvalue, rel=1e-8)


def test_bin_interval_is_the_cluster_robust_one() -> None:
    # Reference: statsmodels OLS of the values on a constant with cov_type="cluster" by
    # subject (its small-sample factor G / (G - 1) x (N - 1) / (N - 1) for one regressor),
    # fitted in each bin (general-purpose library).
    rng = np.random.default_rng(5)
    owner = np.repeat(np.arange(120), 4)
    x = rng.uniform(0, 1, owner.size)
    value = rng.normal(size=120)[owner] + rng.normal(size=owner.size)
    found = binned_means(x, value, owner, np.zeros(x.size), bins=4, level=0.95)
    z = ndtri(1 - 0.05 / 8)  # Bonferroni over the 4 bins
    for b in range(4):
        inside = (x >= found.lower_edge[b]) & (
            (x < found.upper_edge[b]) if b < 3 else (x <= found.upper_edge[b])
        )
        ols = sm.OLS(value[inside], np.ones(inside.sum())).fit(
            cov_type="cluster", cov_kwds={"groups": owner[inside]}
        )
        assert found.observed[b] == pytest.approx(ols.params[0], rel=1e-12)
        assert (found.high[b] - found.observed[b]) / z == pytest.approx(ols.bse[0], rel=1e-9)


def _readings(
    rng: np.random.Generator, n: int, error_sd: object
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Random-intercept-and-slope readings on [0, 10] with known variance at each time."""
    m = rng.integers(2, 8, n)
    owner = np.repeat(np.arange(n), m)
    t = rng.uniform(0, 10, owner.size)
    b0, b1 = rng.normal(0, 1.5, n), rng.normal(0, 0.2, n)
    sd = error_sd(t) if callable(error_sd) else np.full(t.size, float(error_sd))  # type: ignore[arg-type]
    dev = b0[owner] + b1[owner] * t + rng.normal(size=t.size) * sd
    model = 1.5**2 + 0.2**2 * t**2 + 0.5**2  # the model's variance: constant error sd 0.5
    return t, dev, owner, model


def test_variance_check_false_alarms_and_detection() -> None:
    # Reference: the data-generating model. Where it holds (error sd 0.5, as the model's
    # variance says), the check fires in at most 10% of 200 studies (nominal 1% over the
    # bins together; measured about 4%, the squares being skewed); where the error sd grows
    # from 0.1 to 2.1 over time around the same average, in at least 90% of 50 (measured
    # 94-98%).
    rng = np.random.default_rng(11)
    false = sum(variance_by_time(*_readings(rng, 300, 0.5)).fires for _ in range(200))
    assert false <= 20
    grow = np.sqrt(np.mean((0.1 + 0.2 * np.linspace(0, 10, 1001)) ** 2))
    assert grow > 0.5  # on average the growing error is no smaller than the model's
    hits = sum(
        variance_by_time(*_readings(rng, 300, lambda t: 0.1 + 0.2 * t)).fires for _ in range(50)
    )
    assert hits >= 45


def test_visit_check_false_alarms_and_detection() -> None:
    # Reference: the data-generating model. Readings whose last time and count do not
    # depend on the score: at most 5% of 200 studies fire (nominal 1% over the tests);
    # readings that stop earlier the higher the score: at least 95% of 50 fire.
    rng = np.random.default_rng(12)
    false = 0
    for _ in range(200):
        scores = rng.normal(size=(300, 2))
        count = rng.integers(1, 8, 300).astype(float)
        last = rng.uniform(0, 10, 300)
        false += visit_pattern(scores, last, count).fires
    assert false <= 10
    hits = 0
    for _ in range(50):
        scores = rng.normal(size=(300, 2))
        last = np.clip(10 / (1 + np.exp(0.8 * scores[:, 0])) + rng.uniform(0, 3, 300), 0, 10)
        found = visit_pattern(scores, last, rng.integers(1, 8, 300).astype(float))
        hits += bool(found.last_time_fires[0] and found.with_last_time[0] < 0)
    assert hits >= 48


def test_a_bin_with_few_subjects_gives_no_verdict() -> None:
    # The rule (common practice, no source): below MIN_BIN_SUBJECTS subjects a cluster-
    # robust interval is too short, so the bin is not judged even when far off.
    owner = np.repeat(np.arange(6), 30)
    x = np.linspace(0, 1, owner.size)
    found = binned_means(x, np.full(x.size, 5.0) + 0.01 * owner, owner, np.zeros(x.size), bins=2)
    assert not found.judged.any() and not found.fires


def test_mean_error_reaches_the_binned_residuals_as_the_dense_algebra_says() -> None:
    # Reference: numpy's dense inverse of each subject's covariance Sigma = Phi Lambda
    # Phi' + sigma^2 I; the leave-one-out residuals are D^-1 Sigma^-1 (y - mu) (a
    # standard identity of Gaussian conditioning, common practice, no source), so a mean
    # error delta moves them by -D^-1 Sigma^-1 delta. Their bin means' variance under
    # delta ~ N(0, C) is compared with the formula; a lone reading takes the whole error,
    # and readings all along a constant-function subject absorb a constant error.
    from reportgen.fpca.adequacy import mean_error_variance
    from reportgen.fpca.scores import conditional_scores

    rng = np.random.default_rng(11)
    grid = np.linspace(0.0, 1.0, 21)
    m = rng.integers(1, 6, 40)
    owner = np.repeat(np.arange(40), m)
    t = rng.uniform(0, 1, owner.size)
    basis = np.column_stack([np.ones(grid.size), np.sqrt(2) * np.cos(np.pi * grid)])
    phi = np.column_stack([np.interp(t, grid, basis[:, c]) for c in range(2)])
    lam, s2 = np.array([2.0, 0.5]), 0.3
    starts = np.searchsorted(owner, np.arange(40)).astype(np.intp)
    _, omega = conditional_scores(starts, np.zeros(t.size), phi, lam, s2)
    quad = np.einsum("nk,nkl,nl->n", phi, omega[owner], phi)
    keep = 1.0 - quad / s2
    # a smooth covariance of the mean's error over the grid
    sd = 0.2 + 0.3 * grid
    cov = np.outer(sd, sd) * np.exp(-((grid[:, None] - grid[None, :]) ** 2) / 0.1)
    which = np.minimum((t * 3).astype(int), 2)
    got = mean_error_variance(which, 3, t, phi, owner, omega, keep, s2, grid, cov)
    # dense: the map from the grid's delta to every reading's residual shift
    # row j: the linear interpolation weights of t_j on the grid (np.interp of each unit vector)
    interp = np.column_stack([np.interp(t, grid, unit) for unit in np.eye(grid.size)])
    shift = np.zeros((t.size, grid.size))
    for i in range(40):
        rows = owner == i
        sigma = phi[rows] @ np.diag(lam) @ phi[rows].T + s2 * np.eye(rows.sum())
        prec = np.linalg.inv(sigma)
        shift[rows] = (prec / np.diag(prec)[:, None]) @ interp[rows]
    for b in range(3):
        a = shift[which == b].mean(axis=0)
        assert got[b] == pytest.approx(a @ cov @ a, rel=1e-9)
    # lone readings (no score error to share) carry the mean's whole error
    lone = np.arange(5)
    alone = mean_error_variance(
        np.zeros(5, dtype=np.intp),
        1,
        t[:5],
        phi[:5],
        lone,
        np.zeros((5, 2, 2)),
        np.ones(5),
        s2,
        grid,
        cov,
    )
    e = interp[:5].mean(axis=0)
    assert alone[0] == pytest.approx(e @ cov @ e, rel=1e-12)
