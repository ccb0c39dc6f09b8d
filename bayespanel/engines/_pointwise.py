"""Unit-level pointwise log-likelihood from stored per-unit statistics, in chunks.

The unit-level LOO term of a Gaussian random-intercept model is the marginal density of
the unit's rows (design.md section 4), which needs, per unit, only ``T_i``, the unit-mean
residual ``rbar_i = zbar_i'v`` and the within residual sum of squares
``W_i = v' W_i v`` with ``v = [-b, 1]`` and ``W_i`` the unit's within cross-products of
``[X, y]``. All three come out of the one pass (``DaskPanel.design(..., cluster=True)``),
so the terms for any set of units and draws are computed without reading the rows again,
a chunk of units at a time so memory stays bounded. This serves the sub-sampling LOO
estimator of Magnusson et al. (2019), which needs the point-estimate approximation for
every unit and the full per-draw terms only for a sample of them.

References
----------
.. [1] Magnusson, M., Andersen, M. R., Jonasson, J. and Vehtari, A. (2019). Bayesian
   leave-one-out cross-validation for large data. ICML, PMLR 97, 4244-4253.
"""

from __future__ import annotations

import numpy as np

__all__ = ["unit_loglik_stats"]


def unit_loglik_stats(unit_cp, unit_mean, unit_count, b, sigma, tau, units=None,
                      budget: int = 1 << 22):
    """Per-unit marginal log density for every draw, from per-unit statistics.

    Parameters
    ----------
    unit_cp : (N, p, p) array
        Per-unit within cross-products of ``[M, y]``.
    unit_mean : (N, p) array
        Unit means of ``[M, y]``.
    unit_count : (N,) array
        Rows per unit.
    b : (S, k) array; sigma, tau : (S,) arrays
        Draws (``tau = 0`` for the pooled model). Fixed effects have no unit-level
        density and are refused by the callers.
    units : array of int, optional
        Codes of the units to evaluate (default all), in the order wanted.
    budget : int
        About how many ``draws x units`` numbers to hold at once.

    Returns
    -------
    (S, len(units)) array
        :func:`bayespanel.models.gaussian.marginal_logdensity` of each unit; equal to
        :func:`bayespanel.models.gaussian.unit_loglik_rows` on the rows.
    """
    from ..models import gaussian

    b = np.atleast_2d(np.asarray(b, dtype=float))
    sigma = np.atleast_1d(np.asarray(sigma, dtype=float))
    tau = np.atleast_1d(np.asarray(tau, dtype=float))
    units = np.arange(len(unit_count)) if units is None else np.asarray(units, dtype=np.int64)
    v = gaussian.residual_vector(b)
    S = v.shape[0]
    out = np.empty((S, len(units)))
    step = max(1, budget // max(S, 1))
    for a in range(0, len(units), step):
        g = units[a:a + step]
        W = np.einsum("si,gij,sj->sg", v, unit_cp[g], v, optimize=True)
        rbar = v @ unit_mean[g].T
        T = unit_count[g].astype(float)
        out[:, a:a + step] = gaussian.marginal_logdensity(
            T, np.maximum(W, 0.0), rbar ** 2, sigma[:, None], tau[:, None])
    return out


def loo_subsample_units(post, design, observations: int = 400, *, seed: int = 0, reff=None):
    """Sub-sampled unit-level PSIS-LOO (Magnusson et al. 2019) from per-unit statistics.

    The out-of-core twin of :func:`bayespanel.loo.loo_subsample` at ``level="unit"``: the
    point-estimate approximation for every unit and the full per-draw terms of a simple
    random sample of ``observations`` units come from :func:`unit_loglik_stats`, never
    from rows; the sample, PSIS and the difference estimator are those of the in-memory
    function (same seed, same units, same numbers).

    Parameters
    ----------
    post : Posterior
        Of a Gaussian model with random or no unit intercepts on ``design``'s rows.
    design : DaskDesign
        The design the model was built on (its per-unit cross-products are collected by
        one more pass if the design pass did not collect them).
    """
    import pandas as pd
    from arviz_stats.base import array_stats

    from ..errors import EstimationError, SpecificationError
    from ..loo.pointwise import undefined_reason
    from ..loo.psis import _lpd, psis_arrays
    from ..loo.result import LOOResult

    spec = post.spec
    reason = undefined_reason(spec.unit_effects, "unit")
    if reason:
        raise EstimationError(reason)
    ds = post.idata["posterior"].to_dataset()
    coef = np.asarray(ds["coef"].values, dtype=float)
    C, D, k = coef.shape
    sigma = np.asarray(ds["sigma_obs"].values, dtype=float).reshape(-1)
    tau = (np.asarray(ds["sigma_unit"].values, dtype=float).reshape(-1)
           if spec.unit_effects == "random" else np.zeros(C * D))
    b = coef.reshape(C * D, k)
    ss = design.model_suffstats(spec.kind)
    if list(ss.names[:-1]) != list(spec.labels):
        raise SpecificationError("the posterior's terms do not match the design's columns "
                                 f"({list(spec.labels)} vs {list(ss.names[:-1])})")
    ucp = design.unit_cross_products(spec.kind)
    N = ss.n_units
    if not isinstance(observations, (int, np.integer)) or not 1 < observations <= N:
        raise SpecificationError(
            f"observations={observations!r} must be an integer between 2 and {N} points")
    args = (ucp, ss.unit_mean, ss.unit_count)
    approx = unit_loglik_stats(*args, b.mean(axis=0)[None], [sigma.mean()], [tau.mean()])[0]
    rng = np.random.default_rng(seed)
    idx = np.sort(rng.choice(N, size=int(observations), replace=False))
    ll = unit_loglik_stats(*args, b, sigma, tau, units=idx).reshape(C, D, -1)
    res = psis_arrays(ll, "unit", ds, reff)
    elpd_s = np.asarray(res.elpd_i.values, dtype=float)
    est, sub_se, se = array_stats.diff_srs_estimator(elpd_s, approx[idx], approx, N)
    p_loo, _, _ = array_stats.srs_estimator(_lpd(ll) - elpd_s, N)
    pw = pd.DataFrame({"position": np.arange(N), "unit": np.asarray(ss.unit_keys),
                       "occasions": ss.unit_count, "approx": approx, "elpd": np.nan,
                       "pareto_k": np.nan})
    pw.loc[idx, "elpd"] = elpd_s
    pw.loc[idx, "pareto_k"] = np.asarray(res.pareto_k.values, dtype=float)
    note = (f"sub-sampled: PSIS on {len(idx)} of {N} units (seed {seed}), difference "
            "estimator with the point-estimate approximation (Magnusson et al. 2019); "
            "terms from per-unit statistics (out of core)")
    out = LOOResult(level="unit", method=f"PSIS-LOO, sub-sampled ({len(idx)} of {N})",
                    elpd=est, se=se, p_loo=p_loo, pointwise=pw, good_k=float(res.good_k),
                    notes=[note], n_draws=C * D, elpd_data=res, subsampling_se=sub_se)
    out.subsample_indices = idx
    return out
