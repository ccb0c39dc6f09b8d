"""Sub-sampled LOO out of core: unit-level terms from per-unit statistics, occasion-level
terms from one more pass over the partitions.

The unit-level LOO term of a Gaussian random-intercept model is the marginal density of
the unit's rows (:func:`bayespanel.models.gaussian.unit_logdensity`), which needs, per
unit, only ``T_i``, the unit-mean residual ``rbar_i = zbar_i'v`` and the within residual
sum of squares ``W_i = v' W_i v`` with ``v = [-b, 1]`` and ``W_i`` the unit's within
cross-products of ``[X, y]``. All three come out of the one pass (``DaskPanel.design(..., cluster=True)``),
so the terms for any set of units and draws are computed without reading the rows again,
a chunk of units at a time so memory stays bounded. This serves the sub-sampling LOO
estimator of Magnusson et al. (2019), which needs the point-estimate approximation for
every unit and the full per-draw terms only for a sample of them.

At the occasion level the term of row ``(i, t)`` is the density of its residual given the
unit's other rows (Bürkner, Gabry and Vehtari 2021), which needs the row itself and its
unit's ``T_i`` and residual sum; the latter come from the per-unit statistics the client
holds after the design pass. :func:`loo_subsample_occasions` chooses the sampled rows
before reading anything (a seeded simple random sample of row positions in unit-time
order, the in-memory choice), then one pass computes the point-estimate approximation for
every row (only its sum and sum of squares leave a partition) and gathers the sampled
rows, whose full per-draw terms are computed afterwards in chunks of draws.

References
----------
.. [1] Magnusson, M., Andersen, M. R., Jonasson, J. and Vehtari, A. (2019). Bayesian
   leave-one-out cross-validation for large data. ICML, PMLR 97, 4244-4253.
.. [2] Bürkner, P.-C., Gabry, J. and Vehtari, A. (2021). Efficient leave-one-out
   cross-validation for Bayesian non-factorized normal and Student-t models.
   Computational Statistics 36, 1243-1261. doi:10.1007/s00180-020-01045-4
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from ..mathcore import unit_sd_draws

__all__ = ["unit_loglik_stats", "loo_subsample_units", "loo_subsample_occasions",
           "diff_estimator"]


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


@dataclass
class _Draws:
    """Posterior draws of a Gaussian panel model: ``coef`` (C, D, k), ``sigma`` and ``tau``
    (C, D) (``tau`` zeros without unit effects, ``None`` for fixed effects)."""

    kind: str
    unit_effects: str
    labels: list
    coef: np.ndarray
    sigma: np.ndarray
    tau: np.ndarray | None
    posterior: object

    def flat(self):
        S = self.coef.shape[0] * self.coef.shape[1]
        return (self.coef.reshape(S, -1), self.sigma.reshape(S),
                None if self.tau is None else self.tau.reshape(S))


def _draws(post) -> _Draws:
    """Read a :class:`~bayespanel.posterior.Posterior` (or :class:`~bayespanel.loo.FitDraws`);
    rows are not needed."""
    from ..errors import SpecificationError
    from ..loo import FitDraws

    if isinstance(post, FitDraws):
        if post.latent is not None:
            raise SpecificationError("out-of-core LOO needs a Gaussian marginal model; this "
                                     f"fit is a latent-effect model (family={post.family!r})")
        return _Draws(post.kind, post.unit_effects, list(post.labels), post.coef, post.sigma,
                      post.tau, post.posterior)
    spec, idata = getattr(post, "spec", None), getattr(post, "idata", None)
    if spec is None or idata is None or "posterior" not in idata.children:
        raise SpecificationError(
            f"expected a bayespanel Posterior with posterior draws, got {type(post).__name__}")
    ds = idata["posterior"].to_dataset()
    if "coef" not in ds or "sigma_obs" not in ds:
        raise SpecificationError("out-of-core LOO needs a Gaussian panel model's posterior "
                                 "(coef and sigma_obs draws)")
    coef = np.asarray(ds["coef"].values, dtype=float)
    C, D, _ = coef.shape
    sigma = np.asarray(ds["sigma_obs"].values, dtype=float).reshape(C, D)
    tau = unit_sd_draws(spec.unit_effects, ds["sigma_unit"].values
                        if spec.unit_effects == "random" else None, (C, D))
    return _Draws(spec.kind, spec.unit_effects, list(spec.labels), coef, sigma, tau, ds)


def _checked(draws: _Draws, design):
    """The design's statistics for the posterior's kind, after checking the terms agree."""
    from ..errors import SpecificationError

    ss = design.model_suffstats(draws.kind)
    if list(ss.names[:-1]) != list(draws.labels):
        raise SpecificationError("the posterior's terms do not match the design's columns "
                                 f"({list(draws.labels)} vs {list(ss.names[:-1])})")
    return ss


def _check_observations(observations, N):
    from ..errors import SpecificationError

    if not isinstance(observations, (int, np.integer)) or not 1 < observations <= N:
        raise SpecificationError(
            f"observations={observations!r} must be an integer between 2 and {N} points")


def diff_estimator(elpd_s, approx_s, approx_sum, approx_sq_sum, N):
    """Difference estimator of Magnusson et al. (2019) from the sums of the approximation.

    The same estimate and standard errors as ``arviz_stats``' ``diff_srs_estimator``
    (``elpd_loo_estimate, subsampling_se, total_se``), which takes the approximation of
    every point; the population enters only through ``sum approx`` and
    ``sum approx^2``, which an out-of-core pass accumulates without keeping the points.
    """
    ok = np.isfinite(elpd_s) & np.isfinite(approx_s)
    m = int(ok.sum())
    if m == 0:
        return np.nan, np.inf, np.inf
    e, a = np.asarray(elpd_s, float)[ok], np.asarray(approx_s, float)[ok]
    d = e - a
    scaled = N * d.mean()
    est = approx_sum + scaled
    if m < 2 or N <= 0:
        return est, np.inf, np.inf
    var = np.var(d, ddof=1)
    sub_var = N ** 2 * max(0.0, 1 - m / N) * var / m
    total_var = (approx_sq_sum + N * np.mean(e ** 2 - a ** 2)
                 - (scaled ** 2 - sub_var + 2 * approx_sum * est - approx_sum ** 2) / N)
    return est, float(np.sqrt(sub_var)), float(np.sqrt(max(0.0, total_var)))


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

    from ..errors import EstimationError
    from ..loo.pointwise import undefined_reason
    from ..loo.psis import _lpd, psis_arrays
    from ..loo.result import LOOResult

    dr = _draws(post)
    reason = undefined_reason(dr.unit_effects, "unit")
    if reason:
        raise EstimationError(reason)
    C, D, _ = dr.coef.shape
    b, sigma, tau = dr.flat()
    ss = _checked(dr, design)
    ucp = design.unit_cross_products(dr.kind)
    N = ss.n_units
    _check_observations(observations, N)
    ds = dr.posterior
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


# ---------------------------------------------------------------------------- occasion level
@dataclass(frozen=True)
class RowLookup:
    """What every partition needs to score its rows at the posterior means and to pick
    the sampled rows (built once on the client, shared by all partitions).

    A row ``z = [x, y]`` of the design (in the design's kept columns) has residual
    ``r = z'u + const_i`` under the model's columns ``A z + B zbar_i`` at the posterior
    means (``u = A'v``, ``const_i = zbar_i'B'v``, ``v = [-b, 1]``); its unit's residuals
    sum to ``total_i`` over ``others_i + 1`` rows.
    """

    keys: np.ndarray
    const: np.ndarray
    total: np.ndarray
    others: np.ndarray
    u: np.ndarray
    sigma: float
    tau: float | None
    columns: tuple | None       # columns of the pass's [X, y] the design kept
    take_units: np.ndarray      # sorted codes of the units whose rows are gathered
    take_rows: np.ndarray | None = None  # sorted codes * n_occ + occasion position, or all
    occasions: np.ndarray | None = None  # the panel's sorted occasions (for take_rows)


@dataclass
class OccasionPiece:
    """Sum and sum of squares of the approximation over the defined rows of some
    partitions, their number, and the gathered rows (unit code, time, ``z``, approx)."""

    total: float
    total_sq: float
    count: int
    codes: np.ndarray
    times: np.ndarray
    Z: np.ndarray
    approx: np.ndarray


def occasion_block(pdf, spec, look: RowLookup) -> OccasionPiece:
    """The approximation of every kept row of one partition, and its sampled rows."""
    from ..models import gaussian
    from . import _blocks as blk

    sub, _, _, Z = blk.complete_rows(pdf, spec)
    if look.columns is not None:
        Z = np.ascontiguousarray(Z[:, list(look.columns)])
    keys = sub[spec.unit].to_numpy()
    codes = np.searchsorted(look.keys, keys)
    r = Z @ look.u + look.const[codes]
    t = gaussian.occasion_logpdf(r, look.total[codes] - r, look.others[codes], look.sigma,
                                 look.tau)
    ok = np.isfinite(t)
    times = sub[spec.time].to_numpy()
    sel = np.flatnonzero(np.isin(codes, look.take_units))
    if look.take_rows is not None and len(sel):
        n_occ = len(look.occasions)
        pair = codes[sel] * n_occ + np.searchsorted(look.occasions, times[sel])
        sel = sel[np.isin(pair, look.take_rows)]
    tk = t[ok]
    return OccasionPiece(float(tk.sum()), float((tk * tk).sum()), int(ok.sum()), codes[sel],
                         times[sel], Z[sel], t[sel])


def merge_occasion(pieces) -> OccasionPiece:
    return OccasionPiece(
        sum(p.total for p in pieces), sum(p.total_sq for p in pieces),
        sum(p.count for p in pieces), np.concatenate([p.codes for p in pieces]),
        np.concatenate([p.times for p in pieces]), np.concatenate([p.Z for p in pieces]),
        np.concatenate([p.approx for p in pieces]))


def _sample_rows(T, valid_units, observations, seed):
    """Positions (in unit-time order) of a seeded simple random sample of the defined rows,
    sorted, as the in-memory sub-sampling draws them; with their unit and rank."""
    Tv = np.where(valid_units, T, 0)
    N = int(Tv.sum())
    _check_observations(observations, N)
    rng = np.random.default_rng(seed)
    choice = rng.choice(N, size=int(observations), replace=False)
    cum_v = np.cumsum(Tv)
    g = np.searchsorted(cum_v, choice, side="right")
    starts = np.cumsum(T) - T
    idx = np.sort(starts[g] + (choice - (cum_v[g] - Tv[g])))
    g = np.searchsorted(np.cumsum(T), idx, side="right")
    return idx, g, idx - starts[g], N


def _gathered(piece: OccasionPiece, g, rank, exact: bool):
    """``(z, time, approx)`` of the sampled rows ``(unit g, rank within unit)`` in sample
    order, from the gathered rows: exactly the sampled ones (``exact``), or every row of
    the sampled units, ranked here by time."""
    from ..errors import EstimationError

    order = np.lexsort((piece.times, piece.codes))
    codes = piece.codes[order]
    if exact:
        take = order
        ok = np.array_equal(codes, g)
    else:
        at = np.searchsorted(codes, g, side="left") + rank
        ok = bool(np.all(at < len(codes))) and np.array_equal(codes[np.minimum(at, len(codes) - 1)], g)
        take = order[np.minimum(at, len(codes) - 1)] if len(codes) else order
    if not ok:
        raise EstimationError("the occasion-level pass did not find every sampled row; has "
                              "the table changed since the design pass?")
    return piece.Z[take], piece.times[take], piece.approx[take]


def loo_subsample_occasions(post, design, observations: int = 400, *, seed: int = 0,
                            reff=None, budget: int = 1 << 22):
    """Sub-sampled occasion-level PSIS-LOO (Magnusson et al. 2019) with one more pass.

    The out-of-core twin of :func:`bayespanel.loo.loo_subsample` at
    ``level="occasion"``: the same seeded sample of row positions (rows in unit-time
    order; for fixed effects the rows of single-row units are undefined and left out),
    the point-estimate approximation for every row, the full per-draw terms of the
    sampled rows given their unit's other rows (Bürkner, Gabry and Vehtari 2021), PSIS and
    the difference estimator (:func:`diff_estimator`); same seed, same rows, same numbers.

    The pass reads the formula's columns once; a partition returns the sum and the sum of
    squares of its rows' approximations and the sampled rows among its rows. The rows are
    picked by unit and occasion when no row was dropped (the occasions of each unit are
    known from the structure pass); otherwise all rows of the sampled units are gathered
    and ranked by time afterwards (``observations x`` occasions per unit rows at most).
    The per-draw terms are computed ``budget // draws`` rows at a time.

    ``pointwise`` holds the sampled rows only (with ``approx`` for them); the population's
    approximation enters through its sum and sum of squares.
    """
    import pandas as pd
    from arviz_stats.base import array_stats

    from ..errors import EstimationError, SamplingWarning
    from ..loo.pointwise import undefined_reason
    from ..loo.psis import _describe_points, _lpd, psis_arrays
    from ..loo.result import LOOResult
    from ..models import gaussian

    dr = _draws(post)
    stats = design.design_suffstats()
    T = stats.unit_count
    reason = undefined_reason(dr.unit_effects, "occasion", T)
    if reason:
        raise EstimationError(reason)
    _checked(dr, design)
    A, B = design.row_map(dr.kind)
    zbar = stats.unit_mean
    b, sigma, tau = dr.flat()
    C, D, _ = dr.coef.shape
    valid_units = T >= 2 if dr.unit_effects == "fixed" else np.ones(len(T), bool)
    idx, g, rank, N = _sample_rows(T, valid_units, observations, seed)
    v = gaussian.residual_vector(b.mean(axis=0))
    u, w = A.T @ v, B.T @ v
    take_units = np.unique(g)
    take_rows = occ = None
    panel = design.panel
    st = panel._structure
    if design.n_dropped == 0 and st is not None and np.array_equal(st.keys, stats.unit_keys):
        from ._blocks import occasion_positions

        occ = st.occasions
        pos = np.array([occasion_positions(st.masks[gi])[ri] for gi, ri in zip(g, rank)],
                       dtype=np.int64)
        take_rows = np.unique(g * len(occ) + pos)
    look = RowLookup(
        keys=stats.unit_keys, const=zbar @ w, total=T * (zbar @ (u + w)),
        others=(T - 1).astype(float), u=u, sigma=float(sigma.mean()),
        tau=None if tau is None else float(tau.mean()), columns=design.kept_columns,
        take_units=take_units, take_rows=take_rows, occasions=occ)
    piece = design.run_rows(occasion_block, merge_occasion, look)
    if piece.count != N:
        raise EstimationError(f"the occasion-level pass scored {piece.count} rows, the design "
                              f"has {N}; the table changed since the design pass?")
    zs, times, approx_s = _gathered(piece, g, rank, exact=take_rows is not None)
    # full terms: the model's columns of the sampled rows and of their units' means
    Ms = zs @ A.T + zbar[g] @ B.T
    Mbar = zbar[g] @ (A + B).T
    Tg = T[g].astype(float)
    S = b.shape[0]
    ll = np.empty((S, len(idx)))
    step = max(1, budget // max(len(idx), 1))
    for a in range(0, S, step):
        V = gaussian.residual_vector(b[a:a + step])
        r = V @ Ms.T
        R = Tg * (V @ Mbar.T) - r
        ta = None if tau is None else tau[a:a + step, None]
        ll[a:a + step] = gaussian.occasion_logpdf(r, R, (Tg - 1)[None, :],
                                                  sigma[a:a + step, None], ta)
    ll = ll.reshape(C, D, -1)
    res = psis_arrays(ll, "occasion", dr.posterior, reff)
    elpd_s = np.asarray(res.elpd_i.values, dtype=float)
    k_s = np.asarray(res.pareto_k.values, dtype=float)
    est, sub_se, se = diff_estimator(elpd_s, approx_s, piece.total, piece.total_sq, N)
    p_loo, _, _ = array_stats.srs_estimator(_lpd(ll) - elpd_s, N)
    pw = pd.DataFrame({"position": idx, "unit": np.asarray(stats.unit_keys)[g],
                       "occasion": rank + 1, "time": times, "approx": approx_s,
                       "elpd": elpd_s, "pareto_k": k_s})
    good_k = float(res.good_k)
    notes = [f"sub-sampled: PSIS on {len(idx)} of {N} rows (seed {seed}), difference "
             "estimator with the point-estimate approximation (Magnusson et al. 2019); one "
             "pass over the partitions (out of core); pointwise lists the sampled rows"]
    high = k_s > good_k
    if high.any():
        who = _describe_points(pw.loc[high], "occasion", names=(panel.unit, panel.time))
        warnings.warn(f"Pareto k above {good_k:.2f} for {int(high.sum())} sampled points at "
                      f"the occasion level ({who})", SamplingWarning, stacklevel=3)
        notes.append(f"{int(high.sum())} sampled point(s) with Pareto k > {good_k:.2f}: {who}")
    n_rows = int(T.sum())
    if N < n_rows:
        notes.append(f"{n_rows - N} undefined point(s) left out")
    out = LOOResult(level="occasion", method=f"PSIS-LOO, sub-sampled ({len(idx)} of {N})",
                    elpd=est, se=se, p_loo=p_loo, pointwise=pw, good_k=good_k, notes=notes,
                    n_draws=C * D, elpd_data=res, subsampling_se=sub_se, family="gaussian",
                    n_points=N)
    out.subsample_indices = idx
    return out
