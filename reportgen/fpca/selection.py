"""The number of components: every criterion for K = 1 .. K' (FVE, AIC and BIC from each
K's own likelihood maximum, and the leave-one-reading-out error), and the chosen rule's
pick (``components.choose``)."""

from __future__ import annotations

import numpy as np

from ..errors import EstimationError
from .arrays import FloatArray
from .components import ComponentSelection, choose
from .design import seeded_sample
from .likelihood import LikelihoodFit, maximise
from .options import FPCAOptions
from .scores import SampleTerms, loo_errors


def select_components(
    terms: SampleTerms,
    lik: LikelihoodFit,
    fve: FloatArray,
    span: float,
    options: FPCAOptions,
) -> ComponentSelection:
    """Every criterion for K = 1 .. K', each K with its own likelihood maximum.

    For K < K' the likelihood is maximised again over (lambda_1..K, sigma^2) with the first
    K eigenfunctions, so that AIC and BIC compare maxima (the error variance of a smaller
    model absorbs the components it leaves out). Parameters counted: K eigenvalues and
    sigma^2. BIC's sample size is the number of subjects (the independent units).
    """
    k_max = lik.eigenvalues.size
    cum = np.cumsum(fve)[:k_max]
    n_used = terms.sums.rr.size
    if n_used > options.criteria_max_subjects:
        keep = seeded_sample(n_used, options.criteria_max_subjects, options.seed)
        terms = terms.subjects(keep)
    params: list[tuple[FloatArray, float]] = []
    loglik = np.empty(k_max)
    for k in range(1, k_max + 1):
        left_out = float(np.sum(lik.eigenvalues[k:])) / span  # average of sum phi^2
        fit_k = maximise(terms.sums.leading(k), lik.eigenvalues[:k], lik.error_variance + left_out)
        params.append((fit_k.eigenvalues, fit_k.error_variance))
        loglik[k - 1] = fit_k.loglik
    loo = loo_errors(terms, params)
    ks = np.arange(1, k_max + 1)
    n_crit = terms.sums.rr.size
    aic = -2.0 * loglik + 2.0 * (ks + 1)
    bic = -2.0 * loglik + (ks + 1) * np.log(n_crit)
    chosen = choose(
        options.component_rule,
        k_max,
        cum,
        aic,
        bic,
        loo,
        options.fve_threshold,
        options.n_components,
    )
    return ComponentSelection(options.component_rule, chosen, ks, cum, aic, bic, loo, n_crit)


def fixed_selection(k_max: int, fve: FloatArray, options: FPCAOptions) -> ComponentSelection:
    """The selection record of a fit whose K is fixed and whose criteria were skipped."""
    if options.component_rule != "fixed" or options.n_components is None:
        raise EstimationError("population_only fits need a fixed number of components")
    none = np.full(k_max, np.nan)
    return ComponentSelection(
        "fixed",
        options.n_components,
        np.arange(1, k_max + 1),
        np.cumsum(fve)[:k_max],
        none,
        none,
        none,
        0,
    )
