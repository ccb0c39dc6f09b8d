"""A dynamic panel: last quarter's waiting list and its initial conditions.

Scenario (simulated, our own): 150 clinics over 10 quarters. A clinic's waiting list
carries over from one quarter to the next (lag coefficient 0.6), each extra nurse per
1,000 patients shortens it by 0.8, and clinics differ in a lasting level of demand that
also shows in their first recorded waiting list and in their staffing. Some clinics
missed a quarter (a gap: the lag is not taken across it).

Three estimates of the lag coefficient on the same rows:

- the initial-conditions model (bayespanel's default with ``lag(y)`` among the covariates,
  Wooldridge 2005): the clinic's level depends on its first waiting list and its mean
  staffing; its interval should cover 0.6;
- pooled least squares: the clinic's lasting level sits in the error and loads on last
  quarter's list, biased upward;
- fixed effects (the within estimator): biased downward in short panels (Nickell 1981),
  about -(1 + 0.6)/(T - 1) to first order.

Run: python examples/dynamic_panel.py
"""

import warnings

import numpy as np
import pandas as pd

import bayespanel as bp
from bayespanel.bayes import RandomIntercept

try:
    from _common import sampling
except ImportError:
    from examples._common import sampling

TRUE_LAG, TRUE_NURSES = 0.6, -0.8


def simulate(seed: int = 17, clinics: int = 150, quarters: int = 10) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    level = rng.normal(0.0, 1.0, clinics)                      # lasting demand
    rows = []
    for c in range(clinics):
        nurses = rng.normal(0.0, 1.0, quarters) - 0.4 * level[c]
        wait = (level[c] + TRUE_NURSES * -0.4 * level[c]) / (1 - TRUE_LAG) + rng.normal()
        rows.append((c, 1, wait, nurses[0]))
        for q in range(1, quarters):
            wait = TRUE_LAG * wait + TRUE_NURSES * nurses[q] + level[c] + rng.normal()
            rows.append((c, q + 1, wait, nurses[q]))
    df = pd.DataFrame(rows, columns=["clinic", "quarter", "wait", "nurses"])
    missed = rng.random(len(df)) < 0.03                        # a few missed quarters
    return df[~missed].reset_index(drop=True)


def main(out=None):
    df = simulate()
    panel = bp.Panel(df, unit="clinic", time="quarter")
    formula = "wait ~ lag(wait) + nurses"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        design = panel.design(formula)                  # initial conditions by default
        post = RandomIntercept(panel, formula).sample(**sampling())
        plain = panel.design(formula, initial_conditions=False)
    pooled = bp.reference.pooled(plain, cov="cluster")
    within = bp.reference.within(plain, cov="cluster")
    print(design.lags.message())
    print("Columns of the initial-conditions model:", ", ".join(design.terms))
    T = float(np.mean(design.T))
    rows = []
    lo, hi = post.interval(0.95).loc["lag(wait)"]
    rows.append(("initial conditions (posterior mean, 95% interval)",
                 post.coef["lag(wait)"], lo, hi))
    for name, res in (("pooled least squares", pooled), ("fixed effects (within)", within)):
        lo, hi = res.interval(0.95).loc["lag(wait)"]
        rows.append((name, res.coef["lag(wait)"], lo, hi))
    table = pd.DataFrame(rows, columns=["estimate of the lag", "value", "lower", "upper"])
    table["bias"] = table["value"] - TRUE_LAG
    print(f"True lag coefficient {TRUE_LAG}; Nickell's first-order bias of the within "
          f"estimator -(1 + {TRUE_LAG})/(T - 1) = {-(1 + TRUE_LAG) / (T - 1):.3f} "
          f"(T = {T:.1f} estimation quarters per clinic)")
    print(table.round(3).to_string(index=False))
    print(post.table().round(3).to_string())
    notes = sorted({str(w.message) for w in caught if "initial" in str(w.message).lower()
                    or "Nickell" in str(w.message)})
    return {"posterior": post, "pooled": pooled, "within": within, "table": table,
            "design": design, "data": df, "notes": notes}


if __name__ == "__main__":
    main()
