"""Few units: the ICC of 12 schools, Bayesian posterior beside the REML estimate.

Scenario (simulated, our own): 12 schools report a reading score for five cohorts; the
true school SD is 2 and the cohort-level SD is 6, so the true ICC is 0.1. With so few
units the REML variance component is noisy and can sit on zero; the posterior of the
random-intercept model with a boundary-avoiding Gamma(2) prior on the school SD (Chung et
al. 2013) keeps the whole range of plausible values in view.

Run: python examples/few_schools_icc.py
"""

import warnings

import numpy as np
import pandas as pd

import bayespanel as bp
from bayespanel.bayes import RandomIntercept

try:
    from _common import sampling
except ImportError:  # run from another folder
    from examples._common import sampling


def simulate(seed: int = 5, n_schools: int = 12, n_cohorts: int = 5) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    school = np.repeat(np.arange(n_schools), n_cohorts)
    cohort = np.tile(np.arange(2019, 2019 + n_cohorts), n_schools)
    spend = rng.normal(10, 2, n_schools)[school] + rng.normal(0, 1, school.size)
    u = rng.normal(0, 2.0, n_schools)[school]
    score = 50 + 0.8 * spend + u + rng.normal(0, 6.0, school.size)
    return pd.DataFrame({"school": [f"S{s:02d}" for s in school], "cohort": cohort,
                         "score": score, "spend": spend})


def main(out=None):
    df = simulate()
    panel = bp.Panel(df, unit="school", time="cohort")
    formula = "score ~ spend"
    reml = bp.reference.random(panel, formula, method="reml")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        post = RandomIntercept(panel, formula, priors={"sigma_unit": "gamma2"}).sample(**sampling())
    vp = post.variance_partition(reference=reml).table(0.9)
    print("True ICC 0.100; REML ICC", f"{reml.icc:.3f}")
    print(vp.loc[["unit SD", "occasion SD", "ICC"], ["median", "lower", "upper", "reference"]]
          .round(3).to_string())
    return {"reml": reml, "posterior": post, "partition": vp, "data": df}


if __name__ == "__main__":
    main()
