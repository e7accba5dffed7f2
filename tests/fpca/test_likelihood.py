"""The reduced-rank marginal likelihood against dense references, and its maximisation."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import multivariate_normal

from reportgen.fpca.likelihood import SubjectSums, evaluate, maximise


def _subjects(
    rng: np.random.Generator, sizes: list[int], k: int
) -> tuple[list[np.ndarray], list[np.ndarray]]:
    phis, rs = [], []
    for m in sizes:
        t = rng.uniform(0, 1, m)
        basis = np.column_stack(
            [np.ones(m), np.sqrt(3) * (2 * t - 1), np.sqrt(5) * (6 * t**2 - 6 * t + 1)]
        )[:, :k]
        phis.append(basis)
        rs.append(rng.normal(size=m) * 1.3)
    return phis, rs


def _sums(phis: list[np.ndarray], rs: list[np.ndarray]) -> SubjectSums:
    return SubjectSums(
        np.stack([p.T @ p for p in phis]),
        np.stack([p.T @ r for p, r in zip(phis, rs, strict=True)]),
        np.array([r @ r for r in rs]),
        np.array([r.size for r in rs], float),
    )


def test_loglik_equals_dense_multivariate_normal() -> None:
    # Reference: scipy.stats.multivariate_normal.logpdf of each subject's residual vector
    # under N(0, Phi_i diag(lambda) Phi_i' + sigma^2 I), summed (general-purpose library).
    rng = np.random.default_rng(3)
    phis, rs = _subjects(rng, [1, 2, 5, 3, 8, 1, 4], 3)
    lam, s2 = np.array([2.0, 0.7, 0.2]), 0.35
    ref = sum(
        multivariate_normal(np.zeros(r.size), p @ np.diag(lam) @ p.T + s2 * np.eye(r.size)).logpdf(
            r
        )
        for p, r in zip(phis, rs, strict=True)
    )
    ll, _, _ = evaluate(_sums(phis, rs), lam, s2)
    assert ll == pytest.approx(ref, rel=1e-12)


def test_score_equals_finite_differences() -> None:
    # Reference: central differences of the log-likelihood itself (step 1e-5; truncation
    # error ~1e-10 relative), common practice, no source. Also at lambda_3 = 0, where the
    # one-sided difference is used (the likelihood is defined only for lambda >= 0).
    rng = np.random.default_rng(8)
    phis, rs = _subjects(rng, [2, 6, 3, 1, 7, 4, 5, 2], 3)
    sums = _sums(phis, rs)
    for p in (np.array([1.5, 0.6, 0.3, 0.4]), np.array([1.5, 0.6, 0.0, 0.4])):
        _, score, _ = evaluate(sums, p[:-1], float(p[-1]))
        h = 1e-5
        for j in range(p.size):
            up, down = p.copy(), p.copy()
            up[j] += h
            down[j] -= h if p[j] > 0 else 0.0
            fd = (
                evaluate(sums, up[:-1], float(up[-1]), False)[0]
                - evaluate(sums, down[:-1], float(down[-1]), False)[0]
            ) / (up[j] - down[j])
            tol = 1e-8 if p[j] > 0 else 1e-4  # one-sided: error of order h
            assert score[j] == pytest.approx(fd, rel=tol, abs=tol)


def test_information_equals_expected_outer_product_of_scores() -> None:
    # Reference: the Fisher information is the covariance of the score under the model
    # (common practice, no source); estimated here by simulating many data sets from the
    # model at fixed designs and averaging score outer products (Monte Carlo, 4000 draws).
    rng = np.random.default_rng(12)
    phis, _ = _subjects(rng, [3, 5, 2, 6], 2)
    lam, s2 = np.array([1.2, 0.4]), 0.5
    draws = []
    _, _, info = evaluate(_sums(phis, [np.zeros(p.shape[0]) for p in phis]), lam, s2)
    for _ in range(4000):
        rs = [
            p @ (rng.normal(size=2) * np.sqrt(lam)) + rng.normal(size=p.shape[0]) * np.sqrt(s2)
            for p in phis
        ]
        draws.append(evaluate(_sums(phis, rs), lam, s2)[1])
    emp = np.cov(np.array(draws).T)
    np.testing.assert_allclose(emp, info, atol=0.08 * np.max(np.abs(info)))


def test_maximise_recovers_simulated_variances() -> None:
    # Simulated from the model with known (lambda, sigma^2); the maximum must sit where the
    # score vanishes and near the truth (2000 subjects: sampling error a few percent).
    rng = np.random.default_rng(21)
    sizes = rng.integers(1, 8, 2000).tolist()
    phis, _ = _subjects(rng, sizes, 2)
    lam, s2 = np.array([2.0, 0.5]), 0.25
    rs = [
        p @ (rng.normal(size=2) * np.sqrt(lam)) + rng.normal(size=p.shape[0]) * np.sqrt(s2)
        for p in phis
    ]
    sums = _sums(phis, rs)
    fit = maximise(sums, np.array([0.3, 3.0]), 2.0)
    assert fit.converged
    _, score, info = evaluate(sums, fit.eigenvalues, fit.error_variance)
    # Newton step to the maximum, in standard errors (its length in the metric of the
    # information): within the promised 1.4e-6 (2 x 1e-12 nats of expected gain).
    assert float(score @ np.linalg.solve(info, score)) < 2e-12
    np.testing.assert_allclose(fit.eigenvalues, lam, rtol=0.15)
    assert fit.error_variance == pytest.approx(s2, rel=0.1)


def test_a_component_without_variance_goes_to_zero() -> None:
    # Data simulated with lambda_2 = 0: the maximum sits on the bound lambda_2 = 0 with a
    # score pointing down (Karush-Kuhn-Tucker conditions; common practice, no source).
    rng = np.random.default_rng(5)
    sizes = rng.integers(2, 6, 1500).tolist()
    phis, _ = _subjects(rng, sizes, 2)
    rs = [p[:, 0] * rng.normal() * np.sqrt(1.5) + rng.normal(size=p.shape[0]) * 0.5 for p in phis]
    sums = _sums(phis, rs)
    fit = maximise(sums, np.array([1.0, 0.3]), 1.0)
    assert fit.converged and fit.iterations < 50
    _, score, _ = evaluate(sums, fit.eigenvalues, fit.error_variance)
    if fit.eigenvalues[1] == 0.0:
        assert score[1] <= 0
    else:
        assert fit.eigenvalues[1] < 0.02
    assert fit.error_variance == pytest.approx(0.25, rel=0.1)
