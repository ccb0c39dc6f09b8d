"""The non-Bayesian fits of each replicate: the reference estimator of the model's kind
and GLS with the true variance components."""

from __future__ import annotations

import warnings

import numpy as np

from ... import kinds

REFERENCE_METHODS = ("reml", "ml", "swamy-arora")
BAYES, REFERENCE, ORACLE = "Bayesian", "reference", "GLS, known variances"


def _fit_reference(model, M, y, codes, method):
    from ...reference import fit_arrays

    # the reference fit on the model's columns (a reference kind is named by its columns)
    est = kinds.reference(model.kind)
    meth = method if est.variance_components else None
    cov = "cluster" if est.unit_effects == "none" else "classical"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit_arrays(est.name, M, y, codes, list(model.labels), method=meth, cov=cov,
                          outcome=model.outcome)


def _oracle(stats, sigma_unit, sigma_obs):
    """GLS with the true variance components: estimate and exact covariance."""
    from ...reference.core import gls_core

    fit = gls_core(stats, sigma_unit ** 2, sigma_obs ** 2)
    b = np.full(stats.k, np.nan)
    V = np.full((stats.k, stats.k), np.nan)
    b[fit.cols] = fit.beta
    V[np.ix_(fit.cols, fit.cols)] = sigma_obs ** 2 * fit.bread
    return b, V
