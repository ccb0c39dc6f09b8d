"""Outside checks of the Bayesian random-intercept model (issue 4).

* marginal likelihood vs. latent intercepts: the same posterior (simulated panel with
  known truth; agreement within Monte Carlo error);
* bambi's random-intercept fit with the same priors on a subset of the wage panel
  (Vella and Verbeek 1998, linearmodels.datasets.wage_panel);
* with flat priors the posterior mode equals the ML random-effects fit of statsmodels
  MixedLM and of bayespanel.reference.random(method="ml");
* simulation-based calibration (Talts, Betancourt, Simpson, Vehtari and Gelman 2018,
  arXiv:1804.06788): ranks of the true values among posterior draws are uniform
  (chi-square test), one compiled model reused through ``set_suffstats``.
"""

import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.optimize
import scipy.stats

import bayespanel as bp
from bayespanel.core import suffstats
from bayespanel.bayes import Prior, RandomIntercept

FLAT = {"Intercept": "flat", "coef": "flat", "sigma_obs": "half_flat", "sigma_unit": "half_flat"}


def _simulated(n_units=40, seed=11):
    """A small unbalanced panel with known truth (invented data for a simulation check)."""
    rng = np.random.default_rng(seed)
    T = rng.integers(3, 7, size=n_units)
    codes = np.repeat(np.arange(n_units), T)
    xbar = rng.normal(size=n_units)
    df = pd.DataFrame({"unit": codes, "occ": np.concatenate([np.arange(t) for t in T]),
                       "x": xbar[codes] + rng.normal(size=len(codes)),
                       "z": rng.normal(size=n_units)[codes]})
    df["y"] = (1.0 + 0.6 * df["x"] - 0.4 * df["z"] + rng.normal(0, 0.9, n_units)[codes]
               + rng.normal(0, 0.7, len(df)))
    return bp.Panel(df, unit="unit", time="occ")


def _mc_z(a, b):
    """|difference of posterior means| in units of its Monte Carlo standard error."""
    import arviz_stats as azs

    se2 = sum(x.std() ** 2 / float(azs.ess(x, method="mean")) for x in (a, b))
    return abs(a.mean() - b.mean()) / np.sqrt(se2)


def test_marginal_equals_latent_posterior():
    # Source: the same model written with one non-centred latent intercept per unit
    # (row-level likelihood, the plain PyMC graph) must give the same posterior.
    panel = _simulated()
    kw = dict(draws=600, tune=600, chains=2, seed=5, progress=False, sampler="pymc")
    marg = RandomIntercept(panel, "y ~ x + z").sample(**kw)
    lat_model = RandomIntercept(panel, "y ~ x + z", likelihood="latent")
    lat = lat_model.sample(**kw)
    assert "unit_std" in lat.idata["posterior"] and "unit_std" not in marg.idata["posterior"]
    for name in marg.parameter_names:
        a, b = marg.draws(name), lat.draws(name)
        assert _mc_z(a, b) < 4.0, name
        assert a.std() / b.std() == pytest.approx(1.0, abs=0.15), name
    # the latent graph's own intercepts against the exact conditional draws
    u_graph = lat.draws("unit_effect").mean(axis=(0, 1))
    u_cond = marg.unit_effects().mean(("chain", "draw")).values
    assert np.abs(u_graph - u_cond).max() < 0.12


def test_agrees_with_bambi_on_wage_panel(wage_panel):
    # Source: bambi 0.21 random-intercept model "(1|nr)" with the same priors, fitted by
    # PyMC's NUTS; agreement within Monte Carlo error. Our intercept prior is stated on the
    # centred intercept; both are made so wide (sd 10 on log wages) that it cannot matter.
    bmb = pytest.importorskip("bambi")
    keep = np.sort(wage_panel["nr"].unique())[:80]
    df = wage_panel[wage_panel["nr"].isin(keep)].reset_index(drop=True)
    priors = {"Intercept": Prior("normal", mu=0, sigma=10), "coef": Prior("normal", mu=0, sigma=1),
              "sigma_obs": Prior("half_normal", scale=1), "sigma_unit": Prior("half_normal", scale=1)}
    ours = RandomIntercept(bp.Panel(df, unit="nr", time="year"), "lwage ~ exper + union",
                           priors=priors).sample(draws=600, tune=600, chains=2, seed=2,
                                                 progress=False)
    bpriors = {"Intercept": bmb.Prior("Normal", mu=0, sigma=10),
               "exper": bmb.Prior("Normal", mu=0, sigma=1),
               "union": bmb.Prior("Normal", mu=0, sigma=1),
               "1|nr": bmb.Prior("Normal", mu=0, sigma=bmb.Prior("HalfNormal", sigma=1)),
               "sigma": bmb.Prior("HalfNormal", sigma=1)}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = bmb.Model("lwage ~ exper + union + (1|nr)", df, priors=bpriors)
        ref = model.fit(draws=600, tune=600, chains=2, random_seed=2, progressbar=False,
                        inference_method="pymc")
    rp = ref["posterior"] if "posterior" in getattr(ref, "children", {}) else ref.posterior
    pairs = {"Intercept": "Intercept", "exper": "exper", "union": "union",
             "sigma_obs": "sigma", "sigma_unit": "1|nr_sigma"}
    for ours_name, ref_name in pairs.items():
        a = ours.draws(ours_name)
        b = np.asarray(rp[ref_name].values)
        assert _mc_z(a, b) < 4.0, ours_name
        assert a.std() / b.std() == pytest.approx(1.0, abs=0.2), ours_name


def _mode(model):
    """Posterior mode on the original parameter scale (no Jacobian: flat priors on b,
    sigma and tau make it the maximum of the likelihood in those parameters)."""
    pm_model = model.pymc_model
    logp = pm_model.compile_logp(jacobian=False)
    dlogp = pm_model.compile_dlogp(jacobian=False)
    names = [v.name for v in pm_model.value_vars]
    sizes = [int(np.prod(pm_model.initial_point()[n].shape)) for n in names]

    def unpack(x):
        out, i = {}, 0
        for n, s in zip(names, sizes):
            out[n] = x[i:i + s].reshape(pm_model.initial_point()[n].shape)
            i += s
        return out

    x0 = np.concatenate([np.ravel(v) for v in pm_model.initial_point().values()])
    res = scipy.optimize.minimize(lambda x: -float(logp(unpack(x))), x0,
                                  jac=lambda x: -np.asarray(dlogp(unpack(x))), method="BFGS",
                                  options={"gtol": 1e-9, "maxiter": 2000})
    pt = unpack(res.x)
    A, a0 = model.scaling.coef_map()
    sy = model.scaling.scale_y
    return (A @ pt["coef_std"] + a0, sy * np.exp(pt["sigma_obs_std_log__"]),
            sy * np.exp(pt["sigma_unit_std_log__"]))


def test_flat_prior_mode_is_ml_random_effects(wage_panel):
    # Sources: statsmodels MixedLM (reml=False) and bayespanel.reference.random(method="ml")
    # (issue 3, closed form profile likelihood).
    import statsmodels.formula.api as smf

    keep = np.sort(wage_panel["nr"].unique())[:150]
    df = wage_panel[wage_panel["nr"].isin(keep)].reset_index(drop=True)
    formula = "lwage ~ exper + expersq + union + married + educ"
    panel = bp.Panel(df, unit="nr", time="year")
    model = RandomIntercept(panel, formula, priors=FLAT)
    b, sigma, tau = _mode(model)
    ml = smf.mixedlm(formula, df, groups=df["nr"]).fit(reml=False, method="bfgs", gtol=1e-10)
    np.testing.assert_allclose(b, ml.fe_params.to_numpy(), rtol=1e-4, atol=1e-6)
    assert sigma == pytest.approx(np.sqrt(ml.scale), rel=1e-4)
    assert tau == pytest.approx(np.sqrt(ml.cov_re.iloc[0, 0]), rel=1e-3)
    ref = getattr(getattr(bp, "reference", None), "random", None)
    if ref is not None:
        r = ref(panel, formula, method="ml")
        np.testing.assert_allclose(b, r.coef.loc[model.labels].to_numpy(), rtol=1e-5, atol=1e-8)
        assert sigma == pytest.approx(r.sigma_obs, rel=1e-5)
        assert tau == pytest.approx(r.sigma_unit, rel=1e-4)


@pytest.mark.slow
@pytest.mark.parametrize("sampler", ["nutpie", "bayespanel"])
def test_simulation_based_calibration(sampler):
    # Source: Talts et al. (2018), simulation-based calibration: for truths drawn from the
    # prior and data from the model, the rank of each truth among L posterior draws is
    # uniform on 0..L. Chi-square test on 5 bins of 50 ranks per parameter. One compiled
    # model is reused (set_suffstats swaps the data; nutpie keeps its compilation, and
    # bayespanel's sampler the compiled log density). Both samplers that run the
    # marginal models by default are checked.
    if sampler == "nutpie":
        pytest.importorskip("nutpie")
    rng = np.random.default_rng(20180406)
    T = np.array([2, 3, 4, 5, 3, 4, 6, 2, 5, 4])
    codes = np.repeat(np.arange(len(T)), T)
    n = len(codes)
    X = np.column_stack([np.ones(n), rng.normal(size=n) + rng.normal(size=len(T))[codes],
                         rng.normal(size=len(T))[codes]])
    labels = ["Intercept", "x", "z"]
    priors = {"Intercept": Prior("normal", mu=0, sigma=1), "coef": Prior("normal", mu=0, sigma=1),
              "sigma_obs": Prior("half_normal", scale=1), "sigma_unit": Prior("half_normal", scale=1)}
    c = X.mean(axis=0)

    def draw_truth():
        q, bx, bz = rng.normal(size=3)  # q: the centred intercept, as the prior states it
        b = np.array([q - bx * c[1] - bz * c[2], bx, bz])
        return b, abs(rng.normal()), abs(rng.normal())

    def simulate(b, sigma, tau):
        return X @ b + tau * rng.normal(size=len(T))[codes] + sigma * rng.normal(size=n)

    b0, s0, t0 = draw_truth()
    model = RandomIntercept.from_suffstats(suffstats.compute(X, simulate(b0, s0, t0), codes),
                                           labels, priors=priors)
    reps, thin = 50, 3
    ranks = {name: [] for name in labels + ["sigma_obs", "sigma_unit"]}
    graph, compiled = model.pymc_model, []
    for r in range(reps):
        b, sigma, tau = draw_truth()
        model.set_suffstats(suffstats.compute(X, simulate(b, sigma, tau), codes))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            post = model.sample(draws=300, tune=300, chains=2, seed=r, sampler=sampler,
                                progress=False, target_accept=0.9)
        compiled.append(model._nutpie if sampler == "nutpie" else model._pymc_logp)
        truth = dict(zip(labels, b), sigma_obs=sigma, sigma_unit=tau)
        for name in ranks:
            d = post.draws(name)[:, ::thin].ravel()
            ranks[name].append(int((d < truth[name]).sum()))
    L = 2 * 300 // thin
    for name, rk in ranks.items():
        counts = np.histogram(rk, bins=np.linspace(0, L + 1, 6))[0]
        p = scipy.stats.chisquare(counts).pvalue
        assert p > 0.001, (name, counts)
    # one compilation served every replicate: the graph and the compiled code are unchanged
    assert model.pymc_model is graph and compiled[0] is not None
    assert all(c is compiled[0] for c in compiled)
