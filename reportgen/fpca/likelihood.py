"""Marginal Gaussian likelihood of the reduced-rank model, and its maximisation.

With the eigenfunctions fixed, subject i's residual vector r_i = Y_i - mu(T_i) is modelled as

    r_i ~ N(0, Sigma_i),   Sigma_i = Phi_i diag(lambda) Phi_i' + sigma^2 I

(the reduced-rank model of James, Hastie & Sugar 2000, Biometrika 87:587-602, and of Peng &
Paul 2009, JCGS 18:995-1015, here with the eigenfunctions taken from the smoothed surface).
Everything depends on the data only through per-subject sums: ``G_i = Phi_i' Phi_i``
(K x K), ``c_i = Phi_i' r_i``, ``s_i = r_i' r_i`` and ``n_i``. With ``D = diag(sqrt
lambda)``, ``H_i = I + D G_i D / sigma^2`` and ``Omega_i = D H_i^-1 D`` (the prediction-error
covariance of the scores; the Woodbury identity in a form that stays valid at lambda_k = 0)::

    xi_i = Omega_i c_i / sigma^2                      (conditional scores)
    log L_i = -1/2 [n_i log 2 pi + n_i log sigma^2 + log det H_i + (s_i - c_i' xi_i) / sigma^2]

In the natural parameters (lambda_1..K, sigma^2) the score and the expected (Fisher)
information are, per subject (from d log L = -1/2 [tr(S^-1 dS) - r' S^-1 dS S^-1 r] and
I_ab = 1/2 tr(S^-1 dS_a S^-1 dS_b); Searle, Casella & McCulloch 1992, ch. 6), with
``w = Phi' S^-1 r = (c - G xi) / sigma^2`` and ``M = Phi' S^-1 Phi = (G - G Omega G /
sigma^2) / sigma^2``::

    d/d lambda_k   = 1/2 (w_k^2 - M_kk)
    d/d sigma^2    = 1/2 (|r - Phi xi|^2 / sigma^4 - tr S^-1)
    I_{lambda_k, lambda_l} = 1/2 M_kl^2
    I_{lambda_k, sigma^2}  = 1/2 (Phi' S^-2 Phi)_kk
    I_{sigma^2, sigma^2}   = 1/2 tr S^-2

with ``tr S^-1 = (n - tr(Omega G) / sigma^2) / sigma^2``, ``S^-1 Phi = Phi (I - Omega G /
sigma^2) / sigma^2`` and ``tr S^-2 = (n - 2 tr(Omega G) / sigma^2 + tr((Omega G)^2) /
sigma^4) / sigma^4``. A variance of 0 is an ordinary point of these formulas, so the bound
lambda_k >= 0 is handled as an active set (Fisher scoring for variance components with
non-negativity; common practice, no source). ``tests/fpca/test_likelihood.py`` checks the
log-likelihood against scipy's dense multivariate normal and the score against finite
differences.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from ..errors import EstimationError
from ._kernels import likelihood_sums
from .arrays import FloatArray


@dataclass(frozen=True)
class SubjectSums:
    """Per-subject sums of the model: gram (n, K, K), cross (n, K), rr (n,), n_obs (n,)."""

    gram: FloatArray
    cross: FloatArray
    rr: FloatArray
    n_obs: FloatArray

    @cached_property
    def gram_t(self) -> FloatArray:
        """``gram`` with the subjects last, (K, K, n), as the compiled kernel reads it."""
        return np.ascontiguousarray(np.moveaxis(self.gram, 0, -1))

    @cached_property
    def cross_t(self) -> FloatArray:
        """``cross`` with the subjects last, (K, n)."""
        return np.ascontiguousarray(self.cross.T)

    def subjects(self, rows: np.ndarray) -> SubjectSums:
        """The sums of the subjects in ``rows`` only."""
        return SubjectSums(self.gram[rows], self.cross[rows], self.rr[rows], self.n_obs[rows])

    def leading(self, k: int) -> SubjectSums:
        """The sums of the first ``k`` components only."""
        return SubjectSums(
            np.ascontiguousarray(self.gram[:, :k, :k]),
            np.ascontiguousarray(self.cross[:, :k]),
            self.rr,
            self.n_obs,
        )


@dataclass(frozen=True)
class LikelihoodFit:
    """The maximum of the marginal likelihood over (lambda, sigma^2).

    Attributes
    ----------
    eigenvalues : ndarray of shape (K,)
        Non-negative; a 0 means the data give that component no variance.
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


def evaluate(
    sums: SubjectSums, lam: FloatArray, s2: float, derivatives: bool = True
) -> tuple[float, FloatArray, FloatArray]:
    """Log-likelihood, score and Fisher information in (lambda_1..K, sigma^2).

    Returns
    -------
    loglik : float
    score : ndarray of shape (K + 1,)
    information : ndarray of shape (K + 1, K + 1)
    """
    lam = np.ascontiguousarray(lam, dtype=np.float64)
    loglik, score, info, ok = likelihood_sums(
        sums.gram_t, sums.cross_t, sums.rr, sums.n_obs, lam, float(s2), derivatives
    )
    if not ok:
        raise np.linalg.LinAlgError("I + D G D / sigma^2 is not positive definite")
    if not derivatives:
        return float(loglik), np.zeros(0), np.zeros((0, 0))
    return float(loglik), score, info


def maximise(
    sums: SubjectSums,
    lam0: FloatArray,
    s2_0: float,
    max_iter: int = 100,
    tol: float = 1e-10,
    gain_tol: float = 1e-12,
) -> LikelihoodFit:
    """Fisher scoring over lambda >= 0 and sigma^2 > 0, with step halving.

    An eigenvalue at 0 whose score points down stays there (active set); the step is cut so
    that no variance turns negative, and halved until the likelihood does not fall.
    Converged when the Newton step on the free parameters is below ``tol`` relative to the
    parameters' scale, or when the step would raise the log-likelihood by less than
    ``gain_tol`` (its quadratic model, ``score . step / 2``, in nats; 1e-12 nats leaves the
    parameters within about 1.4e-6 standard errors of the maximum, far below the 1e-6
    relative tolerance to which ``reportgen verify`` compares numbers).
    """
    p = np.append(np.maximum(np.asarray(lam0, dtype=np.float64), 0.0), s2_0)
    scale = float(np.max(p))
    ll, score, info = evaluate(sums, p[:-1], float(p[-1]))
    converged = False
    it = 0
    for it in range(1, max_iter + 1):  # noqa: B007  (the count is reported)
        step = _free_step(p, score, info)
        gain = 0.5 * float(score @ step)
        if float(np.max(np.abs(step))) < tol * scale or gain < gain_tol:
            converged = True
            break
        down = step < 0
        with np.errstate(divide="ignore"):
            reach = np.where(down, p / -np.where(down, step, -1.0), np.inf)
        reach[-1] = np.inf if step[-1] >= 0 else 0.9 * p[-1] / -step[-1]  # sigma^2 stays > 0
        t = min(1.0, float(np.min(reach)))
        while True:  # the full step is nearly always taken, so evaluate it with derivatives
            cand = p + t * step
            cand[:-1] = np.where(reach[:-1] <= t, 0.0, np.maximum(cand[:-1], 0.0))
            ll_new, score_new, info_new = evaluate(sums, cand[:-1], float(cand[-1]))
            if ll_new >= ll - 1e-12 * abs(ll) or t < 1e-8:
                break
            t *= 0.5
        p, ll, score, info = cand, ll_new, score_new, info_new
    return LikelihoodFit(p[:-1].copy(), float(p[-1]), ll, it, converged, int(sums.rr.size))


def _free_step(p: FloatArray, score: FloatArray, info: FloatArray) -> FloatArray:
    """Fisher-scoring step over the free parameters (projected Newton).

    An eigenvalue at 0 is held there when its score points down, or when the step over
    the free set would take it below 0 (the coupling with the others can point the step
    down although the score points up); the step is then solved again without it.
    """
    at_bound = np.append(p[:-1] <= 0.0, False)
    free = ~(at_bound & np.append(score[:-1] <= 0.0, False))
    while True:
        step = np.zeros_like(p)
        sub = info[np.ix_(free, free)]
        try:
            step[free] = np.linalg.solve(sub, score[free])
        except np.linalg.LinAlgError:
            step[free] = score[free] / np.maximum(np.diag(sub), 1e-300)
        blocked = free & at_bound & (step < 0.0)
        if not np.any(blocked):
            return step
        free &= ~blocked


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
