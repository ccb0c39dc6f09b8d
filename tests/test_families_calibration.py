"""Recovery of known truth over repeated simulated panels (a small calibration study).

For logit and Poisson within-between models with random intercepts, outcomes are
simulated again and again from fixed true values on the same covariates; the model is
compiled once and only the outcome is swapped (LatentModel.set_data). The 90% posterior
intervals of the within effect, the between effect and the unit SD should cover the
truth at about the nominal rate (Cook, Gelman and Rubin 2006 for the idea; with fixed
truth and weak priors this is the frequentist coverage of the credible intervals, which is
close to nominal here by the Bernstein-von Mises theorem; the bound below is the binomial
99% lower limit for the number of checks, common practice for such tests).
"""

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import bayespanel as bp
from bayespanel.bayes import families as F
from bayespanel.bayes.sampling import nutpie_available

TRUTH = {"Intercept": -0.2, "x (within)": 0.7, "x (between)": 0.2, "sigma_unit": 0.8}
REPS = 6


def _design(n_units=40, n_occ=6, seed=100):
    rng = np.random.default_rng(seed)
    unit = np.repeat(np.arange(n_units), n_occ)
    x = rng.normal(0, 1, n_units)[unit] + rng.normal(0, 1, len(unit))
    return pd.DataFrame({"unit": unit, "occ": np.tile(np.arange(n_occ), n_units), "x": x})


def _outcome(df, family, rng):
    xb = df.groupby("unit")["x"].transform("mean").to_numpy()
    u = rng.normal(0, TRUTH["sigma_unit"], df["unit"].nunique())[df["unit"].to_numpy()]
    eta = (TRUTH["Intercept"] + TRUTH["x (within)"] * (df["x"].to_numpy() - xb)
           + TRUTH["x (between)"] * xb + u)
    return F.simulate(family, rng, eta).astype(float)


@pytest.mark.slow
@pytest.mark.parametrize("family", ["bernoulli", "poisson"])
def test_interval_coverage_over_seeds(family):
    df = _design()
    rng = np.random.default_rng(2024 if family == "bernoulli" else 2025)
    df["y"] = _outcome(df, family, rng)
    panel = bp.Panel(df, unit="unit", time="occ")
    model = bp.models.WithinBetween(panel, "y ~ x", family=family)
    sampler = "nutpie" if nutpie_available() else "pymc"
    hits, checks = 0, 0
    for rep in range(REPS):
        if rep:
            model.set_data(_outcome(df, family, rng))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            post = model.sample(draws=200, tune=250, chains=2, seed=rep, progress=False,
                                sampler=sampler)
        for name, true in TRUTH.items():
            if name == "Intercept":
                continue
            d = post.draws(name).ravel()
            lo, hi = np.quantile(d, [0.05, 0.95])
            hits += lo <= true <= hi
            checks += 1
    # nominal 90%: the lower 1% binomial quantile of the hit count (common practice)
    assert hits >= stats.binom(checks, 0.9).ppf(0.01), (hits, checks)
