"""Benchmark: the marginal RandomIntercept against the plain latent-intercept PyMC graph.

Run from the repository root::

    .venv/bin/python bench/bench_models.py            # 10,000 to 1,000,000 rows (long)
    .venv/bin/python bench/bench_models.py --quick    # small sizes, a few minutes

Every configuration runs in its own process (so peak memory is that fit's own) and
reports: time to build the design from a Panel, time for the sufficient statistics,
compile time, sampling time, the smallest bulk ESS over the coefficients and the two SDs,
ESS per second of sampling, and peak resident memory. The latent graph (one non-centred
intercept per unit, row-level likelihood, sampled with ``pm.sample`` defaults) is the
baseline; it is stopped at the first size that does not finish within the time limit.
Ratios printed at the end are all measured in this one run.

Simulated panel: N units x T = 10 occasions, 5 covariates (3 varying within units, 2
constant), unit SD 1, occasion SD 1.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
T_OCC = 10


def simulate(n_rows, seed=0):
    rng = np.random.default_rng(seed)
    N = n_rows // T_OCC
    codes = np.repeat(np.arange(N), T_OCC)
    xb = rng.normal(size=(N, 3))
    X = np.column_stack([xb[codes] + rng.normal(size=(n_rows, 3)),
                         rng.normal(size=(N, 2))[codes]])
    beta = np.array([0.5, -0.3, 0.2, 1.0, -0.5])
    y = 2.0 + X @ beta + rng.normal(size=N)[codes] + rng.normal(size=n_rows)
    return X, y, codes


def _min_ess(dt, names):
    import arviz_stats as azs

    out = np.inf
    for name in names:
        arr = np.asarray(dt["posterior"][name].values)
        arr = arr.reshape(arr.shape[0], arr.shape[1], -1)
        for j in range(arr.shape[2]):
            out = min(out, float(azs.ess(arr[:, :, j], method="bulk")))
    return out


#: the samplers timed on the marginal model (bayespanel's own is the default)
MARGINAL_SAMPLERS = ("bayespanel", "pymc", "nutpie")


def job_marginal(n_rows, sampler, draws, tune, chains):
    import pandas as pd

    import bayespanel as bp
    from bayespanel.core import suffstats
    from bayespanel.bayes import RandomIntercept

    X, y, codes = simulate(n_rows)
    df = pd.DataFrame(X, columns=[f"x{j}" for j in range(5)])
    df["y"], df["unit"], df["occ"] = y, codes, np.tile(np.arange(T_OCC), n_rows // T_OCC)
    t0 = time.perf_counter()
    panel = bp.Panel(df, unit="unit", time="occ")
    design = panel.design("y ~ x0 + x1 + x2 + x3 + x4")
    t_design = time.perf_counter() - t0
    t0 = time.perf_counter()
    M, labels = design.matrices("random")
    stats = suffstats.compute(M, design.y, design.unit_codes)
    t_stats = time.perf_counter() - t0
    t0 = time.perf_counter()
    model = RandomIntercept.from_suffstats(stats, labels, outcome="y")
    t_build = time.perf_counter() - t0
    post = model.sample(draws=draws, tune=tune, chains=chains, seed=1, sampler=sampler,
                        progress=False)
    info = post.sampling
    t_sample = info["sampling_seconds"]
    t_compile = info.get("compile_seconds", info["total_seconds"] - t_sample)
    return {"design": t_design, "stats": t_stats, "build": t_build, "compile": t_compile,
            "sample": t_sample, "total_fit": t_stats + t_build + info["total_seconds"],
            "ess": _min_ess(post.idata, ["coef", "sigma_obs", "sigma_unit"]),
            "divergences": post.diagnostics(warn=False)["divergences"]}


def job_latent(n_rows, sampler, draws, tune, chains):
    """The straightforward PyMC graph: one non-centred intercept per unit, row likelihood."""
    import pymc as pm

    X, y, codes = simulate(n_rows)
    N = int(codes.max()) + 1
    t0 = time.perf_counter()
    with pm.Model() as model:
        a = pm.Normal("a", 0.0, 10.0)
        b = pm.Normal("b", 0.0, 10.0, shape=X.shape[1])
        sigma_unit = pm.HalfNormal("sigma_unit", 2.0)
        sigma_obs = pm.HalfNormal("sigma_obs", 2.0)
        z = pm.Normal("z", 0.0, 1.0, shape=N)
        pm.Normal("y", a + X @ b + sigma_unit * z[codes], sigma_obs, observed=y)
    t_build = time.perf_counter() - t0
    t0 = time.perf_counter()
    kw = {} if sampler == "default" else {"nuts_sampler": sampler}
    dt = pm.sample(draws=draws, tune=tune, chains=chains, random_seed=1, progressbar=False,
                   model=model, compute_convergence_checks=False, **kw)
    total = time.perf_counter() - t0
    t_sample = float(dt["posterior"].attrs.get("sampling_time", np.nan))
    if not np.isfinite(t_sample):
        t_sample = total
    return {"design": np.nan, "stats": 0.0, "build": t_build, "compile": total - t_sample,
            "sample": t_sample, "total_fit": t_build + total,
            "ess": _min_ess(dt, ["b", "sigma_obs", "sigma_unit"]),
            "divergences": int(np.asarray(dt["sample_stats"]["diverging"].values).sum())}


def run_job(args):
    fn = job_marginal if args.job == "marginal" else job_latent
    out = fn(args.rows, args.sampler, args.draws, args.tune, args.chains)
    out["peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print("RESULT " + json.dumps(out))


def spawn(job, rows, sampler, draws, tune, chains, timeout):
    cmd = [sys.executable, os.path.abspath(__file__), "--job", job, "--rows", str(rows),
           "--sampler", sampler, "--draws", str(draws), "--tune", str(tune),
           "--chains", str(chains)]
    t0 = time.perf_counter()
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        return {"timeout": True, "wall": time.perf_counter() - t0}
    for line in proc.stdout.splitlines():
        if line.startswith("RESULT "):
            out = json.loads(line[7:])
            out["wall"] = time.perf_counter() - t0
            return out
    return {"error": (proc.stderr or proc.stdout)[-800:], "wall": time.perf_counter() - t0}


def _fmt(r):
    if r.get("timeout"):
        return f"{'timed out':>60}"
    if "error" in r:
        return "   error: " + r["error"].strip().splitlines()[-1][:70]
    ess_s = r["ess"] / r["sample"] if r["sample"] > 0 else np.nan
    return (f"{r['design']:8.2f} {r['stats']:7.2f} {r['compile']:8.2f} {r['sample']:8.2f} "
            f"{r['total_fit']:8.2f} {r['ess']:7.0f} {ess_s:9.1f} {r['peak_mb']:8.0f} "
            f"{r['divergences']:5d}")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes only")
    ap.add_argument("--job", choices=["marginal", "latent"])
    ap.add_argument("--rows", type=int)
    ap.add_argument("--sampler", default="pymc")
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--tune", type=int, default=1000)
    ap.add_argument("--chains", type=int, default=4)
    ap.add_argument("--latent-timeout", type=float, default=600.0)
    args = ap.parse_args()
    if args.job:
        return run_job(args)

    sizes = [10_000, 30_000] if args.quick else [10_000, 30_000, 100_000, 300_000, 1_000_000]
    latent_limit = 120.0 if args.quick else args.latent_timeout
    d, t, c = args.draws, args.tune, args.chains
    print(f"# bench_models: {c} chains x {d} draws ({t} tuning), {os.cpu_count()} CPUs, "
          f"T = {T_OCC}, 5 covariates; load average at start "
          + " ".join(f"{x:.1f}" for x in os.getloadavg()))
    head = (f"{'model':<22}{'rows':>10} {'design':>8} {'stats':>7} {'compile':>8} {'sample':>8} "
            f"{'fit':>8} {'minESS':>7} {'ESS/s':>9} {'peakMB':>8} {'div':>5}")
    print(head)
    results = {}
    for rows in sizes:
        for sampler in MARGINAL_SAMPLERS:
            r = spawn("marginal", rows, sampler, d, t, c, timeout=1800)
            results[("marginal", sampler, rows)] = r
            print(f"{'marginal/' + sampler:<22}{rows:>10} {_fmt(r)}", flush=True)
    latent_ok = True
    for rows in sizes:
        if not latent_ok:
            break
        for sampler in ("default", "pymc"):
            r = spawn("latent", rows, sampler, d, t, c, timeout=latent_limit)
            results[("latent", sampler, rows)] = r
            print(f"{'latent/' + sampler:<22}{rows:>10} {_fmt(r)}", flush=True)
        if all(results[("latent", s, rows)].get("timeout") or "error" in results[("latent", s, rows)]
               for s in ("default", "pymc")):
            latent_ok = False

    print("# load average at end " + " ".join(f"{x:.1f}" for x in os.getloadavg())
          + " (other work on the machine inflates every time above)")

    def ok(r):
        return r and "ess" in r

    print("\n# ratios (all measured in this run)")
    for sampler in MARGINAL_SAMPLERS:
        base = results.get(("marginal", sampler, sizes[0]))
        if ok(base):
            growth = ", ".join(
                f"{rows:,}: {results[('marginal', sampler, rows)]['sample'] / base['sample']:.2f}"
                for rows in sizes if ok(results.get(("marginal", sampler, rows))))
            print(f"marginal/{sampler} sampling time relative to {sizes[0]:,} rows: {growth}")
    for rows in sizes:
        fits = {s: results.get(("marginal", s, rows)) for s in MARGINAL_SAMPLERS}
        got = {s: r["total_fit"] for s, r in fits.items() if ok(r)}
        if "bayespanel" in got and len(got) > 1:
            print(f"{rows:>10,} rows: whole fit " + ", ".join(f"{s} {v:.1f} s" for s, v in got.items())
                  + "; " + ", ".join(f"{s}/bayespanel = {v / got['bayespanel']:.2f}"
                                     for s, v in got.items() if s != "bayespanel"))
    done = [rows for rows in sizes
            if any(ok(results.get(("latent", s, rows))) for s in ("default", "pymc"))]
    if done:
        rows = max(done)
        lat = [results[("latent", s, rows)] for s in ("default", "pymc")
               if ok(results.get(("latent", s, rows)))]
        best_lat = max(r["ess"] / r["sample"] for r in lat)
        ours = [results[("marginal", s, rows)] for s in ("pymc", "nutpie")
                if ok(results.get(("marginal", s, rows)))]
        if ours:
            best = max(r["ess"] / r["sample"] for r in ours)
            print(f"ESS/s at {rows:,} rows (largest size the latent graph finished): marginal "
                  f"{best:.1f}, latent {best_lat:.1f}, ratio {best / best_lat:.0f}x (best "
                  "sampler of each)")
            mp = results.get(("marginal", "pymc", rows))
            if ok(mp):
                r = mp["ess"] / mp["sample"]
                print(f"  marginal with PyMC's NUTS (the default): {r:.1f} ESS/s, ratio "
                      f"{r / best_lat:.0f}x; ratio of whole-fit times latent/marginal "
                      f"{min(x['total_fit'] for x in lat) / mp['total_fit']:.1f}x")
    big = results.get(("marginal", "pymc", sizes[-1]))
    if ok(big):
        print(f"whole fit at {sizes[-1]:,} rows (statistics + compile + sampling, pymc): "
              f"{big['total_fit']:.1f} s; with the design from a Panel: "
              f"{big['total_fit'] + big['design']:.1f} s")


if __name__ == "__main__":
    main()
