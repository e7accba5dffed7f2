"""Scores by conditional expectation (the BLUP), their error covariance, the per-subject
sums of the marginal likelihood, and the predictive criterion for the number of components.

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

from dataclasses import dataclass

import numpy as np

from ._kernels import subject_sums
from .arrays import FloatArray, IntArray
from .components import evaluate_at
from .design import Sample
from .likelihood import SubjectSums


def conditional_scores(
    starts: IntArray,
    resid: FloatArray,
    phi_obs: FloatArray,
    eigenvalues: FloatArray,
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


@dataclass(frozen=True)
class SampleTerms:
    """What the likelihood and the leave-one-out criterion need of a set of subjects.

    ``sums`` are the per-subject sums; ``phi`` (n_readings, K) and ``resid`` are per reading,
    ``owner`` the subject row of each reading (non-decreasing).
    """

    sums: SubjectSums
    phi: FloatArray
    resid: FloatArray
    owner: IntArray

    def subjects(self, rows: IntArray) -> SampleTerms:
        """The terms of the subjects at ``rows`` (increasing) only."""
        s = self.sums
        keep = np.isin(self.owner, rows)
        owner = np.searchsorted(rows, self.owner[keep])
        return SampleTerms(s.subjects(rows), self.phi[keep], self.resid[keep], owner)

    def reorder(self, order: IntArray) -> SampleTerms:
        """The same terms with the components taken in ``order``."""
        s = self.sums
        return SampleTerms(
            SubjectSums(s.gram[:, order][:, :, order], s.cross[:, order], s.rr, s.n_obs),
            self.phi[:, order],
            self.resid,
            self.owner,
        )


def sample_terms(
    sample: Sample,
    subjects: IntArray,
    resid: FloatArray,
    grid: FloatArray,
    eigenfunctions: FloatArray,
) -> SampleTerms:
    """Per-subject sums Phi'Phi, Phi'r, r'r and n of ``subjects``, and the per-reading terms."""
    idx, first, n_i = sample.reading_index(subjects)
    owner = np.repeat(np.arange(subjects.size), n_i)
    r = resid[idx]
    phi = np.ascontiguousarray(evaluate_at(sample.t[idx], grid, eigenfunctions))
    gram, cross = subject_sums(first, r, phi)
    rr = np.bincount(owner, r * r, subjects.size)
    return SampleTerms(SubjectSums(gram, cross, rr, n_i.astype(np.float64)), phi, r, owner)


def loo_errors(terms: SampleTerms, params: list[tuple[FloatArray, float]]) -> FloatArray:
    """Leave-one-reading-out prediction error for K = 1 .. len(params).

    ``params[K - 1]`` holds (lambda_1..K, sigma^2) of the model with K components. The
    criterion is the mean over readings (of subjects with two or more) of
    ``(y_ij - E[y_ij | y_i,-j])^2 = ((Sigma^-1 r)_j / (Sigma^-1)_jj)^2`` (leave-one-out
    identity for a Gaussian vector; common practice, no source), with
    ``Sigma^-1 = I / s2 - Phi A^-1 Phi' / s2^2`` and ``A = Lambda^-1 + Phi' Phi / s2``.

    Returns
    -------
    ndarray of shape (len(params),); ``nan`` when no subject has two readings.
    """
    n_i = terms.sums.n_obs.astype(np.intp)
    owner, r, phi = terms.owner, terms.resid, terms.phi
    multi = n_i[owner] >= 2
    loo = np.full(len(params), np.nan)
    if not np.any(multi):
        return loo
    for k0, (lam, s2) in enumerate(params):
        k = k0 + 1
        # A^-1 = D (I + D G D / s2)^-1 D with D = diag(sqrt lambda): valid at lambda_k = 0
        root = np.sqrt(lam)
        h = np.eye(k) + root[:, None] * terms.sums.gram[:, :k, :k] * root[None, :] / s2
        a_inv = root[:, None] * np.linalg.inv(h) * root[None, :]
        a_c = np.einsum("nij,nj->ni", a_inv, terms.sums.cross[:, :k])  # A^-1 Phi' r
        pk, own = phi[multi, :k], owner[multi]
        sinv_r = r[multi] / s2 - np.sum(pk * a_c[own], axis=1) / s2**2
        # owner is non-decreasing, so repeating each subject's matrix is a sequential copy
        a_rows = np.repeat(a_inv[n_i >= 2], n_i[n_i >= 2], axis=0)
        pa = np.matmul(pk[:, None, :], a_rows)[:, 0, :]
        sinv_diag = 1.0 / s2 - np.sum(pa * pk, axis=1) / s2**2
        loo[k0] = float(np.mean((sinv_r / sinv_diag) ** 2))
    return loo
