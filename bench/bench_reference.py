"""Benchmark: our closed-form reference fits against linearmodels on the same panel.

Simulates one random-intercept panel (default 1,000,000 rows: 100,000 units x 10
occasions, 5 covariates), then times, in one run and on the same data,

* ours from a Panel and a formula (``bp.reference.<estimator>(panel, formula)``): once
  with the design built for the call (the panel's kept design dropped first: the cost of
  the first fit of a formula) and once as a further fit of the same formula on the same
  panel (the panel keeps the last design it built and reuses it), and from a ready
  Design (``fit_design``);
* linearmodels' PooledOLS, PanelOLS (entity effects), BetweenOLS and RandomEffects from a
  (unit, occasion)-indexed DataFrame, model construction included;

for pooled, within, between and random (Swamy-Arora), classical covariance, plus within
and random with cluster-robust covariance. It prints seconds and the ratio
linearmodels / ours (above 1: ours is faster) and checks that the estimates agree.
Issue 18's target (item 4): from a Panel, every fit at least 10 times faster than
linearmodels in the same run, the design built for the fit included.

Run ``python bench/bench_reference.py`` (about a minute on 2 cores) or
``python bench/bench_reference.py --rows 100000`` for a quick look.
"""

from __future__ import annotations

import argparse
import os
import time
import warnings

import numpy as np
import pandas as pd


def simulate(rows: int, occasions: int, k: int, seed: int = 1) -> pd.DataFrame:
    units = rows // occasions
    rng = np.random.default_rng(seed)
    n = units * occasions
    X = rng.normal(size=(n, k)) + np.repeat(rng.normal(size=(units, k)), occasions, axis=0)
    u = np.repeat(rng.normal(size=units), occasions)
    y = 1.0 + X @ np.linspace(0.5, -0.5, k) + u + rng.normal(size=n)
    df = pd.DataFrame(X, columns=[f"x{j + 1}" for j in range(k)])
    df.insert(0, "unit", np.repeat(np.arange(units), occasions))
    df.insert(1, "occasion", np.tile(np.arange(2000, 2000 + occasions), units))
    df["y"] = y
    return df


def best_of(fn, repeat: int):
    times, out = [], None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--occasions", type=int, default=10)
    ap.add_argument("--covariates", type=int, default=5)
    ap.add_argument("--repeat", type=int, default=1, help="best of this many runs")
    args = ap.parse_args(argv)

    import bayespanel as bp
    from bayespanel.reference import fit_design
    from linearmodels import BetweenOLS, PanelOLS, PooledOLS, RandomEffects

    df = simulate(args.rows, args.occasions, args.covariates)
    xs = [c for c in df.columns if c.startswith("x")]
    formula = "y ~ " + " + ".join(xs)
    t0 = time.perf_counter()
    panel = bp.Panel(df, unit="unit", time="occasion")
    t_panel = time.perf_counter() - t0
    t0 = time.perf_counter()
    design = panel.design(formula)
    t_design = time.perf_counter() - t0
    indexed = df.set_index(["unit", "occasion"])
    exog = indexed[xs].copy()
    exog.insert(0, "const", 1.0)
    dep = indexed["y"]

    lm = {
        "pooled": lambda cov: PooledOLS(dep, exog).fit(**cov),
        "within": lambda cov: PanelOLS(dep, exog, entity_effects=True).fit(**cov),
        "between": lambda cov: BetweenOLS(dep, exog).fit(**cov),
        "random": lambda cov: RandomEffects(dep, exog).fit(**cov),
    }
    lm_cluster = {"cov_type": "clustered", "cluster_entity": True, "group_debias": True}
    cases = [("pooled", "classical"), ("within", "classical"), ("between", "classical"),
             ("random", "classical"), ("within", "cluster"), ("random", "cluster")]

    print(f"panel: {design.n:,} rows, {design.n_units:,} units, {len(xs)} covariates; "
          f"Panel() {t_panel:.2f} s, design {t_design:.2f} s (done once, not in the rows "
          "below)")
    print(f"{'estimator':<10}{'cov':<11}{'ours: panel':>12}{'panel, reused':>14}"
          f"{'ours: design':>13}{'linearmodels':>14}{'ratio (panel)':>15}"
          f"{'(reused)':>9}{'ratio (design)':>16}")
    worst = worst_reused = np.inf

    def cold(est, cov):
        panel._last_design = None  # the design is built for this fit
        return getattr(bp.reference, est)(panel, formula, cov=cov)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for est, cov in cases:
            t_ours, res = best_of(lambda: cold(est, cov), args.repeat)
            t_re, _ = best_of(lambda: getattr(bp.reference, est)(panel, formula, cov=cov),
                              args.repeat)
            t_des, _ = best_of(lambda: fit_design(design, est, cov=cov), args.repeat)
            t_lm, ref = best_of(lambda: lm[est](lm_cluster if cov == "cluster" else {}),
                                args.repeat)
            params = ref.params.to_numpy()
            se = ref.std_errors.to_numpy()
            if est == "within":
                params, se = params[1:], se[1:]
            assert np.allclose(res.coef.to_numpy(), params, rtol=1e-6, atol=1e-9), est
            assert np.allclose(res.se.to_numpy(), se, rtol=1e-6), est
            r_panel, r_design, r_re = t_lm / t_ours, t_lm / t_des, t_lm / t_re
            worst, worst_reused = min(worst, r_panel), min(worst_reused, r_re)
            print(f"{est:<10}{cov:<11}{t_ours:>11.2f}s{t_re:>13.2f}s{t_des:>12.2f}s"
                  f"{t_lm:>13.2f}s{r_panel:>14.1f}x{r_re:>8.1f}x{r_design:>15.1f}x")
    print(f"estimates and standard errors agree with linearmodels (rtol 1e-6); "
          f"slowest ratio {worst:.1f}x ({'ours no slower' if worst >= 1 else 'ours SLOWER'})")
    load = " ".join(f"{x:.1f}" for x in os.getloadavg())
    print(f"\n# ratios (all measured in this run; load average at end {load} on "
          f"{os.cpu_count()} CPUs)")
    print(f"  {'reference fits from a Panel, design built: slowest linearmodels / ours':<72}"
          f"{worst:7.1f}   target >= 10 (issue 18, item 4)")
    print(f"  {'reference fits from a Panel, design reused: slowest linearmodels / ours':<72}"
          f"{worst_reused:7.1f}")


if __name__ == "__main__":
    main()
