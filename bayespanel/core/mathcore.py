"""Mathematics that several parts of the package need, written once (numpy only).

This is a lower-layer module: it imports numpy and nothing of bayespanel, so the
reference estimators, the variance partition, the runner and the Bayesian builders can
all call it without an import pointing upwards. Functions take arrays (or scalars, or
PyTensor variables where they say so) and return arrays; labels are added by callers.

* :func:`quasi_demeaning_share`: the GLS share ``theta_i = 1 - sqrt(sigma^2 / (sigma^2 +
  T_i tau^2))`` of the unit mean taken off every row (Baltagi 2021, section 2.3).
* :func:`intraclass_correlation`: ``tau^2 / (tau^2 + sigma^2)``.
* :func:`unit_sd_draws`: the unit-effect SD of each draw by the model's unit-effect rule.
* :func:`partition_quantities`: unit and occasion SDs, ICC, the quasi-demeaning shares
  and the variance parts and shares of Rights and Sterba (2019) from the within and
  between coefficients and the covariances of their columns.

References
----------
.. [1] Baltagi, B. H. (2021). *Econometric Analysis of Panel Data*, 6th ed., section 2.3.
   Springer. doi:10.1007/978-3-030-53953-5
.. [2] Rights, J. D. and Sterba, S. K. (2019). Quantifying explained variance in multilevel
   models: An integrative framework for defining R-squared measures. Psychological
   Methods 24(3), 309-338. doi:10.1037/met0000184
"""

from __future__ import annotations

import numpy as np

__all__ = ["log_sum_exp", "quasi_demeaning_share", "intraclass_correlation", "quadratic_forms",
           "partition_quantities", "SHARES", "unit_sd_draws"]


def quasi_demeaning_share(lengths, var_unit, var_obs):
    """The GLS quasi-demeaning share ``theta = 1 - sqrt(sigma^2 / (sigma^2 + T tau^2))``.

    Parameters
    ----------
    lengths : int or array
        Panel length(s) ``T``.
    var_unit, var_obs : float or array
        ``tau^2`` and ``sigma^2`` (broadcast against ``lengths``; per draw, for example).

    Returns
    -------
    numpy.ndarray
        ``theta``; 1 where ``var_obs <= 0`` (all of the unit mean is taken off), ``nan``
        where an input is ``nan``.
    """
    T = np.asarray(lengths, dtype=float)
    s2 = np.asarray(var_obs, dtype=float)
    t2 = np.asarray(var_unit, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = 1.0 - np.sqrt(s2 / (s2 + T * t2))
    return np.where(s2 <= 0, 1.0, out)


def intraclass_correlation(var_unit, var_obs):
    """``tau^2 / (tau^2 + sigma^2)``, the share of the (latent) variance between units.

    Plain arithmetic, so it works on floats, numpy arrays (``0 / 0`` is ``nan``) and
    PyTensor variables alike (a builder's ``icc`` deterministic).
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        return var_unit / (var_unit + var_obs)


def quadratic_forms(g, Phi):
    """``g_s' Phi g_s`` for every row ``s`` of ``g`` (S x p); zeros when ``p = 0``."""
    if g.shape[1] == 0:
        return np.zeros(g.shape[0])
    return np.einsum("si,ij,sj->s", g, Phi, g)


#: (name, part, level) of the Rights-Sterba shares: part ``f1`` within part, ``f2``
#: between part, ``m`` unit intercepts, ``e`` occasion residual.
SHARES = (
    ("total: within part", "f1", "total"), ("total: between part", "f2", "total"),
    ("total: unit intercepts", "m", "total"), ("total: occasion residual", "e", "total"),
    ("within: within part", "f1", "within"), ("within: occasion residual", "e", "within"),
    ("between: between part", "f2", "between"), ("between: unit intercepts", "m", "between"),
)


def partition_quantities(g_w, g_b, phi_w, phi_b, sigma, tau, lengths) -> dict:
    """Every quantity of the variance partition, per draw.

    Parameters
    ----------
    g_w : array (S, p_w)
        Within coefficients (:func:`bayespanel.bayes.partition.coefficient_parts`).
    g_b : array (S, p_b) or None
        Between coefficients; ``None`` when the model has no between part (fixed effects).
    phi_w, phi_b : array (p_w, p_w), (p_b, p_b)
        Covariances (divisor ``n``) over the estimation rows of the within columns and of
        the between columns (``phi_b`` is not read when ``g_b`` is ``None``).
    sigma : array (S,)
        Occasion-level SD draws.
    tau : array (S,), float or None
        Unit-level SD draws; 0 for the pooled model, ``None`` for fixed effects.
    lengths : iterable of int
        The distinct panel lengths, one ``"theta (T=...)"`` entry each.

    Returns
    -------
    dict of str -> array (S,)
        ``"unit SD"``, ``"occasion SD"``, ``"ICC"``, ``"theta (T=...)"``, the variance
        parts ``"variance: ..."`` and the shares of :data:`SHARES` (Rights and Sterba
        2019: ``total = f1 + f2 + m + e``, ``within = f1 + e``, ``between = f2 + m``).
        Quantities the model does not define are ``nan``.
    """
    sigma = np.atleast_1d(np.asarray(sigma, dtype=float))
    S = sigma.shape[0]
    v = {"f1": quadratic_forms(g_w, phi_w), "e": sigma ** 2}
    if g_b is None or tau is None:
        t2 = np.full(S, np.nan)
        v["f2"], v["m"] = t2, t2
    else:
        t2 = np.broadcast_to(np.asarray(tau, dtype=float) ** 2, (S,)).astype(float)
        v["f2"], v["m"] = quadratic_forms(g_b, phi_b), t2
    level = {"total": v["f1"] + v["f2"] + v["m"] + v["e"], "within": v["f1"] + v["e"],
             "between": v["f2"] + v["m"]}
    out = {"unit SD": np.sqrt(t2), "occasion SD": sigma,
           "ICC": intraclass_correlation(t2, v["e"])}
    with np.errstate(divide="ignore", invalid="ignore"):
        for T in lengths:
            out[f"theta (T={int(T)})"] = quasi_demeaning_share(T, t2, v["e"])
        out["variance: within part"] = v["f1"]
        out["variance: between part"] = v["f2"]
        out["variance: unit intercepts"] = v["m"]
        out["variance: occasion residual"] = v["e"]
        for name, part, lev in SHARES:
            out[name] = v[part] / level[lev]
    return out


def unit_sd_draws(unit_effects: str, sigma_unit, shape):
    """The SD of the unit effects for every draw, by the model's unit-effect rule.

    Parameters
    ----------
    unit_effects : {"random", "none", "fixed"}
        ``"random"``: the draws of ``sigma_unit``; ``"none"`` (pooled): zeros, the unit
        intercepts have no variance; ``"fixed"``: ``None``, the flat-prior limit (the
        densities treat ``tau = None`` as fixed effects).
    sigma_unit : array or float or None
        Draws (or one estimate) of the unit SD; read only for ``"random"``.
    shape : tuple
        Shape of the result (that of the ``sigma_obs`` draws, e.g. ``(S,)`` or ``(C, D)``).

    Returns
    -------
    numpy.ndarray or None
    """
    if unit_effects == "fixed":
        return None
    if unit_effects == "none":
        return np.zeros(shape)
    if unit_effects != "random":
        raise ValueError(f"unit_effects={unit_effects!r}: expected random, none or fixed")
    if sigma_unit is None:
        raise ValueError("a random-intercept model needs draws of sigma_unit")
    return np.asarray(sigma_unit, dtype=float).reshape(shape)


def log_sum_exp(a, axis, keepdims=False, b=None):
    """``log(sum(b * exp(a)))`` along ``axis``, shifted by the maximum so that nothing
    overflows: the same numbers as ``scipy.special.logsumexp`` (to rounding) without its
    array-API conversions and copies, which cost more than the sum on the
    ``(points, draws)`` arrays of LOO. ``b`` is a scalar weight."""
    a = np.asarray(a, dtype=float)
    m = np.max(a, axis=axis, keepdims=True)
    m = np.where(np.isfinite(m), m, 0.0)
    with np.errstate(divide="ignore"):
        out = np.log(np.sum(np.exp(a - m), axis=axis, keepdims=True)
                     * (1.0 if b is None else b)) + m
    return out if keepdims else np.squeeze(out, axis=axis)

