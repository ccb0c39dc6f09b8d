"""The AR(1) model's within-slope posterior SD against the CR2 standard error, on two
public panels (issue 17; the ratios are recorded in docs/serial-correlation.md).

    .venv/bin/python bench/ar1_real_panels.py        # a few minutes

Data: statsmodels' Grunfeld investment panel (all 11 firms as shipped, ``invest ~ value +
capital``) and linearmodels' wage panel (Vella and Verbeek 1998, ``lwage ~ exper +
expersq + union + married + hours``; exper rises by one each year, so within units it is
collinear with the unit intercepts' trend and is not compared). Reference: the
fixed-effects fit of bayespanel.reference.within with CR2 standard errors (Bell and
McCaffrey 2002), whose coefficients equal linearmodels' PanelOLS. Each Bayesian model is
fitted with errors="iid" and errors="ar1", 2 chains x 1000 draws, seed 3.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd


def main():
    import bayespanel as bp
    from linearmodels.datasets import wage_panel
    from statsmodels.datasets import grunfeld

    warnings.simplefilter("ignore")
    gr = grunfeld.load_pandas().data.copy()
    gr["year"] = gr["year"].astype(int)
    cases = [("Grunfeld (statsmodels, 11 firms)", gr, "firm", "year",
              "invest ~ value + capital", ["value", "capital"]),
             ("wage panel (linearmodels)", wage_panel.load().copy(), "nr", "year",
              "lwage ~ exper + expersq + union + married + hours",
              ["expersq", "union", "married", "hours"])]
    out = []
    for name, df, unit, time, formula, cols in cases:
        panel = bp.Panel(df, unit=unit, time=time)
        ref = bp.reference.within(panel, formula, cov="cr2")
        for cls in ("FixedEffects", "RandomIntercept"):
            for errors in ("iid", "ar1"):
                model = getattr(bp.models, cls)(panel, formula, errors=errors)
                post = model.sample(draws=1000, tune=1000, chains=2, seed=3, progress=False)
                s = post.summary()
                d = post.diagnostics(warn=False)
                for c in cols:
                    lab = c if c in s.index else f"{c} (within)"
                    out.append(dict(data=name, model=cls, errors=errors, term=c,
                                    mean=s.loc[lab, "mean"], sd=s.loc[lab, "sd"],
                                    ref_coef=float(ref.coef[c]), cr2_se=float(ref.se[c]),
                                    ratio=s.loc[lab, "sd"] / float(ref.se[c]),
                                    rho=s.loc["rho", "mean"] if "rho" in s.index else np.nan,
                                    max_rhat=d["max_rhat"], divergences=d["divergences"]))
    print(pd.DataFrame(out).round(4).to_string())


if __name__ == "__main__":
    main()
