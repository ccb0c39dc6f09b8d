"""Pointwise log-likelihoods of latent-effect models at the unit and the occasion level.

Unit level (predicting a new unit): the unit's effects are integrated out,

    log p(y_i | theta) = log ∫ prod_t p(y_it | eta_it + z_it' g) N(g; 0, Sigma) dg,

by adaptive Gauss-Hermite quadrature per unit and per draw (Liu and Pierce 1994; Pinheiro
and Bates 1995). With ``g = L h`` (``Sigma = L L'``) the integrand is taken in the
standardised ``h``; a damped Newton search finds its mode ``h*`` and the curvature there,
``H = -d^2/dh^2 log f``, and the rule is placed at ``h* + sqrt(2) B x_k`` with
``B B' = H^-1``:

    ∫ f(h) dh ≈ 2^(q/2) |B| sum_k w_k exp(|x_k|^2) f(h* + sqrt(2) B x_k)

(tensor-product rule in ``q`` dimensions; ``q = 1`` for a random intercept). The answer is
exact for a Gaussian outcome (the integrand is then a Gaussian), which the tests use.

Occasion level (predicting a new occasion of a known unit): the density of each row
conditional on the unit's sampled effects, ``log p(y_it | eta_it + z_it' g_i)``, one term
per row and draw; PSIS-LOO on these terms removes the row's influence on ``g_i`` through
importance weighting (Vehtari, Gelman and Gabry 2017).

:func:`pointwise_loglik` is the entry for :mod:`bayespanel.analysis.loo`: given a latent-model
posterior it returns the terms of one level, labelled with that level.

References
----------
.. [1] Liu, Q. and Pierce, D. A. (1994). A note on Gauss-Hermite quadrature. Biometrika 81,
   624-629. doi:10.1093/biomet/81.3.624
.. [2] Pinheiro, J. C. and Bates, D. M. (1995). Approximations to the log-likelihood function
   in the nonlinear mixed-effects model. J. Comput. Graph. Stat. 4, 12-35.
   doi:10.1080/10618600.1995.10474663
.. [3] Vehtari, A., Gelman, A. and Gabry, J. (2017). Practical Bayesian model evaluation
   using leave-one-out cross-validation and WAIC. Statistics and Computing 27, 1413-1432.
   doi:10.1007/s11222-016-9696-4
"""

from __future__ import annotations

import itertools

import numpy as np
from scipy.special import logsumexp

from ..core.errors import SpecificationError, choices_error
from .families import eta_derivatives, get_family, logpdf

__all__ = ["LEVELS", "gh_rule", "unit_loglik_aghq", "occasion_loglik_latent", "pointwise_loglik"]

LEVELS = ("unit", "occasion")
_DEFAULT_NODES = {1: 15, 2: 11, 3: 7}


def gh_rule(q: int, n_nodes: int):
    """Tensor-product Gauss-Hermite nodes ``(K^q, q)`` and log weights ``(K^q,)``
    for the weight ``exp(-|x|^2)``."""
    x, w = np.polynomial.hermite.hermgauss(n_nodes)
    nodes = np.array(list(itertools.product(x, repeat=q)))
    logw = np.array([np.log(np.array(c)).sum() for c in itertools.product(w, repeat=q)])
    return nodes, logw


def _unit_sum(a, starts):
    return np.add.reduceat(a, starts, axis=1)


def _row_effect(Z, L, h, codes):
    """``z_it' L h_i`` for every row: Z (n, q), L (s, q, q), h (s, N, q) -> (s, n)."""
    Lh = np.einsum("sij,snj->sni", L, h)
    return np.einsum("ni,sni->sn", Z, Lh[:, codes])


def _objective(fam, y, eta, Z, L, h, codes, starts, params, trials, log_exposure):
    lin = eta + _row_effect(Z, L, h, codes)
    lp = logpdf(fam, y, lin, params, trials=trials, log_exposure=log_exposure)
    return _unit_sum(lp, starts) - 0.5 * (h ** 2).sum(axis=-1)


def unit_loglik_aghq(family, y, eta, Z, L, unit_codes, params=None, *, trials=None,
                     log_exposure=None, n_nodes=None, max_iter=50, tol=1e-10, chunk=None):
    """Unit-level log-likelihood by adaptive Gauss-Hermite quadrature.

    Parameters
    ----------
    family : str or Family
    y : array (n,)
        Outcomes, rows sorted by unit.
    eta : array (S, n)
        Linear predictor without unit effects (and without the exposure offset).
    Z : array (n, q)
        Columns with unit-specific coefficients (ones for the intercept, then the
        random-slope columns).
    L : array (S, q, q)
        Lower Cholesky factor of the unit-effect covariance per draw (``[[tau]]`` for a
        random intercept).
    unit_codes : array (n,) of sorted ints
    params : dict of arrays (S,)
        The family's parameters (``sigma_obs``, ``nu``, ``shape``).
    trials, log_exposure : arrays (n,) or None
    n_nodes : int, optional
        Nodes per dimension (default 15, 11, 7 for q = 1, 2, 3).
    max_iter, tol : Newton settings for the mode.

    Returns
    -------
    array (S, N)
    """
    fam = get_family(family)
    y = np.asarray(y, dtype=float)
    eta = np.atleast_2d(np.asarray(eta, dtype=float))
    Z = np.asarray(Z, dtype=float).reshape(len(y), -1)
    q = Z.shape[1]
    if n_nodes is None:
        if q not in _DEFAULT_NODES:
            raise SpecificationError(
                f"quadrature over {q} unit-specific coefficients is too costly; at most 3 "
                "(an intercept and two random slopes) are supported")
        n_nodes = _DEFAULT_NODES[q]
    codes = np.asarray(unit_codes)
    T = np.bincount(codes)
    starts = np.concatenate([[0], np.cumsum(T)[:-1]]).astype(np.int64)
    N, S = len(T), eta.shape[0]
    L = np.asarray(L, dtype=float).reshape(S, q, q)
    params = {k: np.asarray(v, dtype=float).reshape(S) for k, v in (params or {}).items()}
    nodes, logw = gh_rule(q, n_nodes)
    chunk = chunk or max(1, int(2 ** 22 // max(len(y) * max(q, 1), 1)))
    out = np.empty((S, N))
    for a in range(0, S, chunk):
        sl = slice(a, min(a + chunk, S))
        p = {k: v[sl, None] for k, v in params.items()}
        out[sl] = _aghq_block(fam, y, eta[sl], Z, L[sl], codes, starts, p, trials,
                              log_exposure, nodes, logw, max_iter, tol)
    return out


def _curvature(fam, y, lin, ZL, codes_starts, p, trials, log_exposure, clamp):
    starts = codes_starts
    d1, d2 = eta_derivatives(fam, y, lin, p, trials=trials, log_exposure=log_exposure)
    w = np.maximum(-d2, 0.0) if clamp else -d2
    q = ZL.shape[-1]
    H = _unit_sum(ZL[..., :, None] * ZL[..., None, :] * w[..., None, None], starts) + np.eye(q)
    g = _unit_sum(ZL * d1[..., None], starts)
    return g, H


def _aghq_block(fam, y, eta, Z, L, codes, starts, p, trials, log_exposure, nodes, logw,
                max_iter, tol):
    s, q = eta.shape[0], Z.shape[1]
    N = len(starts)
    ZL = np.einsum("ni,sij->snj", Z, L)  # row-wise z' L, (s, n, q)
    h = np.zeros((s, N, q))
    f = _objective(fam, y, eta, Z, L, h, codes, starts, p, trials, log_exposure)
    for _ in range(max_iter):
        lin = eta + np.einsum("snj,snj->sn", ZL, h[:, codes])
        g, H = _curvature(fam, y, lin, ZL, starts, p, trials, log_exposure, clamp=True)
        g = g - h
        step = np.linalg.solve(H, g[..., None])[..., 0]
        t = np.ones((s, N))
        for _half in range(30):  # step halving: the objective must not decrease
            h_new = h + t[..., None] * step
            f_new = _objective(fam, y, eta, Z, L, h_new, codes, starts, p, trials, log_exposure)
            bad = ~(f_new >= f - 1e-12 * np.abs(f))
            if not bad.any():
                break
            t = np.where(bad, t / 2, t)
        h, f = h_new, np.where(np.isfinite(f_new), f_new, f)
        if np.max(np.abs(t[..., None] * step)) < tol:
            break
    lin = eta + np.einsum("snj,snj->sn", ZL, h[:, codes])
    _, H = _curvature(fam, y, lin, ZL, starts, p, trials, log_exposure, clamp=False)
    eig_ok = np.all(np.linalg.eigvalsh(H) > 1e-12, axis=-1)
    if not eig_ok.all():  # not concave at the mode (Student-t): fall back to the clamped form
        _, Hc = _curvature(fam, y, lin, ZL, starts, p, trials, log_exposure, clamp=True)
        H = np.where(eig_ok[..., None, None], H, Hc)
    C = np.linalg.cholesky(H)
    logdetB = -np.log(np.diagonal(C, axis1=-2, axis2=-1)).sum(axis=-1)
    CT = np.swapaxes(C, -1, -2)
    terms = np.empty((len(nodes), s, N))
    for k, x in enumerate(nodes):
        # B x = C'^-1 x
        Bx = np.linalg.solve(CT, np.broadcast_to(x, (s, N, q))[..., None])[..., 0]
        hk = h + np.sqrt(2.0) * Bx
        fk = _objective(fam, y, eta, Z, L, hk, codes, starts, p, trials, log_exposure)
        terms[k] = logw[k] + (x ** 2).sum() + fk
    return (0.5 * q * np.log(2.0) + logdetB - 0.5 * q * np.log(2 * np.pi)
            + logsumexp(terms, axis=0))


def occasion_loglik_latent(family, y, eta, Z, g, unit_codes, params=None, *, trials=None,
                           log_exposure=None):
    """Occasion-level terms conditional on the unit effects: ``log p(y_it | eta_it + z_it'g_i)``.

    ``eta`` (S, n) without unit effects; ``g`` (S, N, q) the sampled unit effects on the
    columns ``Z`` (n, q). Returns (S, n).
    """
    fam = get_family(family)
    eta = np.atleast_2d(eta)
    Z = np.asarray(Z, dtype=float).reshape(len(y), -1)
    g = np.asarray(g, dtype=float).reshape(eta.shape[0], -1, Z.shape[1])
    codes = np.asarray(unit_codes)
    lin = eta + np.einsum("ni,sni->sn", Z, g[:, codes])
    p = {k: np.asarray(v, dtype=float).reshape(-1, 1) for k, v in (params or {}).items()}
    return logpdf(fam, y, lin, p, trials=trials, log_exposure=log_exposure)


def pointwise_loglik(post, level: str):
    """Pointwise log-likelihood of a latent-family or random-slope posterior at one level.

    Parameters
    ----------
    post : LatentPosterior
        A posterior from :mod:`bayespanel.bayes.latent` (family other than Gaussian, or
        random slopes).
    level : {"unit", "occasion"}
        ``"unit"``: one term per unit, the unit effects integrated out (adaptive
        Gauss-Hermite quadrature; exact Woodbury marginal for Gaussian random slopes).
        ``"occasion"``: one term per row; conditional on the sampled unit effects for the
        latent families, and the exact leave-one-occasion-out Gaussian conditional for the
        Woodbury-marginal Gaussian random-slope model.

    Returns
    -------
    xarray.DataArray
        Dims ``(chain, draw, unit)`` or ``(chain, draw, row)``; ``attrs["level"]`` states
        the level and ``attrs["method"]`` how the terms were computed.
    """
    if level not in LEVELS:
        raise choices_error("level", level, LEVELS)
    return post.pointwise_loglik(level)
