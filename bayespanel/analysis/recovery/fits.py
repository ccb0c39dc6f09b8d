"""The non-Bayesian fits of each replicate: the reference estimator of the model's kind
and GLS with the true variance components (and the true ``rho`` under AR(1) errors)."""

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
    if getattr(model, "errors", "iid") == "ar1":
        # no reference estimator models the serial correlation: its cluster-robust (CR2)
        # covariance is the one that stays valid under it (Bell and McCaffrey 2002)
        cov = "cr2"
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


def _tau(model, sigma_unit):
    """The unit-intercept SD of :mod:`bayespanel.core.ar1` for the model's unit effects."""
    return {"random": sigma_unit, "none": 0.0}.get(model.unit_effects)   # fixed: None


def _oracle_ar1(model, stats, sigma_unit, sigma_obs, rho):
    """GLS with the true variance components and ``rho`` (AR(1) statistics ``stats`` of the
    replicate's rows): estimate and exact covariance (:func:`bayespanel.core.ar1gls.gls`)."""
    from ...core.ar1gls import gls

    return gls(stats.arrays(), rho, sigma_obs, _tau(model, sigma_unit))


def ar1_marginal_fit(model, start=None) -> dict:
    """Maximum of the AR(1) marginal likelihood of the model's own rows: the truth
    ``"reference"`` of a design check with ``errors="ar1"``.

    ``rho``, ``sigma_obs`` and ``sigma_unit`` (random unit effects) maximise
    :func:`bayespanel.core.ar1.loglik` with the coefficients profiled out by GLS at each
    value (:func:`bayespanel.core.ar1gls.gls`); Nelder-Mead (scipy) from ``rho = 0`` and
    the reference fit's variance components ``start``.
    """
    from scipy.optimize import minimize

    from ...core import ar1
    from ...core.ar1gls import gls

    arrays = model.ar1_stats.arrays()
    random = model.unit_effects == "random"
    su0, so0 = start if start is not None else (1.0, 1.0)
    # rho on (-1, 1) (whole-number gaps) or (0, 1) (fractional gaps: rho^d needs rho >= 0)
    signed = model.ar1_stats.integer_gaps

    def unpack(x):
        rho = np.tanh(x[0]) if signed else 1.0 / (1.0 + np.exp(-x[0]))
        return rho, np.exp(x[1]), (np.exp(x[2]) if random else _tau(model, 0.0))

    def minus_loglik(x):
        rho, sigma, tau = unpack(x)
        b, _ = gls(arrays, rho, sigma, tau)
        return -ar1.loglik(np.append(-b, 1.0), arrays, rho, sigma, tau)

    x0 = [0.0 if signed else -2.0, np.log(so0)] + ([np.log(max(su0, 0.1 * so0))]
                                                    if random else [])
    with np.errstate(all="ignore"):
        opt = minimize(minus_loglik, x0, method="Nelder-Mead",
                       options={"xatol": 1e-7, "fatol": 1e-9, "maxiter": 4000})
    rho, sigma, tau = unpack(opt.x)
    b, _ = gls(arrays, rho, sigma, tau)
    return {"coef": dict(zip(model.labels, map(float, b))), "sigma_obs": float(sigma),
            "sigma_unit": float(tau) if random else 0.0, "rho": float(rho)}
