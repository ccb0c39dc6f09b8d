"""PSIS-LOO at the unit or occasion level, exact refits for high Pareto k, grouped K-fold
and sub-sampling for large panels.

References
----------
.. [1] Vehtari, A., Gelman, A. and Gabry, J. (2017). Practical Bayesian model evaluation
   using leave-one-out cross-validation and WAIC. Statistics and Computing 27, 1413-1432.
   doi:10.1007/s11222-016-9696-4
.. [2] Vehtari, A., Simpson, D., Gelman, A., Yao, Y. and Gabry, J. (2024). Pareto smoothed
   importance sampling. Journal of Machine Learning Research 25(72), 1-58.
.. [3] Bürkner, P.-C., Gabry, J. and Vehtari, A. (2021). Efficient leave-one-out
   cross-validation for Bayesian non-factorized normal and Student-t models.
   Computational Statistics 36, 1243-1261. doi:10.1007/s00180-020-01045-4
.. [4] Magnusson, M., Andersen, M. R., Jonasson, J. and Vehtari, A. (2019). Bayesian
   leave-one-out cross-validation for large data. Proceedings of the 36th International
   Conference on Machine Learning, PMLR 97, 4244-4253.
"""

from __future__ import annotations

import warnings
from contextlib import contextmanager

import numpy as np
import pandas as pd

from ...core import suffstats as _ss
from ...core.errors import EstimationError, SamplingWarning, SpecificationError
from ...core.mathcore import log_sum_exp as logsumexp
from ._draws import check_level, from_draws, from_posterior, model_of
from .pointwise import holdout_loglik, pointwise_loglik, undefined_reason
from .result import LOOResult

__all__ = ["loo", "kfold", "loo_subsample", "psis_arrays", "refit_draws"]

_MAX_NAMED = 8
#: fewest draws PSIS can smooth: arviz-stats fits the Pareto tail to the largest
#: ``floor(S / 5)`` weights when ``S * r_eff <= 225`` and needs at least 5 of them
#: (Vehtari et al. 2024 give ``min(S / 5, 3 sqrt(S / r_eff))``)
MIN_PSIS_DRAWS = 25


# ---------------------------------------------------------------------------- PSIS core
def psis_arrays(ll, level, posterior=None, reff=None):
    """PSIS-LOO of a ``(C, D, points)`` log-likelihood array: the arviz ``ELPDDataLOO``
    (pointwise) that :func:`arviz_stats.loo` gives, computed for all points at once
    (:func:`bayespanel.analysis.loo.psisbatch.psis_loo`, same numbers). ``reff`` defaults
    to arviz's estimate from the posterior (mean relative ESS), or 1 without a posterior.
    """
    from .psisbatch import psis_loo

    S = int(np.prod(np.shape(ll)[:-1]))
    if S < MIN_PSIS_DRAWS:
        raise EstimationError(
            f"PSIS-LOO needs at least {MIN_PSIS_DRAWS} draws in all (chains x draws); this "
            f"posterior has {S}, so its LOO is not computed: sample more draws")
    if posterior is None and reff is None:
        reff = 1.0
    with warnings.catch_warnings():
        # high Pareto k is reported by us, naming the units (SamplingWarning)
        warnings.filterwarnings("ignore", message="Estimated shape parameter of Pareto")
        try:
            return psis_loo(ll, level, posterior, reff)
        except ValueError as exc:  # the tail of the weights cannot be fitted
            raise EstimationError(
                f"PSIS-LOO could not fit the tail of the importance weights ({exc}): the "
                "draws barely move, as when the sampler was not tuned; the LOO is not "
                "computed: tune the sampler and sample more draws") from None


def _lpd(ll):
    """``log mean_s p(y_i | theta_s)`` per point for ``(C, D, points)`` or ``(S, points)``."""
    flat = ll.reshape(-1, ll.shape[-1])
    return logsumexp(flat, axis=0) - np.log(flat.shape[0])


def _label(v):
    """A unit or occasion label as a reader knows it (numpy scalars and datetimes plain)."""
    if isinstance(v, np.datetime64) or isinstance(v, pd.Timestamp):
        t = pd.Timestamp(v)
        return repr(str(t.date()) if t == t.normalize() else str(t))
    v = v.item() if isinstance(v, np.generic) else v
    return repr(v)


def _describe_points(pw, level, limit=_MAX_NAMED, names=(None, None)):
    """Name points by unit (and occasion): ``clinic='c03', quarter=2`` when the Panel's
    column names are known, the occasion's time label when the design is known and its
    position within the unit (``occasion 2``) otherwise."""
    unit_name, time_name = names
    units = [f"{unit_name}={_label(u)}" if unit_name else str(u) for u in pw["unit"]]
    if level == "unit":
        out = units
    else:
        if "time" in pw:
            when = [f"{time_name}={_label(t)}" if time_name else f"time {_label(t)}"
                    for t in pw["time"]]
        else:
            when = [f"occasion {o}" for o in pw["occasion"]]
        out = [f"{u}, {t}" for u, t in zip(units, when)]
    more = len(out) - limit
    sep = "; " if level == "occasion" or unit_name else ", "
    return sep.join(out[:limit]) + (f" and {more} more" if more > 0 else "")


def _refuse_latent(fd, what):
    if fd.latent is not None:
        raise SpecificationError(
            f"{what} is not available for latent-effect models (family={fd.family!r}"
            + (", random slopes" if fd.latent.slope_labels else "") + "): their refits "
            "would re-sample every unit effect; use plain PSIS-LOO (post.loo(level)) and read "
            "the Pareto k values")


def _term_notes(fd, level):
    """How the pointwise terms were computed, for a latent-effect posterior."""
    if fd.latent is None:
        return []
    method = fd.latent.pointwise_loglik_method(level)
    notes = [f"{level}-level terms: {method}"]
    if level == "occasion" and "conditional on" in method:
        notes.append(
            "factorised, conditional LOO: each row's term is log p(y_it | theta, u_i) given "
            "the draw of its unit effect, not the closed-form conditional "
            "p(y_it | y_i,-t, theta) of the Gaussian marginal models; PSIS reweights the "
            "draws of theta and u_i together, so both estimate the density of a held-out "
            "occasion given all other rows, but here the weights also carry the unit "
            "effect and Pareto k runs higher for units with few occasions")
    return notes


def _summary(elpd_i, lpd_i=None):
    n = len(elpd_i)
    se = float(np.sqrt(n * np.var(elpd_i, ddof=1))) if n > 1 else float("nan")
    p = float(np.sum(lpd_i - elpd_i)) if lpd_i is not None else float("nan")
    return float(np.sum(elpd_i)), se, p


# ---------------------------------------------------------------------------- refits
def _ar1_refit_model(fd, train, stats, rows):
    """A new model of the same class and priors on the training rows (``errors="ar1"``:
    leaving rows out changes the AR(1) link structure, so the compiled model cannot take
    the new data; each refit compiles its own)."""
    from ...bayes.graph import graph_edits

    base = model_of(fd)
    edits = graph_edits(base)
    if edits:
        raise SpecificationError(
            "exact refits of an errors='ar1' model build a new model on the training rows, "
            f"which would leave out what was added to its pymc_model ({', '.join(edits)})")
    return type(base).from_suffstats(
        stats, list(fd.labels), outcome=base.outcome, priors=base.priors,
        likelihood=base.likelihood, rows=rows, errors="ar1", time=fd.ar1_time[train])


@contextmanager
def _training_model(fd, train, stats, codes):
    """The model on the training rows: the compiled one with the statistics swapped in
    (restored on exit), or with AR(1) errors a new one (:func:`_ar1_refit_model`)."""
    rows = (fd.M[train], fd.y[train], codes)
    if fd.rho is not None:
        yield _ar1_refit_model(fd, train, stats, rows)
        return
    model = model_of(fd)
    old_stats, old_rows, old_units = model.stats, model.rows, model.units
    try:
        model.set_suffstats(stats, rows=rows if model.likelihood == "latent" else None)
        yield model
    finally:
        model.set_suffstats(old_stats, rows=old_rows)
        model.units = old_units


def refit_draws(fd, train, *, what="the held-out points", **sample_kwargs):
    """Sample the same model on the training rows only.

    Returns the refit's :class:`~bayespanel.bayes.draws.FitDraws` on the training rows
    (units renumbered, chains stacked: ``flat()`` gives ``(coef (S, k), sigma (S,), tau
    (S,) or None)``, ``flat_rho()`` the draws of ``rho`` for AR(1) errors); its
    ``messages`` are the refit's sampling warnings (R-hat, ESS, divergences).

    The compiled graph is reused: the model's sufficient statistics are swapped with
    :meth:`~bayespanel.bayes.GaussianModel.set_suffstats` and restored afterwards, so a
    refit costs sampling time only (``errors="ar1"``: a new model of the same class and
    priors on the training rows, compiled once per refit, since leaving rows out changes
    the links between occasions). Sampling warnings of the refit are re-issued with the
    held-out points named by the caller.
    """
    train = np.asarray(train, dtype=bool)
    _, codes = np.unique(fd.codes[train], return_inverse=True)
    codes = codes.ravel().astype(np.int64)
    stats = _ss.compute(fd.M[train], fd.y[train], codes, names=list(fd.labels) + ["y"])
    kw = {"draws": 400, "tune": 400, "chains": 2, "seed": 1}
    kw.update({k: v for k, v in fd.sample_kwargs.items() if k in ("draws", "tune", "chains",
                                                                   "seed", "target_accept")})
    kw.update(sample_kwargs)
    kw.setdefault("progress", False)
    try:
        with _training_model(fd, train, stats, codes) as model:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", SamplingWarning)
                post = model.sample(**kw)
    except EstimationError as exc:
        raise EstimationError(f"the refit without {what} cannot proceed: {exc}") from exc
    ds = post.idata["posterior"].to_dataset()
    S = ds.sizes["chain"] * ds.sizes["draw"]
    b = np.asarray(ds["coef"].values, float).reshape(S, -1)
    sigma = np.asarray(ds["sigma_obs"].values, float).reshape(S)
    tau = ds["sigma_unit"].values if fd.unit_effects == "random" else None
    msgs = [str(w.message) for w in caught if issubclass(w.category, SamplingWarning)]
    for w in caught:
        if not issubclass(w.category, SamplingWarning):
            warnings.warn(w.message, w.category, stacklevel=2)
    rho = (np.asarray(ds["rho"].values, float).reshape(S) if "rho" in ds and fd.rho is not None
           else None)
    return from_draws(kind=fd.kind, unit_effects=fd.unit_effects, labels=fd.labels,
                      M=fd.M[train], y=fd.y[train], codes=codes,
                      units=np.asarray(fd.units)[np.unique(fd.codes[train])],
                      rows=np.asarray(fd.rows)[train], coef=b, sigma=sigma, tau=tau,
                      unit_name=fd.unit_name, time_name=fd.time_name, family=fd.family,
                      rho=rho, ar1_time=None if rho is None else fd.ar1_time[train],
                      messages=msgs)


#: from this many refits on, refits default to nutpie, which compiles once per model and
#: then only swaps data, while PyMC's sampler compiles again on every call (see
#: bayespanel.bayes.sampling). Measured here on the demo model: one nutpie compile cost
#: seven to nine PyMC sample calls, a refit after it well under a second.
MANY_REFITS = 10


def _refit_defaults(n_refits, given):
    from ...bayes.sampling import nutpie_available

    kw = dict(given or {})
    if n_refits >= MANY_REFITS and "sampler" not in kw and nutpie_available():
        kw["sampler"] = "nutpie"
    return kw


def _exact_points(fd, level, points, sample_kwargs):
    """Exact leave-one-point-out ELPD terms for the given point indices."""
    values, problems = [], []
    sample_kwargs = _refit_defaults(len(points), sample_kwargs)
    label = fd.point_index(level)
    for j in points:
        test = (fd.codes == j) if level == "unit" else (np.arange(fd.n) == j)
        who = _describe_points(label.iloc[[j]], level, names=fd.names)
        refit = refit_draws(fd, ~test, what=who, **sample_kwargs)
        (b, sigma, tau), msgs = refit.flat(), refit.messages
        ll = holdout_loglik(fd.M, fd.y, fd.codes, test, b, sigma, tau, level,
                            rho=refit.flat_rho(), time=fd.ar1_time)
        values.append(float(_lpd(ll)[0]))
        if msgs:
            problems.append(f"refit without {who}: " + "; ".join(msgs))
    for p in problems:
        warnings.warn(p, SamplingWarning, stacklevel=3)
    return np.array(values)


# ---------------------------------------------------------------------------- public
#: largest draws x points matrix (bytes) :func:`loo` builds before asking for sub-sampling
MAX_POINTWISE_BYTES = 2 ** 31


def loo(post, level="occasion", *, refit_high_k=False, max_refits=10, refit_kwargs=None,
        reff=None, subsample=None, seed=0):
    """Leave-one-out ELPD at the unit or occasion level (PSIS-LOO).

    Parameters
    ----------
    post : Posterior
        A Gaussian posterior, or a latent-effect one (``family=``, ``random_slopes=``),
        whose terms are its own
        (:meth:`~bayespanel.bayes.latent.LatentPosterior.pointwise_loglik`) and whose
        occasion-level result notes that they are the factorised, conditional terms.
    level : {"unit", "occasion"}
        ``"unit"``: leave one unit out; the question is how well the model predicts a
        *new unit* (the term is the marginal density of the unit's rows).
        ``"occasion"``: leave one row out; how well it predicts a *new occasion of a known
        unit* (the term is the conditional density given the unit's other rows;
        Bürkner, Gabry and Vehtari 2021).
    refit_high_k : bool
        Replace the points with Pareto k above the threshold by exact refits without them
        (the compiled model is reused; each refit is a full posterior sample).
    max_refits : int
        Refuse to start more refits than this (use :func:`kfold` instead).
    refit_kwargs : dict, optional
        Sampling options of the refits (default: those of the posterior; from
        ``MANY_REFITS`` refits on, the nutpie sampler, compiled once and reused).
    reff : float, optional
        Relative efficiency for PSIS (default from the posterior's ESS, as arviz does).
    subsample : int, optional
        Evaluate PSIS on a simple random sample of this many points only and estimate the
        total with the difference estimator of Magnusson et al. (2019); see
        :func:`loo_subsample`.
    seed : int
        Seed of the sub-sample.

    Returns
    -------
    LOOResult

    Warns
    -----
    SamplingWarning
        When Pareto k exceeds ``min(1 - 1/log10(S), 0.7)`` (Vehtari et al. 2024), naming the
        units (or units and occasions, by the design's time labels) behind it.
    """
    check_level(level)
    if subsample is not None:
        return loo_subsample(post, level, subsample, seed=seed, reff=reff)
    fd = from_posterior(post)
    if refit_high_k:
        _refuse_latent(fd, "refit_high_k=True (exact refits)")
    reason = undefined_reason(fd.unit_effects, level, fd.T)
    if reason:
        raise EstimationError(reason)
    points = fd.n_units if level == "unit" else fd.n
    size = 8 * fd.n_chains * fd.n_draws * points
    if size > MAX_POINTWISE_BYTES:
        raise SpecificationError(
            f"the pointwise matrix would take {size / 2 ** 30:.1f} GiB ({fd.n_chains * fd.n_draws} "
            f"draws x {points} points); use subsample= (e.g. subsample=1000) for the "
            "sub-sampling estimator of Magnusson et al. (2019)")
    ll = pointwise_loglik(fd, level)
    labels = fd.point_index(level)
    notes = _term_notes(fd, level)
    ok = np.all(np.isfinite(ll), axis=(0, 1))
    if not ok.all():
        dropped = labels.loc[~ok, "unit"].unique()
        notes.append(f"{int((~ok).sum())} row(s) of {len(dropped)} single-occasion unit(s) "
                     "left out: fixed effects cannot predict an occasion of a unit with no "
                     "other rows")
        ll, labels = ll[..., ok], labels.loc[ok].reset_index(drop=True)
    res = psis_arrays(ll, level, fd.posterior, reff)
    pw = labels.copy()
    pw["elpd"] = np.asarray(res.elpd_i.values, dtype=float)
    pw["pareto_k"] = np.asarray(res.pareto_k.values, dtype=float)
    pw["refit"] = False
    lpd_i = _lpd(ll)
    pw["p_loo"] = lpd_i - pw["elpd"].to_numpy()
    good_k = float(res.good_k)
    high = np.flatnonzero(pw["pareto_k"].to_numpy() > good_k)
    method = "PSIS-LOO"
    if len(high) and refit_high_k:
        if len(high) > max_refits:
            raise EstimationError(
                f"{len(high)} points have Pareto k above {good_k:.2f}, more than "
                f"max_refits={max_refits}; use bp.loo.kfold(post, level={level!r}) or raise "
                "max_refits")
        idx = np.flatnonzero(ok)[high]
        exact = _exact_points(fd, level, idx, refit_kwargs or {})
        pw.loc[high, "elpd"] = exact
        pw.loc[high, "refit"] = True
        pw.loc[high, "p_loo"] = lpd_i[high] - exact
        method = "PSIS-LOO + exact refits"
        notes.append(f"{len(high)} point(s) with Pareto k > {good_k:.2f} replaced by exact "
                     f"refits: {_describe_points(pw.iloc[high], level, names=fd.names)}")
    elif len(high):
        who = _describe_points(pw.iloc[high], level, names=fd.names)
        msg = (f"Pareto k above {good_k:.2f} for {len(high)} of {len(pw)} points at the "
               f"{level} level ({who}); the PSIS estimate may be biased for them. "
               + ("Exact refits and K-fold are not available for latent-effect models; at "
                  "the unit level each unit's effects are integrated out and k is usually "
                  "lower" if fd.latent is not None and level == "occasion" else
                  "Exact refits and K-fold are not available for latent-effect models"
                  if fd.latent is not None else
                  "Refit them exactly with post.loo(level, refit_high_k=True), or from the "
                  "command line with --refit-high-k (refit_high_k = true in the analysis "
                  "file); or use bp.loo.kfold"))
        warnings.warn(msg, SamplingWarning, stacklevel=2)
        notes.append(f"{len(high)} point(s) with Pareto k > {good_k:.2f}: {who}")
    elpd, se, p = _summary(pw["elpd"].to_numpy(), lpd_i)
    return LOOResult(level=level, method=method, elpd=elpd, se=se, p_loo=p, pointwise=pw,
                     good_k=good_k, notes=notes, n_draws=fd.n_chains * fd.n_draws,
                     elpd_data=res, family=fd.family)


def _folds(fd, level, K, seed):
    """Fold of every row: whole units at the unit level; at the occasion level each unit's
    rows are spread over the folds (so every fold leaves training rows for most units)."""
    rng = np.random.default_rng(seed)
    if level == "unit":
        if K > fd.n_units:
            raise SpecificationError(f"K={K} is larger than the number of units ({fd.n_units})")
        unit_fold = rng.permutation(np.arange(fd.n_units) % K)
        return unit_fold[fd.codes]
    if K > fd.n:
        raise SpecificationError(f"K={K} is larger than the number of rows ({fd.n})")
    fold = np.empty(fd.n, dtype=np.int64)
    starts = np.concatenate([[0], np.cumsum(fd.T)[:-1]])
    for i, (s, T) in enumerate(zip(starts, fd.T)):
        fold[s:s + T] = (rng.integers(K) + rng.permutation(T)) % K
    return fold


def kfold(post, level="occasion", K=10, *, seed=0, refit_kwargs=None):
    """Grouped K-fold cross-validation (the fallback when PSIS is unreliable).

    At the unit level the folds are groups of whole units; each held-out unit is scored by
    its marginal density under the posterior refitted without its fold. At the occasion
    level every unit's rows are spread over the folds and each held-out row is scored given
    the training rows of its unit (Bürkner, Gabry and Vehtari 2021). Each fold is one
    posterior sample of the same compiled model on the training rows.

    Returns
    -------
    LOOResult
        ``p_loo`` is ``lpd - elpd`` with ``lpd`` from the full posterior (Vehtari,
        Gelman and Gabry 2017, section 4.3).
    """
    check_level(level)
    if not isinstance(K, (int, np.integer)) or K < 2:
        raise SpecificationError(f"K={K!r} must be an integer of at least 2")
    fd = from_posterior(post)
    _refuse_latent(fd, "K-fold cross-validation")
    reason = undefined_reason(fd.unit_effects, level, fd.T)
    if reason:
        raise EstimationError(reason)
    fold = _folds(fd, level, int(K), seed)
    labels = fd.point_index(level)
    point_fold = (np.array([fold[fd.codes == i][0] for i in range(fd.n_units)])
                  if level == "unit" else fold)
    elpd_i = np.full(len(labels), np.nan)
    problems = []
    refit_kwargs = _refit_defaults(int(K), refit_kwargs)
    for k in range(int(K)):
        test = fold == k
        held = labels.loc[point_fold == k]
        refit = refit_draws(
            fd, ~test,
            what=f"fold {k + 1} of {K} ({_describe_points(held, level, 4, fd.names)})",
            **refit_kwargs)
        (b, sigma, tau), msgs = refit.flat(), refit.messages
        elpd_i[point_fold == k] = _lpd(holdout_loglik(fd.M, fd.y, fd.codes, test, b, sigma,
                                                      tau, level, rho=refit.flat_rho(),
                                                      time=fd.ar1_time))
        problems += [f"fold {k + 1} of {K}: {m}" for m in msgs]
    for p in problems:
        warnings.warn(p, SamplingWarning, stacklevel=2)
    ok = np.isfinite(elpd_i)
    notes = [f"grouped K-fold with K={K} (seed {seed}); folds of "
             + ("whole units" if level == "unit" else "rows spread within units")]
    if not ok.all():
        notes.append(f"{int((~ok).sum())} row(s) left out: their unit had no training rows "
                     "in their fold, which fixed effects cannot predict")
    lpd_i = _lpd(pointwise_loglik(fd, level))
    pw = labels.copy()
    pw["elpd"] = elpd_i
    pw["fold"] = point_fold
    pw["p_loo"] = lpd_i - elpd_i
    pw = pw.loc[ok].reset_index(drop=True)
    elpd, se, p = _summary(pw["elpd"].to_numpy(), lpd_i[ok])
    return LOOResult(level=level, method=f"grouped K-fold (K={K})", elpd=elpd, se=se,
                     p_loo=p, pointwise=pw, notes=notes, n_draws=None, family=fd.family)


# ---------------------------------------------------------------------------- sub-sampling
def loo_subsample(post, level="occasion", observations=400, *, seed=0, reff=None,
                  design=None):
    """PSIS-LOO on a sub-sample of points with the difference estimator (Magnusson et al.
    2019), for panels too large for the full ``draws x points`` matrix.

    Every point gets the cheap point-estimate approximation; the full per-draw terms and
    PSIS are computed only for a simple random sample (without replacement) of
    ``observations`` points, so memory is ``draws x`` (rows of the sampled units). The
    totals and both standard errors use the difference and SRS estimators (arviz-stats').
    One implementation for every source of the terms (:mod:`bayespanel.analysis.loo.subsample`):
    the rows when they are at hand; on a design without rows (a partitioned source,
    ``Design.has_rows`` false) the per-unit statistics at the unit level and one more pass
    over the source at the occasion level, with the same seeded sample and the same
    numbers.

    Parameters
    ----------
    post : Posterior or FitDraws
        Of a Gaussian model (latent-effect models are refused).
    level : {"unit", "occasion"}
    observations : int
        Points in the sample (2 up to the number of defined points).
    seed : int
        Seed of the sample.
    reff : float, optional
        Relative efficiency for PSIS (default from the posterior's ESS, as arviz does).
    design : Design, optional
        The design to score the draws on (default the posterior's own).

    Returns
    -------
    LOOResult
        ``se`` includes the sub-sampling error; ``subsampling_se`` is that part alone.
        Unsampled points have ``nan`` ELPD in ``pointwise`` and ``approx`` holds the
        approximation for every point (at the occasion level without rows, ``pointwise``
        lists the sampled rows only).
    """
    from arviz_stats.base import array_stats

    from .subsample import check_observations, points_for

    check_level(level)
    fd, make = points_for(post, level, design)
    _refuse_latent(fd, "sub-sampled LOO (subsample=)")
    points = make()
    N = points.N
    check_observations(observations, N)
    rng = np.random.default_rng(seed)
    idx = points.positions(rng.choice(N, size=int(observations), replace=False))
    ll, approx_s = points.score(idx)
    res = psis_arrays(ll, level, fd.posterior, reff)
    elpd_s = np.asarray(res.elpd_i.values, dtype=float)
    k_s = np.asarray(res.pareto_k.values, dtype=float)
    est, sub_se, se = points.estimate(elpd_s, approx_s)
    p_loo, _, _ = array_stats.srs_estimator(_lpd(ll) - elpd_s, N)
    pw, sampled = points.pointwise(idx, approx_s, elpd_s, k_s)
    good_k = float(res.good_k)
    note = (f"sub-sampled: PSIS on {len(idx)} of {N} {points.noun} (seed {seed}), "
            "difference estimator with the point-estimate approximation (Magnusson et al. "
            "2019)")
    notes = [note + (f"; {points.where}" if points.where else "")]
    high = k_s > good_k
    if high.any():
        who = _describe_points(sampled[high], level, names=fd.names)
        warnings.warn(f"Pareto k above {good_k:.2f} for {int(high.sum())} sampled points at "
                      f"the {level} level ({who})", SamplingWarning, stacklevel=2)
        notes.append(f"{int(high.sum())} sampled point(s) with Pareto k > {good_k:.2f}: {who}")
    if N < points.n_points:
        notes.append(f"{points.n_points - N} undefined point(s) left out")
    out = LOOResult(level=level, method=f"PSIS-LOO, sub-sampled ({len(idx)} of {N})",
                    elpd=est, se=se, p_loo=p_loo, pointwise=pw, good_k=good_k, notes=notes,
                    n_draws=fd.n_chains * fd.n_draws, elpd_data=res, subsampling_se=sub_se,
                    family=fd.family, n_points=N)
    out.subsample_indices = idx
    return out
