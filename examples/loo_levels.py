"""Which LOO level answers which question: new occasions of known units, or new units.

Scenario (simulated, our own): 40 shops over 6 months, sales depend on footfall; shops
differ a lot in their baseline. At the occasion level (predict next month of a known
shop), models that learn each shop's baseline (random intercept, fixed effects) beat the
pooled regression by far. At the unit level (predict a new shop), fixed effects cannot
predict at all (a new shop's baseline is unknown) and are listed with the reason.

Run: python examples/loo_levels.py
"""

import warnings

import numpy as np
import pandas as pd

import bayespanel as bp
from bayespanel.analysis.comparison import compare
from bayespanel.bayes import FixedEffects, RandomIntercept

try:
    from _common import sampling
except ImportError:
    from examples._common import sampling


def simulate(seed: int = 21, shops: int = 40, months: int = 6) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    shop = np.repeat(np.arange(shops), months)
    footfall = rng.normal(100, 15, shop.size)
    sales = 20 + 0.5 * footfall + rng.normal(0, 8, shops)[shop] + rng.normal(0, 4, shop.size)
    return pd.DataFrame({"shop": shop, "month": np.tile(np.arange(months), shops),
                         "sales": sales, "footfall": footfall})


def main(out=None):
    df = simulate()
    panel = bp.Panel(df, unit="shop", time="month")
    formula = "sales ~ footfall"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fits = {"random intercept": RandomIntercept(panel, formula).sample(**sampling()),
                "fixed effects": FixedEffects(panel, formula).sample(**sampling()),
                "pooled OLS (ref.)": bp.reference.pooled(panel, formula)}
        tables = {level: compare(fits, level=level) for level in ("occasion", "unit")}
    for level, t in tables.items():
        print(f"\nLOO at the {level} level")
        print(t[["elpd", "se", "elpd_diff", "se_diff", "method", "note"]].round(2).to_string())
    return {"tables": tables, "data": df, "fits": fits}


if __name__ == "__main__":
    main()
