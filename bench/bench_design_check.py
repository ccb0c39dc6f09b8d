"""Benchmark: the design check with one compilation against a fresh compilation per replicate.

On the demo clinic panel (default 30 clinics, about 7 quarters each, a within-between
random-intercept model with 7 coefficients) this measures, in one run,

* ``bp.design_check`` end to end for ``--replicates`` replicates (default 100) on
  ``--workers`` threads (default 2): the model is compiled once (nutpie) and every
  replicate swaps the sufficient statistics in the graph; the first replicate pays the
  compilation, which is reported apart;
* the naive route for ``--fresh`` replicates (default 3): build the model on the
  replicate's outcome and compile and sample it from scratch, as a loop of
  ``WithinBetween(panel, formula).sample(sampler="nutpie")`` would;

and prints replicates per second for both and their ratio (one compilation / fresh).
The issue's target is 100 replicates at 30 units within 2 minutes on 2 cores.

Run ``python bench/bench_design_check.py`` (about 2 minutes on 2 cores).
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=30)
    ap.add_argument("--replicates", type=int, default=100)
    ap.add_argument("--fresh", type=int, default=3)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--draws", type=int, default=500)
    args = ap.parse_args(argv)

    import bayespanel as bp
    from bayespanel.analysis.recovery import design_check, simulate_outcome

    warnings.simplefilter("ignore")
    df, truth = bp.datasets.clinic_panel(n_clinics=args.units, seed=7)
    panel = bp.Panel(df, unit=truth["unit"], time=truth["time"])
    formula = truth["formula"]

    model = bp.models.WithinBetween(panel, formula)
    t0 = time.perf_counter()
    design_check(None, model, truth=truth, replicates=2, draws=args.draws, tune=args.draws,
                 progress=False, workers=1)
    first = time.perf_counter() - t0          # compilation + 2 replicates
    t0 = time.perf_counter()
    res = design_check(None, model, truth=truth, replicates=args.replicates, draws=args.draws,
                       tune=args.draws, progress=False, workers=args.workers, seed=2)
    swap = time.perf_counter() - t0
    rate_swap = args.replicates / swap

    M, _, codes = model.rows
    b = np.array([res.truth["coef"][t] for t in model.labels])
    rng = np.random.default_rng(3)
    t0 = time.perf_counter()
    for i in range(args.fresh):
        d = df.copy()
        design = panel.design(formula)
        y = simulate_outcome(M, codes, b, truth["sigma_unit"], truth["sigma_obs"], rng)
        d.loc[design.rows, truth["formula"].split("~")[0].strip()] = y
        fresh = bp.models.WithinBetween(bp.Panel(d, unit=truth["unit"], time=truth["time"]),
                                        formula)
        fresh.sample(draws=args.draws, tune=args.draws, chains=2, seed=i, sampler="nutpie",
                     progress=False)
    naive = time.perf_counter() - t0
    rate_fresh = args.fresh / naive

    print(f"design check, {args.units} units, {len(codes)} rows, {len(model.labels)} "
          f"coefficients, {args.draws} draws x 2 chains per replicate")
    print(f"  first call (compilation + 2 replicates): {first:8.1f} s")
    print(f"  one compilation, {args.replicates} replicates on {args.workers} threads: "
          f"{swap:8.1f} s  ({rate_swap:6.2f} replicates/s)")
    print(f"  fresh build + compile per replicate ({args.fresh}):        "
          f"{naive:8.1f} s  ({rate_fresh:6.2f} replicates/s)")
    print(f"  ratio one compilation / fresh: {rate_swap / rate_fresh:8.1f}x")
    total = first + swap * (1 - 2 / args.replicates)
    print(f"  {args.replicates} replicates from a cold start: about {total:.0f} s "
          f"(target: under 120 s on 2 cores)")


if __name__ == "__main__":
    main()
