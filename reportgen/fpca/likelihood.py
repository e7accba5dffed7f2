"""Marginal Gaussian likelihood of the reduced-rank model, and its maximisation.

With the eigenfunctions fixed, subject i's residual vector r_i = Y_i - mu(T_i) is modelled as

    r_i ~ N(0, Sigma_i),   Sigma_i = Phi_i diag(lambda) Phi_i' + sigma^2 I

(the reduced-rank model of James, Hastie & Sugar 2000, Biometrika 87:587-602, and of Peng &
Paul 2009, JCGS 18:995-1015, here with the eigenfunctions taken from the smoothed surface).
Everything depends on the data only through per-subject sums: ``G_i = Phi_i' Phi_i``
(K x K), ``c_i = Phi_i' r_i``, ``s_i = r_i' r_i`` and ``n_i``. With
``A_i = diag(1/lambda) + G_i / sigma^2`` and the conditional scores
``xi_i = A_i^-1 c_i / sigma^2`` (Woodbury identity and determinant lemma)::

    log L_i = -1/2 [n_i log 2 pi + n_i log sigma^2 + sum log lambda + log det A_i
                    + s_i / sigma^2 - c_i' A_i^-1 c_i / sigma^4]

In the log parameters theta_k = log lambda_k and tau = log sigma^2 the score and the
expected (Fisher) information are, summed over subjects (derived from the general
variance-component formulas d log L = -1/2 [tr(S^-1 dS) - r' S^-1 dS S^-1 r] and
I_ab = 1/2 tr(S^-1 dS_a S^-1 dS_b); Searle, Casella & McCulloch 1992, ch. 6)::

    d/d theta_k = 1/2 [(xi_k^2 + (A^-1)_kk) / lambda_k - 1]
    d/d tau     = -1/2 [n - (|r - Phi xi|^2 + tr(A^-1 G)) / sigma^2]
    I_kl        = 1/2 (delta_kl - (A^-1)_kl / sqrt(lambda_k lambda_l))^2
    I_k,tau     = 1/2 (A^-1 G A^-1)_kk / (lambda_k sigma^2)
    I_tau,tau   = 1/2 [n - 2 tr(A^-1 G) / sigma^2 + tr((A^-1 G)^2) / sigma^4]

``tests/test_likelihood.py`` checks the log-likelihood against scipy's dense
multivariate normal and the score against finite differences.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import EstimationError
from .smoothing import FloatArray

_LOG_2PI = float(np.log(2.0 * np.pi))


@dataclass(frozen=True)
class SubjectSums:
    """Per-subject sums of the model: gram (n, K, K), cross (n, K), rr (n,), n_obs (n,)."""

    gram: FloatArray
    cross: FloatArray
    rr: FloatArray
    n_obs: FloatArray

    def leading(self, k: int) -> SubjectSums:
        """The sums of the first ``k`` components only."""
        return SubjectSums(self.gram[:, :k, :k], self.cross[:, :k], self.rr, self.n_obs)


@dataclass(frozen=True)
class LikelihoodFit:
    """The maximum of the marginal likelihood over (lambda, sigma^2).

    Attributes
    ----------
    eigenvalues : ndarray of shape (K,)
    error_variance : float
    loglik : float
    iterations : int
    converged : bool
    n_subjects : int
        Subjects whose readings entered the likelihood.
    """

    eigenvalues: FloatArray
    error_variance: float
    loglik: float
    iterations: int
    converged: bool
    n_subjects: int


def _inverse_and_logdet(a: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Inverses and log-determinants of a stack of symmetric positive-definite matrices."""
    sign, logdet = np.linalg.slogdet(a)
    if np.any(sign <= 0):
        raise np.linalg.LinAlgError("a matrix of the stack is not positive definite")
    return np.linalg.inv(a), logdet


def evaluate(sums: SubjectSums, log_lam: FloatArray, log_s2: float, derivatives: bool = True
             ) -> tuple[float, FloatArray, FloatArray]:
    """Log-likelihood, score and Fisher information in (log lambda_1..K, log sigma^2).

    Returns
    -------
    loglik : float
    score : ndarray of shape (K + 1,)
    information : ndarray of shape (K + 1, K + 1)
    """
    lam = np.exp(log_lam)
    s2 = float(np.exp(log_s2))
    k = lam.size
    a = sums.gram / s2 + np.diag(1.0 / lam)
    a_inv, logdet_a = _inverse_and_logdet(a)
    xi = np.einsum("nij,nj->ni", a_inv, sums.cross) / s2
    quad = sums.rr / s2 - np.einsum("ni,ni->n", sums.cross, xi) / s2
    n_tot = float(sums.n_obs.sum())
    loglik = -0.5 * float(n_tot * (_LOG_2PI + np.log(s2)) + sums.rr.size * np.sum(log_lam)
                          + logdet_a.sum() + quad.sum())
    if not derivatives:
        return loglik, np.zeros(0), np.zeros((0, 0))
    diag_ainv = np.diagonal(a_inv, axis1=1, axis2=2)
    score = np.empty(k + 1)
    score[:k] = 0.5 * (np.sum(xi * xi + diag_ainv, axis=0) / lam - sums.rr.size)
    ainv_g = a_inv @ sums.gram
    tr_ainv_g = np.trace(ainv_g, axis1=1, axis2=2)
    fitted_sq = np.einsum("ni,nij,nj->n", xi, sums.gram, xi)
    resid_sq = sums.rr - 2.0 * np.einsum("ni,ni->n", sums.cross, xi) + fitted_sq
    score[k] = -0.5 * (n_tot - float(np.sum(resid_sq + tr_ainv_g)) / s2)
    info = np.empty((k + 1, k + 1))
    root = np.sqrt(lam)
    b = np.eye(k) - a_inv / np.outer(root, root)
    info[:k, :k] = 0.5 * np.sum(b * b, axis=0)
    cross_t = np.diagonal(ainv_g @ a_inv, axis1=1, axis2=2).sum(axis=0)
    info[:k, k] = info[k, :k] = 0.5 * cross_t / (lam * s2)
    info[k, k] = 0.5 * (n_tot - 2.0 * tr_ainv_g.sum() / s2
                        + float(np.sum(ainv_g * np.swapaxes(ainv_g, 1, 2))) / s2**2)
    return loglik, score, info


def maximise(sums: SubjectSums, lam0: FloatArray, s2_0: float, max_iter: int = 200,
             tol: float = 1e-10) -> LikelihoodFit:
    """Fisher scoring in the log parameters, with step halving so the likelihood never falls.

    Starts from ``lam0`` and ``s2_0`` (both > 0). The log parameters are kept above
    ``log(1e-12 * scale)`` (scale: the largest starting value); a variance that runs into
    that bound is reported by the caller.
    """
    theta = np.log(np.append(np.asarray(lam0, dtype=np.float64), s2_0))
    lower = np.log(1e-12 * float(np.max(np.exp(theta))))
    ll, score, info = evaluate(sums, theta[:-1], float(theta[-1]))
    converged = False
    it = 0
    for it in range(1, max_iter + 1):  # noqa: B007  (the count is reported)
        step = _projected_step(theta, lower, score, info)
        # A variance already below 1e-8 of the largest whose score points down goes to its
        # bound at once: stepping there by factors of e^5 costs iterations and gains nothing.
        sinking = (theta[:-1] < np.log(1e-8) + np.max(theta[:-1])) & (score[:-1] < 0)
        step[:-1][sinking] = lower - theta[:-1][sinking]
        t = 1.0
        while True:
            cand = np.maximum(theta + t * step, lower)
            ll_new, *_ = evaluate(sums, cand[:-1], float(cand[-1]), derivatives=False)
            if ll_new >= ll - 1e-12 * abs(ll) or t < 1e-6:
                break
            t *= 0.5
        moved = float(np.max(np.abs(cand - theta)))
        theta = cand
        ll, score, info = evaluate(sums, theta[:-1], float(theta[-1]))
        # The distance to the maximum, to second order (a variance held at its bound does
        # not count).
        ahead = float(np.max(np.abs(_projected_step(theta, lower, score, info, clip=False))))
        if moved < tol or ahead < tol:
            converged = True
            break
    return LikelihoodFit(np.exp(theta[:-1]), float(np.exp(theta[-1])), ll, it, converged,
                         int(sums.rr.size))


def _projected_step(theta: FloatArray, lower: float, score: FloatArray, info: FloatArray,
                    clip: bool = True) -> FloatArray:
    """Fisher-scoring step with the variances held at the lower bound left out.

    A variance at its bound whose score still points down stays there (projected Newton);
    its near-singular row would otherwise swamp the step of the others.
    """
    free = ~((theta <= lower + 1e-9) & (score < 0))
    step = np.zeros_like(theta)
    sub = info[np.ix_(free, free)]
    try:
        step[free] = np.linalg.solve(sub, score[free])
    except np.linalg.LinAlgError:
        step[free] = score[free] / np.maximum(np.diag(sub), 1e-300)
    largest = float(np.max(np.abs(step), initial=0.0))
    if clip and largest > 5.0:  # at most a factor e^5 per iteration, in the same direction
        step *= 5.0 / largest
    return step


def starting_error_variance(smoothed: float, reading_variance: float) -> float:
    """A positive start for sigma^2.

    The smoothing estimate is a difference of two smoothed variances and can be zero or
    negative; it is then no estimate at all, only a failed start, and the likelihood starts
    from a tenth of the average reading variance instead.
    """
    if smoothed > 1e-6 * reading_variance:
        return smoothed
    if not reading_variance > 0:
        raise EstimationError("the readings have no variance around the mean")
    return 0.1 * reading_variance
