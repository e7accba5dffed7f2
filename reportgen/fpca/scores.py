"""Scores by conditional expectation (the BLUP), their error covariance, and the
likelihood-based and predictive criteria for the number of components.

Model for subject i with readings Y_i at times T_i (Yao, Müller & Wang 2005, sec. 2.3)::

    Y_i = mu(T_i) + Phi_i xi_i + e_i,   xi_i ~ N(0, Lambda),   e_i ~ N(0, sigma^2 I)

so that ``E[xi_i | Y_i] = Lambda Phi_i' Sigma_i^-1 (Y_i - mu_i)`` with
``Sigma_i = Phi_i Lambda Phi_i' + sigma^2 I`` (their eq. 4), and the prediction-error
covariance is ``Lambda - Lambda Phi_i' Sigma_i^-1 Phi_i Lambda``. By the Woodbury identity
both equal expressions in K x K matrices only::

    Omega_i = (Lambda^-1 + Phi_i' Phi_i / sigma^2)^-1,   xi_i = Omega_i Phi_i' r_i / sigma^2

which is what :func:`conditional_scores` computes, for all subjects at once, from per-reading
outer products summed by subject. It needs no more than one reading per subject.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from .components import evaluate_at
from .design import IntArray, Sample
from .smoothing import FloatArray

# Readings per chunk when summing outer products (bounds memory at chunk x K x K doubles).
_CHUNK = 1 << 18


def conditional_scores(
    starts: IntArray, resid: FloatArray, phi_obs: FloatArray, eigenvalues: FloatArray,
    sigma2: float,
) -> tuple[FloatArray, FloatArray]:
    """BLUP scores and their prediction-error covariance for every subject.

    Parameters
    ----------
    starts : ndarray of shape (n_subjects,)
        Offset of each subject's first reading in the subject-sorted arrays.
    resid : ndarray of shape (n_obs,)
        Readings minus the mean at their times.
    phi_obs : ndarray of shape (n_obs, K)
        Eigenfunctions at the reading times.
    eigenvalues : ndarray of shape (K,)
    sigma2 : float
        Measurement-error variance (> 0).

    Returns
    -------
    scores : ndarray of shape (n_subjects, K)
    error_cov : ndarray of shape (n_subjects, K, K)
    """
    n_subj, k = starts.size, eigenvalues.size
    n_obs = resid.size
    gram = np.empty((n_subj, k, k))
    cross = np.empty((n_subj, k))
    ends = np.append(starts[1:], n_obs)
    s0 = 0
    while s0 < n_subj:
        # Take subjects until the chunk holds about _CHUNK readings (at least one subject).
        s1 = int(np.searchsorted(starts, starts[s0] + _CHUNK, side="right"))
        s1 = min(max(s1, s0 + 1), n_subj)
        o0, o1 = starts[s0], ends[s1 - 1]
        p = phi_obs[o0:o1]
        local = starts[s0:s1] - o0
        gram[s0:s1] = np.add.reduceat(p[:, :, None] * p[:, None, :], local, axis=0)
        cross[s0:s1] = np.add.reduceat(p * resid[o0:o1, None], local, axis=0)
        s0 = s1
    precision = gram / sigma2 + np.diag(1.0 / eigenvalues)
    error_cov = np.linalg.inv(precision)
    scores = np.einsum("ijk,ik->ij", error_cov, cross / sigma2)
    return scores, error_cov


def _size_groups(sample: Sample, subjects: IntArray) -> list[NDArray[np.intp]]:
    """Reading indices of ``subjects`` grouped by readings per subject: (count, n) each."""
    n = sample.n_obs[subjects]
    groups = []
    for size in np.unique(n):
        chosen = subjects[n == size]
        groups.append(sample.starts[chosen][:, None] + np.arange(size)[None, :])
    return groups


def component_criteria(
    sample: Sample, subjects: IntArray, resid: FloatArray, grid: FloatArray,
    eigenfunctions: FloatArray, eigenvalues: FloatArray, sigma2: float,
) -> tuple[FloatArray, FloatArray]:
    """Marginal Gaussian log-likelihood and leave-one-reading-out error for K = 1 .. K_max.

    For each K the readings of subject i are N(mu_i, Sigma_i(K)); the log-likelihood is
    summed over ``subjects``. The predictive criterion is the mean over readings (of
    subjects with two or more) of ``(y_ij - E[y_ij | y_i,-j])^2``, which for a Gaussian
    vector equals ``((Sigma^-1 r)_j / (Sigma^-1)_jj)^2`` (a standard identity for
    leave-one-out in Gaussian models; common practice, no source).

    Returns
    -------
    loglik, loo_mse : ndarray of shape (K_max,)
    """
    k_max = eigenvalues.size
    loglik = np.zeros(k_max)
    sq_err = np.zeros(k_max)
    n_err = 0
    for idx in _size_groups(sample, subjects):
        r = resid[idx]  # (c, n)
        p = evaluate_at(sample.t[idx].ravel(), grid, eigenfunctions).reshape(*idx.shape, -1)
        size = idx.shape[1]
        eye = np.eye(size) * sigma2
        if size >= 2:
            n_err += r.size
        for k in range(1, k_max + 1):
            pk = p[:, :, :k]
            sigma = (pk * eigenvalues[:k]) @ np.swapaxes(pk, 1, 2) + eye
            _, logdet = np.linalg.slogdet(sigma)  # sigma is positive definite
            inv = np.linalg.inv(sigma)
            a = np.einsum("cij,cj->ci", inv, r)
            quad = np.einsum("ci,ci->c", r, a)
            loglik[k - 1] += -0.5 * float(np.sum(size * np.log(2 * np.pi) + logdet + quad))
            if size >= 2:
                diag = np.diagonal(inv, axis1=1, axis2=2)
                sq_err[k - 1] += float(np.sum((a / diag) ** 2))
    loo = sq_err / n_err if n_err else np.full(k_max, np.nan)
    return loglik, loo
