"""Running this package's NUTS (:mod:`bayespanel.bayes.nuts`) on a built PyMC model.

The model's log density and gradient are PyMC's own (the compiled function that PyMC's
sampler uses, cached on disk by :func:`bayespanel.bayes.logdensity.compiled_logp`); with
PyTensor's numba backend it is called as the compiled function itself, without the
Python layers around it. The chains start around the posterior mode with the Laplace
covariance as the starting metric (:func:`bayespanel.bayes.laplace.laplace`). The
draws, on the sampler's unconstrained scale, are then taken to the model's variables
(the free variables on their own scale and every deterministic) by one vectorised
function of all the draws at once, and returned as a DataTree with the groups and names
that PyMC's sampler writes (``posterior``, ``sample_stats``).
"""

from __future__ import annotations

import multiprocessing
import sys
import time
import warnings

import numpy as np

from . import nuts

__all__ = ["run_own"]

#: the seed stream of the sampler's own random numbers (momenta, directions, choices);
#: the starting points have theirs (``laplace.chain_rngs``)
_STREAM = 104729


def _draws_function(model, point):
    """A function from an ``(n_draws, n_unconstrained)`` array to the model's posterior
    variables (free variables on their own scale, then the deterministics), each with
    the draws first; and their names. Kept with the model (per graph)."""
    import pytensor
    import pytensor.tensor as pt
    from pymc.pytensorf import join_nonshared_inputs
    from pytensor.graph.replace import vectorize_graph

    kept = getattr(model, "_own_draws_fn", None)  # dropped by logdensity.forget_stale
    if kept is not None and kept[0] is model.pymc_model:
        return kept[1], kept[2]
    m = model.pymc_model
    transformed = {m.rvs_to_values[rv].name for rv in m.free_RVs
                   if m.rvs_to_transforms[rv] is not None}
    outs = [v for v in m.unobserved_value_vars if v.name not in transformed]
    names = [v.name for v in outs]
    new, joined = join_nonshared_inputs(point, outs, m.value_vars)
    batch = pt.matrix("draws", dtype=joined.dtype)
    # Python-mode operations over all the draws at once: compiled in milliseconds, and
    # each runs once on arrays of all the draws (numba's compile of the vectorised graph
    # costs seconds for a function called once)
    fn = pytensor.function([batch], vectorize_graph(new, {joined: batch}),
                           on_unused_input="ignore", mode="FAST_COMPILE")
    model._own_draws_fn = (m, fn, names)
    return fn, names


def _datatree(model, values, names, stats, chains, draws, attrs):
    import arviz_base

    m = model.pymc_model
    posterior = {}
    for name, v in zip(names, values):
        v = np.asarray(v)
        posterior[name] = v.reshape((chains, draws) + v.shape[1:])
    dims = {k: list(v) for k, v in m.named_vars_to_dims.items() if k in posterior}
    used = {d for v in dims.values() for d in v}
    coords = {k: list(v) for k, v in m.coords.items() if k in used}
    sample_stats = {k: np.stack([s[k] for s in stats]) for k in nuts.STATS}
    return arviz_base.from_dict({"posterior": posterior, "sample_stats": sample_stats},
                                coords=coords, dims=dims,
                                attrs={"posterior": attrs, "sample_stats": attrs},
                                check_conventions=False)


#: chains may run in forked worker processes (not on Windows, nor where fork is missing)
_FORK = "fork" in multiprocessing.get_all_start_methods()
_JOB = None


def _cpu():
    """CPU seconds of this process and its finished workers (this process's alone where
    the system has no ``resource`` module)."""
    try:
        import resource
    except ImportError:  # Windows: no workers either (no fork)
        return time.process_time()
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(
        resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def _call(i):
    """In a worker: run job ``i``; any exception, an interrupt included, is sent back to be
    raised in the parent (an interrupted worker would otherwise leave the pool broken)."""
    try:
        return True, _JOB(i)
    except BaseException as exc:  # noqa: BLE001
        return False, exc


def _in_processes(job, items, workers):
    """``[job(i) for i in items]`` in ``workers`` forked processes; ``job`` (a closure) is
    inherited by the fork, not pickled."""
    from concurrent.futures import ProcessPoolExecutor

    global _JOB
    _JOB = job
    try:
        with warnings.catch_warnings():
            # Python warns that forking a process with threads may deadlock in the child;
            # the workers only run numpy and the compiled log density (no locks taken)
            warnings.filterwarnings("ignore", message=".*fork.*", category=DeprecationWarning)
            with ProcessPoolExecutor(workers, mp_context=multiprocessing.get_context("fork")) as ex:
                results = list(ex.map(_call, items))
    finally:
        _JOB = None
    for ok, value in results:
        if not ok:
            raise value
    return [value for _, value in results]


def run_own(model, draws, tune, chains, seed, progress, target_accept, info, cores=1):
    """Sample ``model`` with this package's NUTS; the DataTree, or None when no posterior
    mode is found (the caller then uses PyMC's sampler).

    The chains run in ``cores`` processes forked from this one (where the operating
    system forks; else one after another here): each worker inherits the compiled log
    density and sends back only its finished draws. Each chain has its own seeded random
    numbers, so the draws do not depend on ``cores``."""
    from .laplace import START_WEIGHT, start_at_mode

    t0 = time.perf_counter()
    start = start_at_mode(model, seed, chains, info)
    if start is None:
        return None
    logp_grad, cov0 = start.logp_grad, start.laplace.cov
    nuts.kernels()  # loaded here, before any worker process starts

    def one_chain(c):
        say = None
        if progress:
            def say(it):
                print(f"\r  chain {c + 1}/{chains}: {it}/{tune + draws}", end="", flush=True,
                      file=sys.stderr)
        d, st, *_ = nuts.sample_chain(logp_grad, start.starts[c], cov0, draws=draws, tune=tune,
                                      rng=np.random.default_rng([seed, _STREAM, c]),
                                      target_accept=target_accept, prior_weight=START_WEIGHT,
                                      callback=say)
        return d, st

    workers = min(cores, chains) if _FORK else 1
    info["cores"] = workers
    t1, c1 = time.perf_counter(), _cpu()
    if workers > 1:
        results = _in_processes(one_chain, range(chains), workers)
    else:
        results = [one_chain(c) for c in range(chains)]
    out, stats = [r[0] for r in results], [r[1] for r in results]
    if progress:
        print(flush=True, file=sys.stderr)
    info["sampling_seconds"] = time.perf_counter() - t1
    # this process and its finished workers: CPU seconds, which other work on the
    # machine does not inflate as it does the wall clock
    info["sampling_cpu_seconds"] = _cpu() - c1
    fn_draws, names = _draws_function(model, start.point)
    flat = np.concatenate(out)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*overflow encountered.*")
        values = fn_draws(flat)
    attrs = {"sampling_time": info["sampling_seconds"], "tuning_steps": tune,
             "inference_library": "bayespanel"}
    dt = _datatree(model, values, names, stats, chains, draws, attrs)
    info["compile_seconds"] = (time.perf_counter() - t0 - info["sampling_seconds"]
                               - info.get("start_seconds", 0.0))
    return dt
