"""Benchmark: AR(1) errors (``errors="ar1"``) against independent errors.

Run from the repository root::

    .venv/bin/python bench/bench_ar1.py              # 10,000 and 1,000,000 rows
    .venv/bin/python bench/bench_ar1.py --quick      # 10,000 and 100,000 rows

Two measurements, each configuration in its own process (issue 17, Performance):

* gradient: the compiled log density and gradient of ``RandomIntercept(..., errors="ar1")``
  timed at the initial point (median of repeated calls) at the small and the large size;
  the cost per gradient must stay flat in rows (target: large / small within 1.5x);
* whole fit: Panel -> model (design, statistics) -> NUTS sampling, at the large size, for
  the AR(1) model and the iid model with the same draws, chains and seed (target: AR(1) /
  iid no more than 2x).

Simulated panel (ours): N units x 10 occasions with 3% of rows missing at random (gaps),
3 covariates varying within units, unit SD 1, AR(1) errors with rho = 0.5 and SD 1.
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
FORMULA = "y ~ x0 + x1 + x2"


def simulate(n_rows, seed=0, rho=0.5):
    import pandas as pd

    rng = np.random.default_rng(seed)
    N = n_rows // T_OCC
    e = np.empty((N, T_OCC))
    e[:, 0] = rng.normal(size=N)
    for t in range(1, T_OCC):
        e[:, t] = rho * e[:, t - 1] + np.sqrt(1 - rho ** 2) * rng.normal(size=N)
    codes = np.repeat(np.arange(N), T_OCC)
    X = rng.normal(size=(N, 3))[codes] + rng.normal(size=(N * T_OCC, 3))
    y = 1.0 + X @ np.array([0.5, -0.3, 0.2]) + rng.normal(size=N)[codes] + e.ravel()
    df = pd.DataFrame(X, columns=["x0", "x1", "x2"])
    df["y"], df["unit"], df["occ"] = y, codes, np.tile(np.arange(T_OCC), N)
    return df[rng.random(len(df)) >= 0.03].reset_index(drop=True)


def job_gradient(n_rows, repeats):
    import bayespanel as bp

    df = simulate(n_rows)
    panel = bp.Panel(df, unit="unit", time="occ")
    out = {"rows": int(len(df))}
    for errors in ("ar1", "iid"):
        model = bp.models.RandomIntercept(panel, FORMULA, errors=errors)
        m = model.pymc_model
        point = m.initial_point()
        vg = m.logp_dlogp_function(ravel_inputs=True)      # log density and its gradient
        x = np.concatenate([np.ravel(point[v.name]) for v in vg._grad_vars])
        f = lambda _p: vg(x)                                # noqa: E731
        f(point)
        times = []
        for _ in range(repeats):
            t0 = time.perf_counter()
            f(point)
            times.append(time.perf_counter() - t0)
        out[f"grad_ms_{errors}"] = 1e3 * float(np.median(times))
    return out


def job_fit(n_rows, errors, draws, tune, chains):
    import bayespanel as bp

    df = simulate(n_rows)
    t0 = time.perf_counter()
    panel = bp.Panel(df, unit="unit", time="occ")
    model = bp.models.RandomIntercept(panel, FORMULA, errors=errors)
    t_build = time.perf_counter() - t0
    post = model.sample(draws=draws, tune=tune, chains=chains, seed=1, progress=False)
    info = post.sampling
    d = post.diagnostics(warn=False)
    return {"rows": int(len(df)), "build": t_build, "sample": info["sampling_seconds"],
            "total": t_build + info["total_seconds"], "sampler": info.get("sampler"),
            "divergences": d["divergences"], "max_rhat": d["max_rhat"],
            "min_ess_bulk": d["min_ess_bulk"]}


def spawn(args, timeout=3600):
    cmd = [sys.executable, os.path.abspath(__file__), *map(str, args)]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    for line in proc.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[7:])
    raise RuntimeError((proc.stderr or proc.stdout)[-1500:])


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="10,000 and 100,000 rows")
    ap.add_argument("--small", type=int, default=10_000)
    ap.add_argument("--large", type=int, default=None)
    ap.add_argument("--draws", type=int, default=500)
    ap.add_argument("--tune", type=int, default=500)
    ap.add_argument("--chains", type=int, default=2)
    ap.add_argument("--repeats", type=int, default=200)
    ap.add_argument("--job", choices=["gradient", "fit"])
    ap.add_argument("--rows", type=int)
    ap.add_argument("--errors", choices=["ar1", "iid"])
    a = ap.parse_args()
    if a.job:
        out = (job_gradient(a.rows, a.repeats) if a.job == "gradient"
               else job_fit(a.rows, a.errors, a.draws, a.tune, a.chains))
        out["peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        print("RESULT " + json.dumps(out))
        return 0
    large = a.large or (100_000 if a.quick else 1_000_000)
    print(f"machine load (1, 5, 15 min): {os.getloadavg()}")
    g = {n: spawn(["--job", "gradient", "--rows", n, "--repeats", a.repeats])
         for n in (a.small, large)}
    print(f"{'rows':>10} {'grad ar1 ms':>12} {'grad iid ms':>12}")
    for n, r in g.items():
        print(f"{r['rows']:>10} {r['grad_ms_ar1']:12.3f} {r['grad_ms_iid']:12.3f}")
    flat = g[large]["grad_ms_ar1"] / g[a.small]["grad_ms_ar1"]
    print(f"AR(1) gradient, {large:,} vs {a.small:,} rows: {flat:.2f}x (target <= 1.5x)")
    fits = {e: spawn(["--job", "fit", "--rows", large, "--errors", e, "--draws", a.draws,
                      "--tune", a.tune, "--chains", a.chains]) for e in ("iid", "ar1")}
    print(f"{'errors':>7} {'rows':>10} {'build s':>8} {'sample s':>9} {'total s':>8} "
          f"{'sampler':>8} {'div':>4} {'rhat':>6} {'ess':>6} {'peak MB':>8}")
    for e, r in fits.items():
        print(f"{e:>7} {r['rows']:>10} {r['build']:8.2f} {r['sample']:9.2f} {r['total']:8.2f} "
              f"{r['sampler']:>8} {r['divergences']:4d} {r['max_rhat']:6.3f} "
              f"{r['min_ess_bulk']:6.0f} {r['peak_mb']:8.0f}")
    ratio = fits["ar1"]["total"] / fits["iid"]["total"]
    print(f"whole fit at {large:,} rows, AR(1) / iid: {ratio:.2f}x (target <= 2x)")
    print(f"machine load after: {os.getloadavg()}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
