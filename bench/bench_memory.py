"""Memory benchmark: peak allocations of the in-memory path, stage by stage.

Tiles the wage panel of Vella and Verbeek (1998) (``linearmodels.datasets``) with
relabelled units to a few sizes, adds columns the formula does not read, and runs in a
fresh interpreter per size, under Python's tracemalloc (numpy reports its buffers to it):

* baseline: a plain numpy copy of the table columns the formula reads (the unavoidable
  1x: ``n_rows * columns * 8`` bytes);
* ``Panel(df)``;
* ``panel.design(formula)``;
* the reference fits on the design: the six estimators, classical and cluster-robust
  (CR1) covariances (all twelve results kept);
* the five Gaussian builders from the design (``design.build``; built, not sampled; all
  kept).

The user's DataFrame is in memory before the measurement starts and is not counted. For
each stage it prints the peak above the start of the path and what is still held after
the stage, both as a ratio to the numeric size and to the baseline of the same run. The
PyMC graph costs a fixed amount that does not grow with the rows, so the last lines give
the per-row part: the growth of each figure between the two largest sizes divided by the
growth of the numeric size. ``--cr2`` adds a CR2 fit of each estimator to the reference
stage (it needs per-unit ``k x k`` blocks, so it is not under the bound; see
docs/memory.md).

Run ``python bench/bench_memory.py`` (sizes 60 and 240 tilings, about 260,000 and
1,050,000 rows; a minute or two) or ``--reps 15,60`` for a quick look.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import textwrap

CHILD = textwrap.dedent("""
    import gc, json, sys, tracemalloc, warnings
    import numpy as np, pandas as pd
    from linearmodels.datasets import wage_panel
    import pymc  # noqa: F401  (imports are not per-row memory)
    import bayespanel as bp
    from bayespanel.reference import ESTIMATORS, fit_design
    warnings.simplefilter("ignore")
    reps, cr2 = int(sys.argv[1]), sys.argv[2] == "1"
    base = wage_panel.load()
    df = pd.concat([base.assign(nr=base["nr"] + 100000 * r) for r in range(reps)],
                   ignore_index=True)
    rng = np.random.default_rng(0)
    for j in range(4):  # columns the formula does not read
        df[f"extra{j}"] = rng.normal(size=len(df))
    df["label"] = "x"
    used = ["lwage", "exper", "expersq", "union", "married", "hours"]
    formula = "lwage ~ exper + expersq + union + married + hours"
    builders = [bp.models.RandomIntercept, bp.models.WithinBetween,
                bp.models.CorrelatedEffects, bp.models.Pooled, bp.models.FixedEffects]
    # warm-up on a small panel: lazy imports and caches are not per-row memory
    small = bp.Panel(base, "nr", "year")
    d0 = small.design(formula)
    for est in ESTIMATORS:
        fit_design(d0, est, cov="cluster")
    for B in builders:
        d0.build(B) if hasattr(d0, "build") else B(small, formula)
    del small, d0
    # the compiled kernels of the pass (numba and its on-disk cache load once per
    # process; panels under 50,000 rows stay in numpy): fixed, not per-row memory
    warm = pd.concat([base.assign(nr=base["nr"] + 100000 * r) for r in range(12)],
                     ignore_index=True)
    bp.Panel(warm, "nr", "year").design(formula)
    del warm
    size = len(df) * len(used) * 8
    out = {"rows": len(df), "numeric_mb": size / 2**20, "stages": []}
    gc.collect()

    def baseline():
        Z = np.empty((len(df), len(used)))
        for j, c in enumerate(used):
            Z[:, j] = df[c].to_numpy(dtype=float)
        return Z

    def stage(name, fn):
        tracemalloc.reset_peak()
        t0 = tracemalloc.get_traced_memory()[0]
        res = fn()
        cur, peak = tracemalloc.get_traced_memory()
        out["stages"].append({"stage": name, "own_peak": (peak - t0) / size,
                              "peak": (peak - start) / size, "kept": (cur - start) / size})
        out["path_peak"] = max(out.get("path_peak", 0.0), (peak - start) / size)
        return res

    tracemalloc.start()
    start = tracemalloc.get_traced_memory()[0]
    Z = stage("baseline", baseline)
    del Z
    gc.collect()
    start = tracemalloc.get_traced_memory()[0]
    out.pop("path_peak")
    panel = stage("Panel(df)", lambda: bp.Panel(df, "nr", "year"))
    design = stage("panel.design(formula)", lambda: panel.design(formula))
    covs = ("classical", "cluster") + (("cr2",) if cr2 else ())
    refs = stage("reference fits", lambda: [fit_design(design, e, cov=c)
                                            for e in ESTIMATORS for c in covs])
    models = stage("builders", lambda: [design.build(B) if hasattr(design, "build")
                                        else B(panel, formula) for B in builders])
    tracemalloc.stop()
    print(json.dumps(out))
""")


def run(reps: int, cr2: bool) -> dict:
    res = subprocess.run([sys.executable, "-c", CHILD, str(reps), "1" if cr2 else "0"],
                         capture_output=True, text=True)
    if res.returncode != 0:
        sys.stderr.write(res.stderr[-3000:])
        raise SystemExit(f"the measurement at {reps} tilings failed")
    return json.loads(res.stdout.strip().splitlines()[-1])


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--reps", default="60,240",
                    help="comma-separated tilings of the wage panel (4,360 rows each)")
    ap.add_argument("--cr2", action="store_true", help="add CR2 fits to the reference stage")
    args = ap.parse_args(argv)
    reps = [int(r) for r in args.reps.split(",")]
    results = [run(r, args.cr2) for r in reps]
    print("peak = highest allocation above the start of the path, during the stage; kept ="
          " held after it;\nratios to the numeric size n x 6 x 8 bytes (x) and to the plain"
          " numpy copy of the same run (/base)")
    for res in results:
        base = res["stages"][0]["own_peak"]
        print(f"\n{res['rows']:,} rows, numeric size {res['numeric_mb']:.1f} MB, baseline "
              f"{base:.2f}x")
        print(f"{'stage':<24}{'peak x':>8}{'/base':>7}{'kept x':>8}{'own peak x':>12}")
        for s in res["stages"][1:]:
            print(f"{s['stage']:<24}{s['peak']:>8.2f}{s['peak'] / base:>7.2f}"
                  f"{s['kept']:>8.2f}{s['own_peak']:>12.2f}")
        print(f"{'whole path':<24}{res['path_peak']:>8.2f}{res['path_peak'] / base:>7.2f}")
    if len(results) >= 2:
        a, b = results[-2], results[-1]
        grow = b["numeric_mb"] - a["numeric_mb"]
        print(f"\nper-row part (growth between {a['rows']:,} and {b['rows']:,} rows over the "
              "growth of the numeric size):")
        for sa, sb in zip(a["stages"][1:], b["stages"][1:]):
            dp = (sb["peak"] * b["numeric_mb"] - sa["peak"] * a["numeric_mb"]) / grow
            dk = (sb["kept"] * b["numeric_mb"] - sa["kept"] * a["numeric_mb"]) / grow
            print(f"{sa['stage']:<24} peak {dp:5.2f}x  kept {dk:5.2f}x")
        dp = (b["path_peak"] * b["numeric_mb"] - a["path_peak"] * a["numeric_mb"]) / grow
        print(f"{'whole path':<24} peak {dp:5.2f}x")


if __name__ == "__main__":
    main()
