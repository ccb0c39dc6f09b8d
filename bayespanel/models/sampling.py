"""Running NUTS on a built model: PyMC's sampler or nutpie, chosen by model size.

Both run the No-U-Turn sampler (Hoffman and Gelman 2014). The marginal models have few
parameters, so they adapt a dense mass matrix (PyMC's ``jitter+adapt_full``, nutpie's
low-rank adaptation); latent-intercept models, with one parameter per unit, a diagonal one. Measured on this project's models (bench/bench_models.py, docs/performance.md):

* the marginal likelihood costs the same per gradient for any number of rows, and PyMC's
  own sampler with its cached C compilation fits it end to end in a few seconds, while
  nutpie first spends several seconds compiling through numba on every new model;
* a row-level (latent-intercept) likelihood grows with the rows, and there nutpie's faster
  gradient and adaptation outweigh its compile time beyond :data:`NUTPIE_ROWS` rows.

``sampler="auto"`` applies exactly that rule, so the choice depends only on the model and
the same seed always reproduces the same draws. A nutpie compilation is kept with the
model and reused (with the current ``pm.Data`` values) on every later call, which makes
repeated fits after :meth:`~bayespanel.models.GaussianModel.set_suffstats` cheap.

References
----------
.. [1] Hoffman, M. D. and Gelman, A. (2014). The No-U-Turn sampler: adaptively setting path
   lengths in Hamiltonian Monte Carlo. Journal of Machine Learning Research 15, 1593-1623.
"""

from __future__ import annotations

import importlib.util
import logging
import os
import time
import warnings

import numpy as np

from ..errors import SpecificationError, choices_error

__all__ = ["SAMPLERS", "NUTPIE_ROWS", "MIN_DRAWS", "choose_sampler", "run", "nutpie_available",
           "check_int"]

SAMPLERS = ("auto", "pymc", "nutpie")
#: latent-intercept models with at least this many rows go to nutpie under "auto"
NUTPIE_ROWS = 2_000
#: fewest draws per chain accepted: split R-hat needs two halves of at least two draws
MIN_DRAWS = 4
#: marginal models with at most this many coefficients adapt a dense mass matrix
DENSE_MAX = 60


def nutpie_available() -> bool:
    return importlib.util.find_spec("nutpie") is not None


def check_int(name, value, minimum):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) \
            or value < minimum:
        raise SpecificationError(f"{name}={value!r} must be an integer of at least {minimum}")
    return int(value)


def choose_sampler(model) -> str:
    """The sampler ``"auto"`` uses for ``model`` (see the module docstring)."""
    if (model.likelihood == "latent" and model.rows is not None
            and len(model.rows[1]) >= NUTPIE_ROWS and nutpie_available()):
        return "nutpie"
    return "pymc"


def _dense(model) -> bool:
    """Adapt a dense mass matrix when the parameters are few (the marginal models): the
    coefficients of related covariates (``x`` and ``x^2``, within and between parts) are
    correlated a posteriori, and a dense metric removes that at negligible cost."""
    return model.likelihood == "marginal" and len(model.labels) <= DENSE_MAX


def _seed(seed):
    if seed is None:
        return int(np.random.SeedSequence().generate_state(1)[0] % (2 ** 31))
    if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise SpecificationError(f"seed={seed!r} must be a non-negative integer or None")
    return int(seed)


def run(model, *, draws, tune, chains, seed, sampler, progress, cores, target_accept):
    """Sample ``model.pymc_model``; returns ``(DataTree, info)``.

    ``info`` records the sampler, seed, sizes and the compile and sampling times.
    """
    draws = check_int("draws", draws, 1)
    if draws < MIN_DRAWS:
        raise SpecificationError(
            f"draws={draws} is too few: split R-hat and ESS need at least {MIN_DRAWS} draws "
            "per chain (and results need hundreds)")
    tune = check_int("tune", tune, 0)
    chains = check_int("chains", chains, 1)
    if sampler not in SAMPLERS:
        raise choices_error("sampler", sampler, SAMPLERS)
    if not (isinstance(target_accept, float) and 0.5 <= target_accept < 1.0):
        raise SpecificationError(f"target_accept={target_accept!r} must be a float in [0.5, 1)")
    if cores is None:
        cores = min(chains, os.cpu_count() or 1)
    cores = check_int("cores", cores, 1)
    seed = _seed(seed)
    chosen = choose_sampler(model) if sampler == "auto" else sampler
    if chosen == "nutpie" and not nutpie_available():
        raise SpecificationError(
            "sampler='nutpie' needs the nutpie package (pip install 'bayespanel[fast]'); "
            "or choose sampler='pymc'")
    info = {"sampler": chosen, "requested_sampler": sampler, "seed": seed, "draws": draws,
            "tune": tune, "chains": chains, "target_accept": target_accept}
    t0 = time.perf_counter()
    if chosen == "pymc":
        dt = _run_pymc(model, draws, tune, chains, seed, progress, cores, target_accept, info)
    else:
        dt = _run_nutpie(model, draws, tune, chains, seed, progress, cores, target_accept, info)
    info["total_seconds"] = time.perf_counter() - t0
    _check_complete(dt, chains, draws)
    for group in [g for g in dt.children if g.startswith("warmup")]:
        del dt[group]
    return dt, info


def _check_complete(dt, chains, draws):
    """Refuse a truncated trace: PyMC and nutpie catch KeyboardInterrupt and return the
    draws made so far, which must never pass for the run that was asked for."""
    sizes = dict(dt["posterior"].sizes) if "posterior" in dt.children else {}
    got = (int(sizes.get("chain", 0)), int(sizes.get("draw", 0)))
    if got != (chains, draws):
        raise KeyboardInterrupt(
            f"sampling was interrupted after {got[0]} chain(s) x {got[1]} draws of the "
            f"{chains} x {draws} asked for; the partial draws were discarded")


def _run_pymc(model, draws, tune, chains, seed, progress, cores, target_accept, info):
    import pymc as pm

    logger = logging.getLogger("pymc")
    level = logger.level
    if not progress:
        logger.setLevel(logging.WARNING)
    try:
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            # our own diagnostics report R-hat, ESS and divergences (Posterior.diagnostics)
            warnings.filterwarnings("ignore", message=".*overflow encountered.*")
            warnings.filterwarnings("ignore", message="QuadPotentialFullAdapt is an experimental")
            dt = pm.sample(draws=draws, tune=tune, chains=chains, cores=cores,
                           random_seed=seed, progressbar=progress, nuts_sampler="pymc",
                           model=model.pymc_model, compute_convergence_checks=False,
                           target_accept=target_accept, quiet=not progress,
                           init="jitter+adapt_full" if _dense(model) else "jitter+adapt_diag")
        elapsed = time.perf_counter() - t0
        # PyMC records the time spent in the chains; the rest is compilation and set-up
        info["sampling_seconds"] = float(dt["posterior"].attrs.get("sampling_time", elapsed))
        info["compile_seconds"] = elapsed - info["sampling_seconds"]
    finally:
        logger.setLevel(level)
    return dt


def _run_nutpie(model, draws, tune, chains, seed, progress, cores, target_accept, info):
    import nutpie

    t0 = time.perf_counter()
    if model._nutpie is None:
        model._nutpie = nutpie.compile_pymc_model(model.pymc_model)
        info["compile_seconds"] = time.perf_counter() - t0
    else:
        info["compile_seconds"] = 0.0
    known = {var.name for var in model._nutpie.shared_var_keys}
    values = {v.name: v.get_value() for v in model.pymc_model.data_vars if v.name in known}
    compiled = model._nutpie.with_data(**values)
    t1 = time.perf_counter()
    dt = nutpie.sample(compiled, draws=draws, tune=max(tune, 1), chains=chains, cores=cores,
                       seed=seed, progress_bar=progress, target_accept=target_accept,
                       adaptation="low_rank" if _dense(model) else "diag")
    info["sampling_seconds"] = time.perf_counter() - t1
    ss = dt["sample_stats"].to_dataset()
    drop = [k for k, v in ss.data_vars.items() if v.dtype == object]
    if drop:
        dt["sample_stats"] = dt["sample_stats"].to_dataset().drop_vars(drop)
    return dt
