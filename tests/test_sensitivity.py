"""Prior sensitivity: power-scaling (Kallioinen et al. 2024) and refits under unit-SD presets.

Outside sources, named beside each check:

* arviz-stats' own ``psense`` on a DataTree whose log prior is PyMC's
  (``pymc.compute_log_prior``) and whose log-likelihood is scipy's multivariate normal
  density of each unit's rows (covariance ``sigma^2 I + tau^2 J``);
* a conjugate normal model with exact posterior draws (the normal-normal update, a
  published identity), where a tight prior must be flagged and a wide one must not;
* the Grunfeld investment panel shipped by statsmodels.datasets;
* the boundary-avoiding property of the Gamma(2) prior on a standard deviation (its
  density vanishes at zero; Chung et al. 2013, Psychometrika 78), against the half-normal.
"""

import json
import warnings

import numpy as np
import pytest
from scipy import stats

import bayespanel as bp
from bayespanel.analysis import sensitivity as S
from bayespanel.core.errors import SpecificationError

FORMULA = "invest ~ value + capital"


# ------------------------------------------------------------------ conjugate normal
def _conjugate(prior_sd, prior_mean=0.0, n=25, seed=4):
    """Exact posterior draws of mu in y_i ~ N(mu, 1), mu ~ N(prior_mean, prior_sd^2)."""
    rng = np.random.default_rng(seed)
    y = rng.normal(1.0, 1.0, n)
    prec = 1 / prior_sd ** 2 + n
    mean = (prior_mean / prior_sd ** 2 + y.sum()) / prec
    mu = rng.normal(mean, 1 / np.sqrt(prec), (2, 2000))
    log_prior = stats.norm.logpdf(mu, prior_mean, prior_sd)
    log_lik = stats.norm.logpdf(y[None, None, :], mu[..., None], 1.0)      # pointwise
    return mu, log_prior, log_lik


def test_tight_prior_is_flagged_and_wide_prior_is_not():
    # Normal-normal update (exact posterior draws). A prior SD of 0.05 against 25
    # observations of unit SD (data SE 0.2) dominates the posterior; a prior SD of 100
    # leaves it to the data. Threshold 0.05 as suggested by Kallioinen et al. (2024).
    mu, lp, ll = _conjugate(0.05)
    tight = S.power_scaling_arrays({"mu": mu}, lp, ll)
    assert tight.loc["mu", "prior"] >= 0.05
    assert tight.loc["mu", "flag"] != ""
    mu, lp, ll = _conjugate(100.0)
    wide = S.power_scaling_arrays({"mu": mu}, lp, ll)
    assert wide.loc["mu", "prior"] < 0.05
    assert wide.loc["mu", "likelihood"] >= 0.05
    assert wide.loc["mu", "flag"] == ""
    # a tight prior centred away from the data: both sensitivities high (conflict)
    mu, lp, ll = _conjugate(0.2, prior_mean=-1.0)
    conflict = S.power_scaling_arrays({"mu": mu}, lp, ll)
    assert "conflict" in conflict.loc["mu", "flag"]


def test_core_equals_arviz_stats_psense_on_the_same_draws():
    # arviz_stats.psense on a hand-built DataTree of the same conjugate draws
    import arviz_stats as azs
    import xarray as xr

    mu, lp, ll = _conjugate(0.3)
    ours = S.power_scaling_arrays({"mu": mu}, lp, ll)
    dt = xr.DataTree.from_dict({
        "posterior": xr.Dataset({"mu": (("chain", "draw"), mu)}),
        "log_prior": xr.Dataset({"mu": (("chain", "draw"), lp)}),
        "log_likelihood": xr.Dataset({"y": (("chain", "draw", "obs"), ll)})})
    assert ours.loc["mu", "prior"] == pytest.approx(float(azs.psense(dt, group="prior")["mu"]),
                                                    rel=1e-9)
    assert ours.loc["mu", "likelihood"] == pytest.approx(
        float(azs.psense(dt, group="likelihood")["mu"]), rel=1e-9)


# ------------------------------------------------------------------ a panel model
@pytest.fixture(scope="module")
def short_panel(grunfeld):
    return bp.Panel(grunfeld[grunfeld["year"] <= 1940], unit="firm", time="year")


@pytest.fixture(scope="module")
def ri(short_panel):
    m = bp.models.RandomIntercept(short_panel, FORMULA)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        post = m.sample(draws=400, tune=400, chains=2, seed=3, progress=False, sampler="pymc")
    return m, post


def test_panel_sensitivity_equals_arviz_stats_with_pymc_prior_and_scipy_likelihood(ri):
    # Outside pieces: PyMC's log prior of the free variables (pymc.compute_log_prior) and
    # scipy's multivariate normal density of each firm's rows; arviz_stats.psense on them
    # must give our numbers (the log prior differs from ours by a constant Jacobian only).
    import arviz_stats as azs
    import pymc as pm
    import xarray as xr

    model, post = ri
    ours = S.power_scaling(post)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lp = pm.compute_log_prior(post.idata.copy(), model=model.pymc_model,
                                  extend_inferencedata=False, progressbar=False)
    lp_ds = lp if isinstance(lp, xr.Dataset) else lp["log_prior"].to_dataset()
    M, y, codes = model.rows
    b = post.draws("coef")
    su, so = post.draws("sigma_unit"), post.draws("sigma_obs")
    C, D = b.shape[:2]
    units = np.unique(codes)
    ll = np.empty((C, D, len(units)))
    for c in range(C):
        for d in range(D):
            for i in units:
                sel = codes == i
                T = int(sel.sum())
                V = so[c, d] ** 2 * np.eye(T) + su[c, d] ** 2 * np.ones((T, T))
                ll[c, d, i] = stats.multivariate_normal.logpdf(y[sel], M[sel] @ b[c, d], V)
    np.testing.assert_allclose(ll.sum(-1), S.log_likelihood_draws(post), rtol=1e-9)
    post_ds = post.idata["posterior"].to_dataset()
    names = {lab: post_ds["coef"].sel(term=lab).drop_vars("term") for lab in post.labels}
    names.update({k: post_ds[k] for k in ("sigma_unit", "sigma_obs", "icc")})
    dt = xr.DataTree.from_dict({
        "posterior": xr.Dataset(names), "log_prior": lp_ds,
        "log_likelihood": xr.Dataset({"firm_rows": (("chain", "draw", "unit"), ll)},
                                     coords={"chain": post_ds["chain"], "draw": post_ds["draw"]})})
    ref_p = azs.psense(dt, group="prior")
    ref_l = azs.psense(dt, group="likelihood")
    for name in ours.index:
        assert ours.loc[name, "prior"] == pytest.approx(float(ref_p[name]), rel=1e-6, abs=1e-9)
        assert ours.loc[name, "likelihood"] == pytest.approx(float(ref_l[name]), rel=1e-6,
                                                             abs=1e-9)
    # the data carry the slopes: no prior flag on them (40 rows, default weak priors)
    assert (ours.loc[["value", "capital"], "prior"] < 0.05).all()


def test_components_select_the_priors_scaled(ri):
    _, post = ri
    only = S.power_scaling(post, ["sigma_unit"])
    assert only.attrs["components"] == ["sigma_unit"]
    full = S.power_scaling(post)
    # likelihood scaling does not depend on which priors are chosen
    np.testing.assert_allclose(only["likelihood"], full["likelihood"])
    with pytest.raises(SpecificationError, match="components"):
        S.power_scaling(post, ["tau"])


@pytest.fixture(scope="module")
def weak_unit_model(grunfeld):
    """The first four Grunfeld years (statsmodels.datasets) with a simulated outcome whose
    unit SD (5) is small beside the occasion SD (40): the data say little about the unit
    SD near zero, which is where the presets differ."""
    from bayespanel.analysis.recovery import simulate_outcome

    df = grunfeld[grunfeld["year"] <= 1938].copy()
    panel = bp.Panel(df, unit="firm", time="year")
    design = panel.design(FORMULA)
    y = simulate_outcome(design.X, design.unit_codes, np.array([50.0, 0.1, 0.3]), 5.0, 40.0,
                         np.random.default_rng(8))
    df.loc[design.rows, "invest"] = y
    return bp.models.RandomIntercept(bp.Panel(df, unit="firm", time="year"), FORMULA)


@pytest.mark.slow  # two refits
def test_unit_sd_presets_side_by_side(weak_unit_model):
    model = weak_unit_model
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cmp = S.prior_presets(model, ["half_normal", "gamma2"], draws=400, tune=400, chains=2,
                              seed=2, sampler="pymc")
    part = cmp.partition()
    assert list(part.columns.get_level_values(0).unique()) == ["half_normal", "gamma2"]
    assert np.isfinite(part.loc[["unit SD", "occasion SD", "ICC"]].to_numpy()).all()
    assert cmp.posteriors["gamma2"].spec.prior_dict["sigma_unit"].family == "gamma2"
    # Chung et al. (2013): the Gamma(2) prior's density vanishes at zero, so the lower end
    # of the unit SD's interval sits further from zero than under the half-normal
    lo = part.xs("lower", axis=1, level=1).loc["unit SD"]
    assert lo["gamma2"] > lo["half_normal"]
    assert cmp.summary().startswith("Refits under 2 unit-SD priors")
    rec = cmp.to_record()   # the same numbers as the tables, one record per preset and row
    assert rec["presets"] == ["half_normal", "gamma2"] and rec["flags"] == cmp.flags()
    got = {(r["preset"], r["quantity"]): r for r in rec["partition"]}
    assert got[("gamma2", "unit SD")]["lower"] == lo["gamma2"]
    co = cmp.coefficients()
    est = {(r["preset"], r["term"]): r["estimate"] for r in rec["coefficients"]}
    assert est == {(p, t): co.at[t, (p, "mean")] for p in rec["presets"] for t in co.index}
    json.dumps(rec, allow_nan=False)
    tab, fig = S.sensitivity_section(cmp.posteriors["half_normal"], cmp)
    assert "Power-scaling sensitivity" in tab.attrs["summary"]
    import matplotlib.pyplot as plt

    plt.close(fig)


def test_presets_refuse_models_without_unit_sd(short_panel):
    m = bp.models.Pooled(short_panel, FORMULA)
    with pytest.raises(SpecificationError, match="no unit SD"):
        S.prior_presets(m)
    m = bp.models.RandomIntercept(short_panel, FORMULA)
    with pytest.raises(SpecificationError, match="presets"):
        S.prior_presets(m, ["cauchy"])
