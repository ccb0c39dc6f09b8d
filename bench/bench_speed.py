"""Benchmark of issue 18: the pass at memory speed, sampling flat in rows, the whole fit.

Run from the repository root::

    python bench/bench_speed.py            # the sizes of the issue (10 to 20 minutes)
    python bench/bench_speed.py --quick    # small sizes, a few minutes

Each measurement runs in its own fresh process and every ratio printed at the end is
measured in this one run:

1. **The pass** (``--pass-rows``, default 10,000,000 rows x 6 columns: 5 covariates and
   the outcome, 10 rows per unit). The statistics ``suffstats.compute_chunked`` in CPU
   seconds of one core, after a warm-up that loads the compiled kernels, against a naive
   numpy pass over the same arrays (``np.bincount`` sums per column and one
   cross-product, with and without stacking ``[X, y]`` first), BLAS on one thread.
   Target: at least 25 million rows per second and 1.5 times the naive pass.
2. **Sampling against rows** (``--sample-rows``, default 10,000 and 10,000,000 rows).
   RandomIntercept on the statistics, 4 chains x 1,000 draws after 1,000 tuning draws:
   PyMC's NUTS from its own start (``start="jitter"``, the sampler before issue 18) and
   from the posterior mode (``start="mode"``), and bayespanel's own NUTS (the default
   now, started at the mode). Sampling time includes warm-up. Target: at most 1.2 times
   the time at the smallest size; ESS per second no lower than the old start's.
3. **The whole fit** (``--fit-rows``, default 1,000,000 rows). From a ``Panel`` to a
   ``Posterior`` (design, build, compile, sampling, diagnostics), run in fresh processes
   that share a private PyTensor compile directory: first with it empty (as on a new
   machine), then again (PyTensor's numba code and bayespanel's compiled log density are
   found), then again with bayespanel's cache off; against linearmodels'
   ``RandomEffects`` fit on the same rows (``set_index`` and model construction
   included). The compile time is reported apart. On both sides the libraries are
   imported before the clock starts (linearmodels; PyMC, ArviZ and bayespanel), and
   the import time is printed apart.

The machine load (``os.getloadavg``) is printed at the start and end: other work on the
machine inflates wall-clock seconds; the pass is timed in CPU seconds for that reason.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, HERE)
from bench_models import T_OCC, _min_ess, simulate  # noqa: E402  (the same panel)

ONE_THREAD = {k: "1" for k in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")}


def _cpu_best(fn, repeat=3):
    best = np.inf
    for _ in range(repeat):
        t0 = time.process_time()
        fn()
        best = min(best, time.process_time() - t0)
    return best


# ---------------------------------------------------------------------------- jobs
def job_pass(args):
    from bayespanel.core import suffstats

    X, y, codes = simulate(args.rows)
    N = int(codes[-1]) + 1
    head = slice(0, 200_000)
    suffstats.USE_NUMBA = True
    suffstats.compute_chunked(X[head], y[head], codes[head])  # load the compiled kernels

    def ours():
        suffstats.compute_chunked(X, y, codes)

    def naive_stacked():
        Z = np.column_stack([X, y])
        for j in range(Z.shape[1]):
            np.bincount(codes, weights=Z[:, j], minlength=N)
        return Z.T @ Z

    def naive_unstacked():
        for j in range(X.shape[1]):
            np.bincount(codes, weights=X[:, j], minlength=N)
        np.bincount(codes, weights=y, minlength=N)
        return X.T @ X, X.T @ y, y @ y

    out = {"ours": _cpu_best(ours), "naive_stacked": _cpu_best(naive_stacked),
           "naive_unstacked": _cpu_best(naive_unstacked)}
    suffstats.USE_NUMBA = False  # the numpy version (numba missing), for the record
    out["ours_numpy"] = _cpu_best(ours, repeat=1)
    return out


#: the samplers compared in part 2: (label, sampler, start)
SAMPLE_RUNS = [("pymc/jitter", "pymc", "jitter"), ("pymc/mode", "pymc", "mode"),
               ("bayespanel", "bayespanel", "mode")]


def job_sample(args):
    import warnings

    from bayespanel.core import suffstats
    from bayespanel.bayes import RandomIntercept

    X, y, codes = simulate(args.rows)
    stats = suffstats.compute(np.column_stack([np.ones(len(y)), X]), y, codes)
    del X, y, codes
    model = RandomIntercept.from_suffstats(
        stats, ["Intercept"] + [f"x{j}" for j in range(5)], outcome="y")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        post = model.sample(draws=1000, tune=1000, chains=4, seed=1, sampler=args.sampler,
                            progress=False, start=args.start)
    ess = _min_ess(post.idata, ["coef", "sigma_obs", "sigma_unit"])
    info = post.sampling
    diag = post.diagnostics(warn=False)
    return {"sample": info["sampling_seconds"], "cpu": info.get("sampling_cpu_seconds"),
            "ess": ess,
            "rhat": float(post.summary()["rhat"].max()), "divergences": diag["divergences"],
            "compile": info.get("compile_seconds", np.nan),
            "start_seconds": info.get("start_seconds", 0.0),
            "means": {k: float(v) for k, v in post.coef.items()}}


def job_fit(args):
    import warnings

    import pandas as pd

    X, y, codes = simulate(args.rows)
    df = pd.DataFrame(X, columns=[f"x{j}" for j in range(5)])
    df["y"], df["unit"] = y, codes
    df["occ"] = np.tile(np.arange(T_OCC), len(y) // T_OCC)
    del X, y, codes
    t0 = time.perf_counter()
    # the libraries are imported before the clock starts, as linearmodels is for its fit
    import arviz_base  # noqa: F401
    import arviz_stats  # noqa: F401
    import pymc  # noqa: F401

    import bayespanel as bp

    t_import = time.perf_counter() - t0
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        panel = bp.Panel(df, unit="unit", time="occ")
        design = panel.design("y ~ x0 + x1 + x2 + x3 + x4")
        t_design = time.perf_counter() - t0
        t1 = time.perf_counter()
        model = design.build(bp.models.RandomIntercept)
        t_build = time.perf_counter() - t1
        t1 = time.perf_counter()
        post = model.sample(draws=1000, tune=1000, chains=4, seed=1, progress=False)
        post.diagnostics(warn=False)
        post.summary()
        t_sample_total = time.perf_counter() - t1
    fit = time.perf_counter() - t0
    info = post.sampling
    out = {"import": t_import, "design": t_design, "build": t_build,
           "sample_total": t_sample_total, "fit": fit,
           "compile": info.get("compile_seconds", np.nan),
           "sampling": info["sampling_seconds"], "start": info.get("start_seconds", 0.0)}
    if args.with_reference:
        from linearmodels import RandomEffects

        t0 = time.perf_counter()
        data = df.set_index(["unit", "occ"])
        exog = data[[f"x{j}" for j in range(5)]].assign(const=1.0)
        RandomEffects(data["y"], exog).fit()
        out["linearmodels"] = time.perf_counter() - t0
    return out


JOBS = {"pass": job_pass, "sample": job_sample, "fit": job_fit}


def spawn(job, env=None, timeout=3600, **kw):
    cmd = [sys.executable, os.path.abspath(__file__), "--job", job]
    for k, v in kw.items():
        if v is True:
            cmd.append(f"--{k.replace('_', '-')}")
        elif v not in (None, False):
            cmd += [f"--{k.replace('_', '-')}", str(v)]
    full_env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    full_env.update(env or {})
    t0 = time.perf_counter()
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, env=full_env)
    except subprocess.TimeoutExpired:
        return {"error": "timed out", "wall": time.perf_counter() - t0}
    for line in proc.stdout.splitlines():
        if line.startswith("RESULT "):
            out = json.loads(line[7:])
            out["wall"] = time.perf_counter() - t0
            return out
    return {"error": (proc.stderr or proc.stdout)[-1500:], "wall": time.perf_counter() - t0}


def _load():
    return " ".join(f"{x:.1f}" for x in os.getloadavg())


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes")
    ap.add_argument("--job", choices=sorted(JOBS))
    ap.add_argument("--rows", type=int)
    ap.add_argument("--start")
    ap.add_argument("--sampler")
    ap.add_argument("--with-reference", action="store_true")
    ap.add_argument("--pass-rows", type=int)
    ap.add_argument("--sample-rows", help="comma-separated sizes")
    ap.add_argument("--fit-rows", type=int)
    ap.add_argument("--only", help="comma-separated parts: pass,sample,fit")
    args = ap.parse_args()
    if args.job:
        print("RESULT " + json.dumps(JOBS[args.job](args)))
        return 0

    pass_rows = args.pass_rows or (2_000_000 if args.quick else 10_000_000)
    sample_rows = [int(s) for s in (args.sample_rows or (
        "10000,1000000" if args.quick else "10000,10000000")).split(",")]
    fit_rows = args.fit_rows or (200_000 if args.quick else 1_000_000)
    parts = set((args.only or "pass,sample,fit").split(","))
    print(f"# bench_speed: {os.cpu_count()} CPUs; load average at start {_load()}", flush=True)
    ratios = []

    if "pass" in parts:
        r = spawn("pass", env=ONE_THREAD, rows=pass_rows)
        if "error" in r:
            print("pass: error:", r["error"])
        else:
            rate = {k: pass_rows / v / 1e6 for k, v in r.items() if k != "wall"}
            print(f"\n## 1. the pass: {pass_rows:,} rows x 6 columns, CPU seconds of one core")
            for k, label in [("ours", "suffstats.compute_chunked (numba)"),
                             ("ours_numpy", "the same, numpy version (no numba)"),
                             ("naive_unstacked", "naive: bincount sums + X'X, X'y, y'y"),
                             ("naive_stacked", "naive: stack [X, y], bincount sums + Z'Z")]:
                print(f"  {label:<45} {r[k]:7.3f} s  {rate[k]:7.1f} M rows/s")
            worst = max(r["naive_unstacked"], r["naive_stacked"])
            best_naive = min(r["naive_unstacked"], r["naive_stacked"])
            ratios.append(("pass: rows/s vs target 25 M", rate["ours"] / 25.0, ">= 1"))
            ratios.append(("pass: speed vs the faster naive numpy pass",
                           best_naive / r["ours"], ">= 1.5"))
            ratios.append(("pass: speed vs the naive pass with stacking",
                           worst / r["ours"], ">= 1.5"))

    if "sample" in parts:
        print(f"\n## 2. sampling against rows: RandomIntercept, NUTS, 4 chains x 1,000 "
              f"draws + 1,000 tuning (load {_load()})")
        print(f"  {'rows':>11} {'sampler/start':>14} {'sample s':>9} {'CPU s':>6} {'min ESS':>8} "
              f"{'ESS/s':>8} {'R-hat':>6} {'div':>4} {'compile s':>10}")
        res = {}
        for rows in sample_rows:
            for label, sampler, start in SAMPLE_RUNS:
                r = spawn("sample", rows=rows, start=start, sampler=sampler)
                res[(rows, label)] = r
                if "error" in r:
                    print(f"  {rows:>11,} {label:>14} error: "
                          f"{r['error'].strip().splitlines()[-1]}")
                    continue
                cpu = "" if r.get("cpu") is None else f"{r['cpu']:.2f}"
                print(f"  {rows:>11,} {label:>14} {r['sample']:9.2f} {cpu:>6} {r['ess']:8.0f} "
                      f"{r['ess'] / r['sample']:8.0f} {r['rhat']:6.3f} {r['divergences']:4d} "
                      f"{r['compile']:10.2f}", flush=True)
        lo, hi = sample_rows[0], sample_rows[-1]
        for label, _, _ in SAMPLE_RUNS:
            a, b = res.get((lo, label), {}), res.get((hi, label), {})
            if "sample" in a and "sample" in b:
                ratios.append((f"sampling time {hi:,} / {lo:,} rows ({label})",
                               b["sample"] / a["sample"],
                               "<= 1.2" if label == "bayespanel" else ""))
            if a.get("cpu") and b.get("cpu"):  # in-process, one thread: CPU seconds
                ratios.append((f"sampling CPU seconds {hi:,} / {lo:,} rows ({label})",
                               b["cpu"] / a["cpu"], "<= 1.2"))
        for rows in sample_rows:
            base = res.get((rows, "pymc/jitter"), {})
            for label in ("pymc/mode", "bayespanel"):
                r = res.get((rows, label), {})
                if "sample" in base and "sample" in r:
                    ratios.append((f"ESS/s {label} / pymc from jitter at {rows:,} rows",
                                   (r["ess"] / r["sample"]) / (base["ess"] / base["sample"]),
                                   ">= 1"))

    if "fit" in parts:
        print(f"\n## 3. the whole fit at {fit_rows:,} rows, from a Panel (load {_load()})")
        cache = tempfile.mkdtemp(prefix="bayespanel_bench_compiledir_")
        env = {"PYTENSOR_FLAGS": f"base_compiledir={cache}"}
        try:
            runs = [spawn("fit", env=env, rows=fit_rows, with_reference=(i == 1))
                    for i in range(2)]
            runs.append(spawn("fit", env=dict(env, BAYESPANEL_COMPILE_CACHE="0"),
                              rows=fit_rows))
        finally:
            shutil.rmtree(cache, ignore_errors=True)
        for label, r in zip(("first run (empty compile caches)", "repeated run",
                             "repeated run, bayespanel's compile cache off"), runs):
            if "error" in r:
                print(f"  {label}: error: {r['error'].strip().splitlines()[-1]}")
                continue
            print(f"  {label}: fit {r['fit']:.2f} s = design {r['design']:.2f} + build "
                  f"{r['build']:.2f} + sample() {r['sample_total']:.2f} (compile "
                  f"{r['compile']:.2f}, start {r['start']:.2f}, sampling {r['sampling']:.2f}); "
                  f"import {r['import']:.2f} s")
        r = runs[1]
        if "linearmodels" in r:
            print(f"  linearmodels RandomEffects on the same rows: {r['linearmodels']:.2f} s")
            ratios.append(("whole fit (repeated run) / linearmodels RandomEffects",
                           r["fit"] / r["linearmodels"], "<= 1"))
            ratios.append(("whole fit without compile / linearmodels RandomEffects",
                           (r["fit"] - r["compile"]) / r["linearmodels"], "<= 1"))
        if "fit" in runs[0] and "fit" in r:
            ratios.append(("compile seconds, repeated / first run",
                           r["compile"] / runs[0]["compile"], ""))
        if "fit" in runs[2] and "fit" in r:
            ratios.append(("compile seconds, repeated run with / without bayespanel's cache",
                           r["compile"] / runs[2]["compile"], ""))

    print(f"\n# load average at end {_load()} (other work on the machine inflates wall-clock "
          "times)")
    print("\n# ratios (all measured in this run)")
    for label, value, target in ratios:
        print(f"  {label:<60} {value:8.2f}   {('target ' + target) if target else ''}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
