"""Conditional expectation against joint-Gaussian conditioning computed independently."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from reportgen.fpca.scores import conditional_scores


def _reference(
    phi: np.ndarray, lam: np.ndarray, sigma2: float, r: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    # Reference: for jointly Gaussian (xi, Y) with Cov(xi) = L, Cov(Y) = S = P L P' + s2 I,
    # Cov(xi, Y) = L P', E[xi | Y] = L P' S^-1 (Y - mu) and
    # Cov(xi | Y) = L - L P' S^-1 P L (standard conditioning formulas; computed here with
    # scipy.linalg.solve on the n x n system, independently of the K x K Woodbury form).
    big_l = np.diag(lam)
    s = phi @ big_l @ phi.T + sigma2 * np.eye(phi.shape[0])
    gain = scipy.linalg.solve(s, phi @ big_l, assume_a="pos").T
    return gain @ r, big_l - gain @ phi @ big_l


def test_scores_equal_gaussian_conditioning() -> None:
    rng = np.random.default_rng(11)
    lam = np.array([3.0, 1.2, 0.4])
    sigma2 = 0.3
    sizes = np.array([1, 2, 5, 1, 9, 3])
    starts = np.concatenate(([0], np.cumsum(sizes)[:-1]))
    n = sizes.sum()
    t = rng.uniform(0, 1, n)
    legendre2 = np.sqrt(5) * (6 * t**2 - 6 * t + 1)
    phi = np.column_stack([np.ones(n), np.sqrt(3) * (2 * t - 1), legendre2])
    r = rng.normal(size=n)
    scores, cov = conditional_scores(starts, r, phi, lam, sigma2)
    for i, (s0, m) in enumerate(zip(starts, sizes, strict=True)):
        ref_xi, ref_cov = _reference(phi[s0 : s0 + m], lam, sigma2, r[s0 : s0 + m])
        np.testing.assert_allclose(scores[i], ref_xi, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(cov[i], ref_cov, rtol=1e-10, atol=1e-12)


def test_one_reading_is_enough() -> None:
    # One reading shrinks the score towards 0 by lambda phi^2 / (lambda phi^2 + sigma2).
    scores, cov = conditional_scores(
        np.array([0]), np.array([2.0]), np.array([[0.5]]), np.array([4.0]), 1.0
    )
    assert scores[0, 0] == 4.0 * 0.5 * 2.0 / (4.0 * 0.25 + 1.0)
    assert cov[0, 0, 0] == 4.0 - 16.0 * 0.25 / 2.0


def test_criteria_equal_direct_gaussian_likelihood_and_loo() -> None:
    # Reference: scipy.stats.multivariate_normal.logpdf of each subject's readings under
    # N(mu_i, Phi_i L Phi_i' + s2 I), and leave-one-out conditional means computed by
    # solving the (n-1) x (n-1) system directly (standard Gaussian conditioning).
    from scipy.stats import multivariate_normal

    from reportgen.fpca.design import Sample
    from reportgen.fpca.likelihood import evaluate
    from reportgen.fpca.scores import loo_errors, sample_terms

    rng = np.random.default_rng(2)
    sizes = np.array([1, 3, 4, 2, 6])
    subject = np.repeat(np.arange(sizes.size), sizes)
    t = rng.uniform(0, 1, subject.size)
    grid = np.linspace(0, 1, 201)
    funcs = np.column_stack([np.ones(201), np.sqrt(3) * (2 * grid - 1)])
    lam, s2 = np.array([2.0, 0.5]), 0.4
    r = rng.normal(size=subject.size)
    sample = Sample.from_arrays(subject, t, r)
    # the sample's own order of the readings, (subject, time); the references below sum
    # over each subject's readings, in which order does not matter
    terms = sample_terms(sample, np.arange(sizes.size), sample.y, grid, funcs)
    loo = loo_errors(terms, [(lam[:1], s2), (lam[:2], s2)])
    loglik = [evaluate(terms.sums.leading(k), lam[:k], s2, False)[0] for k in (1, 2)]
    for k in (1, 2):
        phi = np.column_stack([np.ones_like(t), np.sqrt(3) * (2 * t - 1)])[:, :k]
        ref_ll, errs = 0.0, []
        for i in range(sizes.size):
            sel = subject == i
            cov = phi[sel] @ np.diag(lam[:k]) @ phi[sel].T + s2 * np.eye(sel.sum())
            ref_ll += multivariate_normal(np.zeros(sel.sum()), cov).logpdf(r[sel])
            for j in range(sel.sum()) if sel.sum() > 1 else []:
                o = np.arange(sel.sum()) != j
                pred = cov[j, o] @ np.linalg.solve(cov[np.ix_(o, o)], r[sel][o])
                errs.append((r[sel][j] - pred) ** 2)
        assert loglik[k - 1] == pytest.approx(ref_ll, rel=1e-9)
        assert loo[k - 1] == pytest.approx(np.mean(errs), rel=1e-9)


def test_small_inverses_match_numpy() -> None:
    # Reference: numpy.linalg.inv (general-purpose library) on random SPD stacks, K = 1..3.
    from reportgen.fpca.scores import _inverse_spd

    rng = np.random.default_rng(4)
    for k in (1, 2, 3):
        x = rng.normal(size=(50, k, k))
        spd = x @ np.swapaxes(x, 1, 2) + 0.1 * np.eye(k)
        np.testing.assert_allclose(_inverse_spd(spd), np.linalg.inv(spd), rtol=1e-10)
