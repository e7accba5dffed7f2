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

from ._kernels import subject_sums
from .components import evaluate_at
from .design import IntArray, Sample
from .smoothing import FloatArray


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
    gram, cross = subject_sums(starts, resid, np.ascontiguousarray(phi_obs))
    precision = gram / sigma2 + np.diag(1.0 / eigenvalues)
    error_cov = _inverse_spd(precision)
    scores = np.einsum("ijk,ik->ij", error_cov, cross / sigma2)
    return scores, error_cov


def _inverse_spd(a: FloatArray) -> FloatArray:
    """Inverses of a stack of small symmetric positive-definite matrices, shape (n, K, K).

    K = 1 and 2 in closed form (LAPACK's per-matrix overhead dominates at that size);
    larger K through ``np.linalg.inv``. The matrices here are Lambda^-1 + Phi'Phi / s2,
    positive definite by construction.
    """
    k = a.shape[-1]
    if k == 1:
        return 1.0 / a
    if k == 2:
        p, q, r = a[:, 0, 0], a[:, 0, 1], a[:, 1, 1]
        det = p * r - q * q
        out = np.empty_like(a)
        out[:, 0, 0], out[:, 1, 1] = r / det, p / det
        out[:, 0, 1] = out[:, 1, 0] = -q / det
        return out
    return np.linalg.inv(a)


def component_criteria(
    sample: Sample, subjects: IntArray, resid: FloatArray, grid: FloatArray,
    eigenfunctions: FloatArray, eigenvalues: FloatArray, sigma2: float,
) -> tuple[FloatArray, FloatArray]:
    """Marginal Gaussian log-likelihood and leave-one-reading-out error for K = 1 .. K_max.

    For each K the readings of subject i are N(mu_i, Sigma_i(K)) with
    ``Sigma_i = Phi_i Lambda Phi_i' + sigma^2 I``. By the Woodbury identity and the matrix
    determinant lemma, with ``A = Lambda^-1 + Phi_i' Phi_i / sigma^2`` (K x K)::

        Sigma^-1 = I / s2 - Phi A^-1 Phi' / s2^2
        log det Sigma = n log s2 + log det Lambda + log det A

    so every K needs only the leading K x K blocks of the per-subject sums that the
    scores use. The predictive criterion is the mean over readings (of subjects with two
    or more) of ``(y_ij - E[y_ij | y_i,-j])^2 = ((Sigma^-1 r)_j / (Sigma^-1)_jj)^2``
    (leave-one-out identity for a Gaussian vector; common practice, no source).

    Returns
    -------
    loglik, loo_mse : ndarray of shape (K_max,)
    """
    k_max = eigenvalues.size
    n_i = sample.n_obs[subjects]
    owner = np.repeat(np.arange(subjects.size), n_i)  # subject row of each used reading
    first = np.concatenate(([0], np.cumsum(n_i)[:-1])).astype(np.intp)
    idx = sample.starts[subjects][owner] + (np.arange(owner.size) - first[owner])
    r = resid[idx]
    phi = evaluate_at(sample.t[idx], grid, eigenfunctions)  # (readings used, K_max)
    gram, cross = subject_sums(first, r, np.ascontiguousarray(phi))
    rr = np.bincount(owner, r * r, subjects.size)
    multi = n_i[owner] >= 2
    loglik = np.zeros(k_max)
    loo = np.full(k_max, np.nan)
    s2 = sigma2
    for k in range(1, k_max + 1):
        lam = eigenvalues[:k]
        a_inv = np.linalg.inv(gram[:, :k, :k] / s2 + np.diag(1.0 / lam))
        _, logdet_a_inv = np.linalg.slogdet(a_inv)
        c = cross[:, :k]
        a_c = np.einsum("nij,nj->ni", a_inv, c)  # A^-1 Phi' r per subject
        quad = rr / s2 - np.sum(c * a_c, axis=1) / s2**2
        logdet = n_i * np.log(s2) + np.sum(np.log(lam)) - logdet_a_inv
        loglik[k - 1] = -0.5 * float(np.sum(n_i * np.log(2 * np.pi) + logdet + quad))
        if np.any(multi):
            pk, own = phi[multi, :k], owner[multi]
            sinv_r = r[multi] / s2 - np.sum(pk * a_c[own], axis=1) / s2**2
            # owner is non-decreasing, so repeating each subject's matrix is a sequential copy
            a_rows = np.repeat(a_inv[n_i >= 2], n_i[n_i >= 2], axis=0)
            pa = np.matmul(pk[:, None, :], a_rows)[:, 0, :]
            sinv_diag = 1.0 / s2 - np.sum(pa * pk, axis=1) / s2**2
            loo[k - 1] = float(np.mean((sinv_r / sinv_diag) ** 2))
    return loglik, loo
