"""Benchmark: the Gaussian random-slope model, Woodbury marginal against latent effects.

Run from the repository root::

    .venv/bin/python bench/bench_slopes.py              # 100,000 rows (issue 5)
    .venv/bin/python bench/bench_slopes.py --rows 5000  # quick

Both fits are the same model (``WithinBetween(..., random_slopes=["x"])``): the marginal
one integrates the unit intercepts and slopes out per unit with the Woodbury identity
(``likelihood="marginal"``), the latent one samples them (``likelihood="latent"``, non-
centred). Each runs in its own process and reports build, compile and sampling time, the
smallest bulk ESS over the coefficients and variance components, ESS per second of
sampling and peak resident memory. The ratio printed at the end is measured in this run.

Simulated panel: N units x T = 10 occasions, one time-varying covariate with a random
within slope (SD 0.4, correlation 0.3 with the intercept), unit SD 1, occasion SD 1.
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

T_OCC = 10


def simulate(n_rows, seed=0):
    import pandas as pd

    rng = np.random.default_rng(seed)
    N = n_rows // T_OCC
    unit = np.repeat(np.arange(N), T_OCC)
    x = rng.normal(size=N)[unit] + rng.normal(size=N * T_OCC)
    C = np.array([[1.0, 0.12], [0.12, 0.16]])
    g = rng.multivariate_normal([0, 0], C, N)
    xb = pd.Series(x).groupby(unit).transform("mean").to_numpy()
    y = 1 + 0.5 * (x - xb) + 0.8 * xb + g[unit, 0] + g[unit, 1] * (x - x.mean()) \
        + rng.normal(size=N * T_OCC)
    return pd.DataFrame({"unit": unit, "occ": np.tile(np.arange(T_OCC), N), "x": x, "y": y})


def one(likelihood, rows, draws, sampler):
    import warnings

    import arviz_stats as azs

    import bayespanel as bp

    warnings.simplefilter("ignore")
    df = simulate(rows)
    t0 = time.perf_counter()
    panel = bp.Panel(df, unit="unit", time="occ")
    model = bp.models.WithinBetween(panel, "y ~ x", random_slopes=["x"], likelihood=likelihood)
    build = time.perf_counter() - t0
    post = model.sample(draws=draws, tune=draws, chains=2, seed=1, progress=False,
                        sampler=sampler)
    names = post.labels + ["sigma_unit", "sigma_slope[x (within)]", "corr[Intercept, x (within)]",
                           "sigma_obs"]
    ess = min(float(azs.ess(post.draws(n), method="bulk")) for n in names)
    info = post.sampling
    out = {"likelihood": likelihood, "rows": rows, "build_s": build,
           "compile_s": info.get("compile_seconds", float("nan")),
           "sampling_s": info["sampling_seconds"], "total_s": info["total_seconds"],
           "min_ess_bulk": ess, "ess_per_s": ess / info["sampling_seconds"],
           "sampler": info["sampler"],
           "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}
    print(json.dumps(out))


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=100_000)
    ap.add_argument("--draws", type=int, default=500)
    ap.add_argument("--sampler", default="nutpie", choices=["pymc", "nutpie"])
    ap.add_argument("--one", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.one:
        one(args.one, args.rows, args.draws, args.sampler)
        return
    results = {}
    for lik in ("marginal", "latent"):
        cmd = [sys.executable, os.path.abspath(__file__), "--one", lik, "--rows", str(args.rows),
               "--draws", str(args.draws), "--sampler", args.sampler]
        res = subprocess.run(cmd, capture_output=True, text=True)
        line = [s for s in res.stdout.splitlines() if s.startswith("{")]
        if not line:
            print(f"{lik}: failed\n{res.stderr[-2000:]}")
            continue
        results[lik] = json.loads(line[-1])
        r = results[lik]
        print(f"{lik:>9}: {r['rows']} rows, build {r['build_s']:.1f}s, compile "
              f"{r['compile_s']:.1f}s, sampling {r['sampling_s']:.1f}s, min bulk ESS "
              f"{r['min_ess_bulk']:.0f}, ESS/s {r['ess_per_s']:.1f}, peak {r['peak_mb']:.0f} MB "
              f"({r['sampler']})")
    if len(results) == 2:
        ratio = results["marginal"]["ess_per_s"] / results["latent"]["ess_per_s"]
        print(f"ESS/s ratio marginal / latent at {args.rows} rows: {ratio:.1f}")


if __name__ == "__main__":
    main()
