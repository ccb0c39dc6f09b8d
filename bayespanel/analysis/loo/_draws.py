"""What LOO needs from a fit: the rows, the draws (:class:`~bayespanel.bayes.draws.FitDraws`)
and a way to refit (private)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...bayes.draws import FitDraws
from ...core.errors import SpecificationError, choices_error
from ...core.mathcore import unit_sd_draws

LEVELS = ("unit", "occasion")


def check_level(level):
    if level not in LEVELS:
        raise choices_error("level", level, LEVELS)
    return level


def _values(ds, name):
    return np.asarray(ds[name].values, dtype=float)


def from_draws(*, kind, unit_effects, labels, M, y, codes, coef, sigma, tau=None, units=None,
               time=None, rows=None, posterior=None, model=None, design=None,
               sample_kwargs=None, unit_name=None, time_name=None, family="gaussian",
               latent=None, rho=None, ar1_time=None, messages=None) -> FitDraws:
    """Assemble :class:`FitDraws` from arrays (``coef`` may be ``(S, k)`` or ``(C, D, k)``)."""
    coef = np.asarray(coef, dtype=float)
    if coef.ndim == 2:
        coef = coef[None]
    C, D, k = coef.shape
    sigma = np.asarray(sigma, dtype=float).reshape(C, D)
    if unit_effects == "random" and tau is None:
        raise SpecificationError("a random-intercept model needs draws of sigma_unit")
    tau = unit_sd_draws(unit_effects, tau, (C, D))
    codes = np.asarray(codes, dtype=np.int64)
    if np.any(np.diff(codes) < 0):
        raise SpecificationError("rows must be sorted by unit for the pointwise terms")
    N = int(codes.max()) + 1
    M = np.asarray(M, dtype=float)
    if M.shape[1] != k:
        raise SpecificationError(f"M has {M.shape[1]} columns for {k} coefficients")
    if rho is not None:
        rho = np.asarray(rho, dtype=float).reshape(C, D)
        if ar1_time is None or len(ar1_time) != len(codes):
            raise SpecificationError("AR(1) draws (rho) need the occasion of every row "
                                     "(ar1_time)")
        ar1_time = np.asarray(ar1_time, dtype=float)
    return FitDraws(
        kind=kind, unit_effects=unit_effects, labels=list(labels), M=M,
        y=np.asarray(y, dtype=float), codes=codes,
        units=pd.Index(units if units is not None else np.arange(N)),
        time=np.asarray(time) if time is not None else None,
        rows=pd.Index(rows if rows is not None else np.arange(len(codes))),
        coef=coef, sigma=sigma, tau=tau, posterior=posterior, model=model, design=design,
        sample_kwargs=dict(sample_kwargs or {}), unit_name=unit_name, time_name=time_name,
        family=family, latent=latent, rho=rho, ar1_time=ar1_time,
        messages=list(messages or []))


def from_posterior(post) -> FitDraws:
    """Read a :class:`~bayespanel.bayes.posterior.Posterior` into :class:`FitDraws`."""
    if isinstance(post, FitDraws):
        return post
    idata = getattr(post, "idata", None)
    spec = getattr(post, "spec", None)
    if idata is None or spec is None or "posterior" not in idata.children:
        raise SpecificationError(
            f"expected a bayespanel Posterior with posterior draws, got {type(post).__name__}")
    serial = {}
    if getattr(spec, "errors", "iid") == "ar1":
        ar1_time = getattr(post, "ar1_time", None)
        if post.rows is not None and ar1_time is None:
            raise SpecificationError(
                "LOO of an errors='ar1' model needs the occasion of every estimation row; "
                "this posterior does not carry them (build the model from a Panel)")
        serial = {"rho": idata["posterior"]["rho"].values, "ar1_time": ar1_time}
    if post.rows is None and getattr(post, "design", None) is not None:
        raise SpecificationError(
            "full LOO needs every pointwise term, and the model's design holds no rows (a "
            "partitioned source such as a Dask panel); use the sub-sampling estimator: "
            "post.loo(level, subsample=400) or bp.loo.loo_subsample")
    if post.rows is None:
        raise SpecificationError(
            "LOO needs the estimation rows; this posterior was built from sufficient "
            "statistics only (build the model from a Panel, or pass rows= to from_suffstats)")
    ds = idata["posterior"].to_dataset()
    M, y, codes = post.rows
    sampling = dict(getattr(post, "sampling", {}) or {})
    sample_kwargs = {k: sampling[k] for k in ("draws", "tune", "chains", "seed",
                                              "target_accept") if k in sampling}
    tau = _values(ds, "sigma_unit") if "sigma_unit" in ds else None
    design = getattr(post, "design", None)
    names = dict(spec.design) if spec.design else {}
    time = getattr(post, "time", None)
    if time is None:
        time = getattr(design, "time", None)
    rows = getattr(post, "row_labels", None)
    if rows is None and design is not None:
        rows = design.rows
    latent = post if getattr(post, "lspec", None) is not None else None
    coef = _values(ds, "coef")
    sigma = _values(ds, "sigma_obs") if "sigma_obs" in ds else np.full(coef.shape[:2], np.nan)
    return from_draws(
        kind=spec.kind, unit_effects=spec.unit_effects, labels=list(spec.labels), M=M, y=y,
        codes=codes, coef=coef, sigma=sigma, tau=tau, units=post.units, time=time, rows=rows,
        posterior=ds, model=None if latent is not None else _refit_model(post),
        design=design, sample_kwargs=sample_kwargs, unit_name=names.get("unit"),
        time_name=names.get("time"),
        family=latent.family if latent is not None else "gaussian", latent=latent, **serial)


def _refit_model(post):
    """The model exact refits and K-fold sample for ``post``: the model the draws came
    from (with whatever the user added to its ``pymc_model``) while its graph is still
    the one sampled; otherwise the model rebuilt from the specification, which is the
    same model only when nothing had been added (else refits are refused, naming why)."""
    from ...bayes.graph import graph_identity, same_graph

    model, edits = getattr(post, "model", None), list(getattr(post, "edits", None) or [])
    if model is not None and same_graph(getattr(post, "graph", None),
                                        graph_identity(model.pymc_model)):
        observed = {v.name for v in model.pymc_model.observed_RVs}
        own = [name for name in edits if name in observed]
        if own:  # a likelihood over data the refit does not swap: not a leave-out fit
            return _Rebuild(post, refuse=(
                "exact refits leave points out of the model's own data only; what was "
                f"added to its pymc_model observes data of its own ({', '.join(own)}), "
                "which the refits would keep whole, so they would not be leave-out fits"))
        return model
    if not edits:
        return _Rebuild(post)
    why = ("this posterior was loaded from a file, which keeps the draws but not the graph"
           if model is None else "the model's pymc_model has been edited again since")
    return _Rebuild(post, refuse=(
        "exact refits must sample the model these draws came from, including what was "
        f"added to its pymc_model ({', '.join(edits)}); {why}. Sample the model as it "
        "is now and compute LOO on that posterior"))


class _Rebuild:
    """Placeholder for the model of a posterior: rebuilt (once) from its specification
    when a refit is needed. The priors in the specification are fully stated on the data
    scale, so the rebuilt model is the same model, unless the user had added to the
    graph: then ``refuse`` says why no refit is possible."""

    def __init__(self, post, refuse=None):
        self.post = post
        self.refuse = refuse

    def build(self):
        from ... import kinds

        if self.refuse:
            raise SpecificationError(self.refuse)
        post, spec = self.post, self.post.spec
        cls = kinds.model(spec.model).builder_class()
        serial = {}
        if getattr(spec, "errors", "iid") == "ar1":
            serial = {"errors": "ar1", "time": post.ar1_time}
        return cls.from_suffstats(
            post.stats, list(spec.labels), outcome=spec.outcome, units=post.units,
            priors=spec.prior_dict, likelihood=spec.likelihood, rows=post.rows,
            design_spec=dict(spec.design) if spec.design else None, **serial)


def model_of(fd):
    """The (compiled once) model behind ``fd``, rebuilding it from the spec if needed."""
    if isinstance(fd.model, _Rebuild):
        fd.model = fd.model.build()
    if fd.model is None or not hasattr(fd.model, "set_suffstats"):
        raise SpecificationError(
            "exact refits need the model the posterior was sampled from; this fit carries "
            "none")
    return fd.model
