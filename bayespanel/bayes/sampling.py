"""Running NUTS on a built model: bayespanel's own sampler, PyMC's or nutpie.

All three run the No-U-Turn sampler (Hoffman and Gelman 2014). The marginal models have
few parameters, so they adapt a dense mass matrix (bayespanel's and PyMC's
``jitter+adapt_full``, nutpie's low-rank adaptation); latent-intercept models, with one
parameter per unit, a diagonal one. Measured on this project's models
(bench/bench_models.py, bench/bench_speed.py, docs/bayesian-models.md):

* the marginal likelihood costs the same per gradient for any number of rows (a few
  microseconds), so the sampler's own work around each gradient decides the time.
  PyMC's sampler spends about a hundred microseconds of Python per leapfrog step;
  bayespanel's (:mod:`bayespanel.bayes.nuts`, run by :mod:`bayespanel.bayes.ownsampler`)
  about fifteen, calling the same compiled log density, which is cached on disk (by
  PyTensor and by :func:`bayespanel.bayes.logdensity.compiled_logp`). nutpie first spends
  several seconds compiling through numba in every new process;
* a row-level (latent-intercept) likelihood grows with the rows, and there nutpie's faster
  gradient and adaptation outweigh its compile time beyond :data:`NUTPIE_ROWS` rows.

``sampler="auto"`` applies exactly that rule (bayespanel's sampler for the marginal
models started at the mode, nutpie for large latent-intercept models, PyMC's otherwise),
so the choice depends only on the model and the start, and the same seed always
reproduces the same draws. A nutpie compilation is kept with the
model and reused (with the current ``pm.Data`` values) on every later call, which makes
repeated fits after :meth:`~bayespanel.bayes.GaussianModel.set_suffstats` cheap; so is
the compiled log density and gradient that PyMC's sampler uses.

Where the chains start (``start``). A marginal model has a few parameters and a log
density that costs the same for any number of rows, but the more rows, the narrower the
posterior on the sampler's (unconstrained, standardised) scale. Started from the prior's
centre with a unit mass matrix, warm-up first has to travel to the posterior and learn
its scale, and that takes longer the more rows there are. With ``start="mode"`` (the
default for marginal models) the sampler starts where the posterior is: the posterior
mode is found by Newton's method on the model's own log density (exact gradient, Hessian
by central differences of the gradient), the Laplace approximation there (the inverse
of the negative Hessian; Tierney and Kadane 1986) is the initial mass
matrix (PyMC: the starting covariance of its adapted dense or diagonal metric, counted
as :data:`START_WEIGHT` draws; nutpie adapts its own metric, which cannot be seeded), and
each chain starts at the mode plus a draw from the Laplace normal scaled by
:data:`START_SPREAD`, so that the chains start apart and R-hat keeps its meaning
(overdispersed starting points, Gelman and Rubin 1992). Adaptation then runs as usual.
``start="jitter"`` is the previous start (PyMC's ``jitter+adapt_full`` or
``jitter+adapt_diag``, nutpie's own), kept for comparison; latent-intercept models, with
one parameter per unit, always use it. bench/bench_models.py measures both.

References
----------
.. [1] Hoffman, M. D. and Gelman, A. (2014). The No-U-Turn sampler: adaptively setting path
   lengths in Hamiltonian Monte Carlo. Journal of Machine Learning Research 15, 1593-1623.
.. [2] Tierney, L. and Kadane, J. B. (1986). Accurate approximations for posterior moments
   and marginal densities. Journal of the American Statistical Association 81, 82-86.
   doi:10.1080/01621459.1986.10478240
.. [3] Gelman, A. and Rubin, D. B. (1992). Inference from iterative simulation using
   multiple sequences. Statistical Science 7, 457-472. doi:10.1214/ss/1177011136
"""

from __future__ import annotations

import dataclasses
import functools
import importlib.util
import logging
import os
import time
import warnings

import numpy as np

from ..core.errors import SpecificationError, choices_error
from .laplace import START_SPREAD, START_WEIGHT, Laplace, laplace  # noqa: F401
from .laplace import start_at_mode
from .laplace import warm_start as _warm_start
from .logdensity import (_cache_load, _cache_path, _cache_save, _push_data,  # noqa: F401
                         compiled_logp as _pymc_logp, forget_stale, nutpie_compiled)

__all__ = ["SAMPLERS", "STARTS", "NUTPIE_ROWS", "MIN_DRAWS", "choose_sampler", "run",
           "nutpie_available", "check_int", "laplace", "forget_stale", "nutpie_compiled"]

SAMPLERS = ("auto", "bayespanel", "pymc", "nutpie")
#: latent-intercept models with at least this many rows go to nutpie under "auto"
NUTPIE_ROWS = 2_000
#: fewest draws per chain accepted: split R-hat needs two halves of at least two draws
MIN_DRAWS = 4
#: marginal models with at most this many coefficients adapt a dense mass matrix
DENSE_MAX = 60
STARTS = ("mode", "jitter")


def nutpie_available() -> bool:
    return importlib.util.find_spec("nutpie") is not None


def check_int(name, value, minimum):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) \
            or value < minimum:
        raise SpecificationError(f"{name}={value!r} must be an integer of at least {minimum}")
    return int(value)


def choose_sampler(model, start=None) -> str:
    """The sampler ``"auto"`` uses for ``model`` (see the module docstring): this
    package's own NUTS (:mod:`bayespanel.bayes.nuts`) for the marginal models started
    at the mode, nutpie for large latent-intercept models, else PyMC's."""
    if (model.likelihood == "latent" and model.rows is not None
            and len(model.rows[1]) >= NUTPIE_ROWS and nutpie_available()):
        return "nutpie"
    if start != "jitter" and _own_possible(model):
        return "bayespanel"
    return "pymc"


def _own_possible(model) -> bool:
    """This package's sampler needs a dense metric (few parameters) and a gradient in
    every free variable."""
    return _dense(model) and not model.pymc_model.discrete_value_vars


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


def default_cores(model, sampler, chains) -> int:
    """Processes the chains run in when ``cores`` is not given.

    PyMC's sampler with a marginal model: 1, the chains one after another in this
    process. Their log density reads a few small matrices (microseconds per gradient at
    any number of rows), so starting worker processes and sending every draw between
    processes costs more than the chains themselves: on the demo's random-intercept
    model, 4 chains x 2,000 iterations took 2.3 times as long in 2 worker processes as in
    this one (bench/bench_demo.py measures the whole demo). Otherwise ``min(chains,
    CPUs)``: bayespanel's sampler forks its workers, which inherit the compiled log
    density and send back only their finished draws, so two cores halve its time even
    for the smallest models. Both samplers seed each chain the same way in every mode,
    so the draws for a seed do not depend on ``cores`` (tests/test_warm_start.py checks
    it).
    """
    if sampler == "pymc" and model.likelihood == "marginal":
        return 1
    return min(chains, os.cpu_count() or 1)


def run(model, *, draws, tune, chains, seed, sampler, progress, cores, target_accept,
        start=None):
    """Sample ``model.pymc_model``; returns ``(DataTree, info)``.

    ``start``: ``"mode"``, ``"jitter"`` or None (``"mode"`` for marginal models, see the
    module docstring). ``info`` records the sampler, seed, sizes, the start and the
    compile and sampling times.
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
    if start is not None and start not in STARTS:
        raise choices_error("start", start, STARTS)
    if not (isinstance(target_accept, float) and 0.5 <= target_accept < 1.0):
        raise SpecificationError(f"target_accept={target_accept!r} must be a float in [0.5, 1)")
    seed = _seed(seed)
    chosen = choose_sampler(model, start) if sampler == "auto" else sampler
    if chosen == "bayespanel" and not _own_possible(model):
        raise SpecificationError(
            "sampler='bayespanel' runs the marginal models (a few continuous parameters); "
            "choose sampler='pymc' or 'auto' for this model")
    if chosen == "bayespanel" and start == "jitter":
        raise SpecificationError(
            "sampler='bayespanel' starts its chains around the posterior mode; start='jitter' "
            "needs sampler='pymc' or 'nutpie'")
    if cores is None:
        cores = default_cores(model, chosen, chains)
    cores = check_int("cores", cores, 1)
    if chosen == "nutpie" and not nutpie_available():
        raise SpecificationError(
            "sampler='nutpie' needs the nutpie package (pip install 'bayespanel[fast]'); "
            "or choose sampler='pymc'")
    info = {"sampler": chosen, "requested_sampler": sampler, "seed": seed, "draws": draws,
            "tune": tune, "chains": chains, "target_accept": target_accept, "cores": cores}
    # a start at the mode needs a gradient in every free variable: not with discrete ones
    # (which a user may add to the graph; PyMC's sampler then gives them their own step)
    warm = start != "jitter" and _dense(model) and not model.pymc_model.discrete_value_vars
    info["start"] = "mode" if warm else "jitter"
    t0 = time.perf_counter()
    if chosen == "bayespanel":
        dt = _run_own(model, draws, tune, chains, seed, progress, target_accept, info, cores)
        if dt is None:  # no posterior mode: PyMC's sampler from its own start
            info["sampler"] = "pymc"
            dt = _run_pymc(model, draws, tune, chains, seed, progress, 1, target_accept, info,
                           False)
    elif chosen == "pymc":
        dt = _run_pymc(model, draws, tune, chains, seed, progress, cores, target_accept, info,
                       warm)
    else:
        dt = _run_nutpie(model, draws, tune, chains, seed, progress, cores, target_accept, info,
                         warm)
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


def _run_own(model, draws, tune, chains, seed, progress, target_accept, info, cores=1):
    """This package's NUTS (:mod:`bayespanel.bayes.ownsampler`); None without a mode."""
    from .ownsampler import run_own

    return run_own(model, draws, tune, chains, seed, progress, target_accept, info, cores)


def _run_pymc(model, draws, tune, chains, seed, progress, cores, target_accept, info, warm):
    import pymc as pm

    logger = logging.getLogger("pymc")
    level = logger.level
    if not progress:
        logger.setLevel(logging.WARNING)
    try:
        t0 = time.perf_counter()
        kwargs = {"init": "jitter+adapt_full" if _dense(model) else "jitter+adapt_diag",
                  "target_accept": target_accept}
        kwargs["trace"] = _one_compile_trace()(model=model.pymc_model)
        if warm:  # the step (with its target_accept) and the starting points
            warm_kwargs = _pymc_warm_step(model, chains, seed, target_accept, info)
            if warm_kwargs is not None:
                kwargs = {k: warm_kwargs[k] for k in ("step", "initvals")} | {
                    "trace": kwargs["trace"]}
        with warnings.catch_warnings():
            # our own diagnostics report R-hat, ESS and divergences (Posterior.diagnostics)
            warnings.filterwarnings("ignore", message=".*overflow encountered.*")
            warnings.filterwarnings("ignore", message="QuadPotentialFullAdapt is an experimental")
            dt = pm.sample(draws=draws, tune=tune, chains=chains, cores=cores,
                           random_seed=seed, progressbar=progress, nuts_sampler="pymc",
                           model=model.pymc_model, compute_convergence_checks=False,
                           quiet=not progress, **kwargs)
        elapsed = time.perf_counter() - t0
        # PyMC records the time spent in the chains; the rest is compilation and set-up
        info["sampling_seconds"] = float(dt["posterior"].attrs.get("sampling_time", elapsed))
        info["compile_seconds"] = elapsed - info["sampling_seconds"] - info.get("start_seconds", 0.0)
    finally:
        logger.setLevel(level)
    return dt


def _one_compile_trace():
    """PyMC's in-memory trace whose copies (PyMC makes one per chain from the trace it is
    given) share the compiled function that reads a draw's values, so that function is
    compiled once per run and not once per chain; each copy has its own arrays. (PyMC's
    own copy would share the arrays too, so its trace cannot be passed as it is.)"""
    from pymc.backends.ndarray import NDArray

    class OneCompileTrace(NDArray):
        def __copy__(self):
            new = type(self).__new__(type(self))
            new.__dict__.update(self.__dict__)
            new.samples, new._stats, new.draw_idx, new.draws = {}, None, 0, None
            new.chain, new._is_base_setup, new.sampler_vars = None, False, None
            return new

    return OneCompileTrace


def _pymc_warm_step(model, chains, seed, target_accept, info):
    """``pm.sample`` arguments for a start at the mode: a NUTS step whose metric starts
    from the Laplace covariance, and one starting point per chain; None if no mode."""
    import pymc as pm
    from pymc.blocking import DictToArrayBijection
    from pymc.step_methods.hmc import quadpotential

    start = start_at_mode(model, seed, chains, info)
    if start is None:
        return None
    m, point, x0, lap, starts = model.pymc_model, start.point, start.x0, start.laplace, start.starts
    n = len(lap.mode)
    initvals = [_initvals(m, DictToArrayBijection.rmap(x0._replace(data=x), start_point=point))
                for x in starts]
    rng = np.random.default_rng([seed, 7919])
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="QuadPotentialFullAdapt is an experimental")
        if _dense(model):
            potential = _FullAdapt(n, lap.mode, lap.cov, START_WEIGHT, rng=rng)
        else:
            potential = quadpotential.QuadPotentialDiagAdapt(
                n, lap.mode, np.diag(lap.cov).copy(), START_WEIGHT, rng=rng)
    first = DictToArrayBijection.rmap(x0._replace(data=starts[0]), start_point=point)
    step = pm.NUTS(vars=m.value_vars, model=m, potential=potential, target_accept=target_accept,
                   rng=rng, initial_point=first, logp_dlogp_func=start.fn)
    return {"step": step, "initvals": initvals, "starts": starts}


@functools.cache
def _trtrs():
    from scipy.linalg import lapack

    return lapack.dtrtrs


def _full_adapt_class():
    """PyMC's dense adaptive metric with a cheaper momentum draw (built on first use, so
    that importing this module does not import PyMC)."""
    from pymc.step_methods.hmc import quadpotential

    class FullAdapt(quadpotential.QuadPotentialFullAdapt):
        """``random`` solves ``L' v = z`` by the LAPACK routine (``dtrtrs``) and arguments
        that ``scipy.linalg.solve_triangular`` passes, without its checks of finite
        values and array types at every draw: the same numbers."""

        def random(self):
            vals = self.rng.normal(size=self._n).astype(self.dtype)
            a = self._chol.T
            info = -1
            if vals.dtype == np.float64 and a.dtype == np.float64:
                trtrs = _trtrs()
                if a.flags.f_contiguous:
                    x, info = trtrs(a, vals, overwrite_b=True, lower=False, trans=0,
                                    unitdiag=False)
                else:
                    x, info = trtrs(a.T, vals, overwrite_b=True, lower=True, trans=1,
                                    unitdiag=False)
            if info != 0:  # another dtype, or a singular factor: scipy's checked path
                from scipy import linalg

                return linalg.solve_triangular(a, vals, overwrite_b=True)
            return x

    return FullAdapt


def _FullAdapt(*args, **kwargs):
    global _FULL_ADAPT
    if _FULL_ADAPT is None:
        _FULL_ADAPT = _full_adapt_class()
    return _FULL_ADAPT(*args, **kwargs)


_FULL_ADAPT = None


def _initvals(m, values):
    """PyMC initial values keyed by the random variables, from unconstrained values keyed
    by the value variables: each value is taken back through its variable's transform
    (symbolically, as PyMC does for transformed names), so no name is parsed."""
    out = {}
    for value_var in m.value_vars:
        rv = m.values_to_rvs[value_var]
        x = np.asarray(values[value_var.name])
        transform = m.rvs_to_transforms.get(rv)
        out[rv] = x if transform is None else transform.backward(x, *rv.owner.inputs)
    return out


def _run_nutpie(model, draws, tune, chains, seed, progress, cores, target_accept, info, warm):
    import nutpie

    t0 = time.perf_counter()
    forget_stale(model)
    fresh = getattr(model, "_nutpie", None) is None
    nutpie_compiled(model)
    info["compile_seconds"] = time.perf_counter() - t0 if fresh else 0.0
    known = {var.name for var in model._nutpie.shared_var_keys}
    values = {v.name: v.get_value() for v in model.pymc_model.data_vars if v.name in known}
    compiled = model._nutpie.with_data(**values)
    if warm:
        compiled = _nutpie_warm(compiled, seed, info)
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


def _nutpie_warm(compiled, seed, info):
    """The compiled nutpie model with its chains started from the Laplace approximation:
    nutpie asks ``initial_point_func(seed)`` for each chain's (flat, unconstrained) start.
    The log density is nutpie's own compiled one (its C entry point, with the data of
    ``compiled``), so nothing is compiled again."""
    import ctypes

    n = compiled.n_dim
    cfunc = compiled.compiled_logp_func.ctypes
    data = ctypes.c_void_p(compiled.user_data.ctypes.data)
    as_ptr = ctypes.POINTER(ctypes.c_double)

    def logp_grad(x):
        x = np.ascontiguousarray(x, dtype=float)
        grad, logp = np.empty(n), np.empty(())
        code = cfunc(n, x.ctypes.data_as(as_ptr), grad.ctypes.data_as(as_ptr),
                     logp.ctypes.data_as(as_ptr), data)
        return (float(logp) if code == 0 else -np.inf), grad

    x0 = np.asarray(compiled.initial_point_func(seed), dtype=float)
    lap = _warm_start(logp_grad, x0, info)
    if lap is None:
        return compiled

    def initial_point(chain_seed):
        rng = np.random.default_rng([seed, 7919, int(chain_seed) % (2 ** 63)])
        return lap.starts(rng, logp_grad)

    return dataclasses.replace(compiled, initial_point_func=initial_point)
