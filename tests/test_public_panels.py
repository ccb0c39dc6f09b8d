"""The whole job on public panels the other tests do not use (issue 15): occasion effects
with the within-between and Mundlak kinds, covariates without between variation, and
transformed outcomes.

Outside sources, named beside each check:

* the state production panel of Munnell (1990), 48 states 1970-1986, shipped by
  linearmodels.datasets (``munnell``);
* the wage panel of Vella and Verbeek (1998), shipped by linearmodels.datasets;
* two-way fixed effects by least squares with state and year dummies (statsmodels OLS);
* the identity that in a balanced panel the hybrid model's within coefficients equal the
  two-way fixed-effects ones when the occasion indicators enter (their unit means are all
  equal; Mundlak 1978, Wooldridge 2019, Journal of Econometrics 211, 137-150).
"""

import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.analysis.partition import reference_partition

MUNNELL = "gsp ~ log(pcap) + log(pc) + log(emp) + unemp"
SLOPES = ["log(pcap)", "log(pc)", "log(emp)", "unemp"]


def munnell_frame() -> pd.DataFrame:
    """Munnell's state production panel as shipped by linearmodels, with lower-case names."""
    from linearmodels.datasets import munnell

    df = munnell.load()
    df.columns = [c.lower() for c in df.columns]
    return df.rename(columns={"yr": "year", "p_cap": "pcap"})


@pytest.fixture(scope="module")
def munnell():
    return munnell_frame()


@pytest.fixture(scope="module")
def munnell_panel(munnell):
    return bp.Panel(munnell, unit="state", time="year")


@pytest.fixture(scope="module")
def two_way_ols(munnell):
    """Two-way fixed effects: least squares with state and year dummies (statsmodels)."""
    import statsmodels.formula.api as smf

    d = munnell.assign(lpcap=np.log(munnell["pcap"]), lpc=np.log(munnell["pc"]),
                       lemp=np.log(munnell["emp"]))
    return smf.ols("gsp ~ lpcap + lpc + lemp + unemp + C(state) + C(year)", data=d).fit()


@pytest.fixture(scope="module")
def hybrid_ref(munnell_panel):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return (bp.reference.within_between(munnell_panel, MUNNELL, occasion_effects=True),
                bp.reference.mundlak(munnell_panel, MUNNELL, occasion_effects=True))


def test_occasion_indicators_have_no_between_part_in_a_balanced_panel(munnell_panel):
    d = munnell_panel.design(MUNNELL, occasion_effects=True)
    labels = d.labels("within_between")
    assert "occasion[1971] (within)" in labels
    assert not any(lab.startswith("occasion[") and lab.endswith("(between)") for lab in labels)
    assert not any(lab.startswith("occasion[") for lab in d.labels("mundlak")
                   if lab.endswith("(unit mean)"))


def test_hybrid_partition_with_occasion_effects_matches_two_way_ols(hybrid_ref, two_way_ols,
                                                                     munnell):
    wb, mk = hybrid_ref
    ols = two_way_ols
    # outside check: the hybrid within slopes equal two-way fixed effects (statsmodels OLS
    # with state and year dummies) in this balanced panel
    for t, o in zip(SLOPES, ("lpcap", "lpc", "lemp", "unemp")):
        assert wb.coef[f"{t} (within)"] == pytest.approx(ols.params[o], rel=1e-8)
    for yr in range(1971, 1987):
        assert wb.coef[f"occasion[{yr}] (within)"] == pytest.approx(
            ols.params[f"C(year)[T.{yr}]"], rel=1e-7, abs=1e-6)
    part = reference_partition(wb)  # raised KeyError 'occasion[1971] (between)' before
    # outside check: the within part of the linear predictor is the two-way OLS fit of the
    # slopes and year dummies, unit-demeaned; its variance over rows (divisor n)
    d = munnell.assign(lpcap=np.log(munnell["pcap"]), lpc=np.log(munnell["pc"]),
                       lemp=np.log(munnell["emp"]))
    fit = d[["lpcap", "lpc", "lemp", "unemp"]].to_numpy() @ ols.params[
        ["lpcap", "lpc", "lemp", "unemp"]].to_numpy()
    fit = fit + np.array([ols.params.get(f"C(year)[T.{y}]", 0.0) for y in d["year"]])
    fit = fit - pd.Series(fit).groupby(d["state"].to_numpy()).transform("mean").to_numpy()
    assert part["variance: within part"][0] == pytest.approx(np.var(fit), rel=1e-7)
    # the Mundlak fit is a reparametrisation of the hybrid one: the same partition
    # (published identity, Mundlak 1978)
    other = reference_partition(mk)
    for q in ("variance: within part", "variance: between part", "ICC",
              "total: between part", "within: within part"):
        assert other[q][0] == pytest.approx(part[q][0], rel=1e-7), q


@pytest.fixture(scope="module")
def hybrid_post(munnell_panel):
    m = bp.WithinBetween(munnell_panel, MUNNELL, occasion_effects=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return m.sample(draws=150, tune=150, chains=2, seed=3, progress=False)


def test_hybrid_posterior_partition_and_contrasts_with_occasion_effects(hybrid_post,
                                                                         hybrid_ref):
    wb, _ = hybrid_ref
    pr = hybrid_post.variance_partition(reference=wb)  # the KeyError of issue 15
    tab = pr.table()
    # the plug-in column is the reference fit's own partition
    assert tab.at["ICC", "reference"] == pytest.approx(reference_partition(wb)["ICC"][0])
    shares = tab.loc[["total: within part", "total: between part", "total: unit intercepts",
                      "total: occasion residual"], "mean"]
    assert shares.sum() == pytest.approx(1.0, abs=1e-9)  # identity of the split
    cr = hybrid_post.contrasts(reference=wb)
    ct = cr.table()
    # one contrast per covariate with a between part; occasion indicators have none
    assert list(ct.index) == SLOPES
    for t in SLOPES:  # reference contrast = between minus within of the GLS fit
        assert ct.at[t, "reference estimate"] == pytest.approx(
            wb.coef[f"{t} (between)"] - wb.coef[f"{t} (within)"], rel=1e-9)
    assert set(cr.tests) == {"Hausman (classical)", "Mundlak (cluster-robust)"}
    assert cr.tests["Mundlak (cluster-robust)"].df == len(SLOPES)


def test_design_check_maps_true_occasion_effects_onto_the_hybrid_terms(munnell_panel,
                                                                        two_way_ols):
    ols = two_way_ols
    # true values: the two-way OLS slopes and year effects (statsmodels), the same within
    # and between units
    slopes = dict(zip(SLOPES, ols.params[["lpcap", "lpc", "lemp", "unemp"]]))
    years = {f"occasion[{y}]": float(ols.params[f"C(year)[T.{y}]"]) for y in range(1971, 1987)}
    truth = {"intercept": 0.0, "within": slopes, "between": slopes, "occasion": years,
             "sigma_unit": 3000.0, "sigma_obs": 1000.0}
    res = bp.design_check(munnell_panel, "WithinBetween", MUNNELL, truth=truth,
                          replicates=20, bayes=False, occasion_effects=True, progress=False)
    tab = res.table().loc["reference"]
    for y in (1975, 1986):  # failed before: "truth has no value for 'occasion[1971] (within)'"
        row = tab.loc[f"occasion[{y}] (within)"]
        assert row["truth"] == pytest.approx(years[f"occasion[{y}]"])
        assert abs(row["bias"]) < 4 * row["rmse"] / np.sqrt(20)
    assert tab.loc["unemp (between - within)", "truth"] == 0.0


LOG_MUNNELL = "log(gsp) ~ log(pcap) + log(pc) + log(emp) + unemp"


def test_transformed_outcome_matches_ols_on_the_transformed_column(munnell_panel, munnell):
    import statsmodels.formula.api as smf
    from linearmodels.panel import PanelOLS

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pooled = bp.reference.pooled(munnell_panel, LOG_MUNNELL)
        within = bp.reference.within(munnell_panel, LOG_MUNNELL)
    # refused before: "the outcome 'log(gsp)' ... must be a single column of the table"
    assert pooled.design.outcome == "log(gsp)"  # the label as written
    # outside check: statsmodels OLS on the logged column
    ols = smf.ols("np.log(gsp) ~ np.log(pcap) + np.log(pc) + np.log(emp) + unemp",
                  data=munnell).fit()
    np.testing.assert_allclose(pooled.coef.to_numpy(), ols.params.to_numpy(), rtol=1e-9)
    np.testing.assert_allclose(pooled.sigma_obs, np.sqrt(ols.scale), rtol=1e-9)
    # outside check: linearmodels PanelOLS (entity effects) on the logged column
    d = munnell.set_index(["state", "year"])
    x = np.log(d[["pcap", "pc", "emp"]]).assign(unemp=d["unemp"])
    fe = PanelOLS(np.log(d["gsp"]), x, entity_effects=True).fit()
    np.testing.assert_allclose(within.coef.to_numpy(), fe.params.to_numpy(), rtol=1e-8)


def test_transformed_outcome_on_the_dask_path_equals_memory(munnell, munnell_panel, tmp_path):
    path = tmp_path / "munnell.parquet"
    munnell.to_parquet(path)
    p = bp.Panel.from_parquet(str(path), unit="state", time="year", engine="dask",
                              client="synchronous")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        dask = bp.reference.fit_design(p.design("I(gsp / emp) ~ log(pcap) + unemp"), "random",
                                       method="swamy-arora")
        mem = bp.reference.random(munnell_panel, "I(gsp / emp) ~ log(pcap) + unemp")
    assert p.design("I(gsp / emp) ~ unemp").outcome == "I(gsp / emp)"
    np.testing.assert_allclose(dask.coef.to_numpy(), mem.coef.to_numpy(), rtol=1e-9)
    # outside check: linearmodels RandomEffects on the ratio column (balanced panel:
    # Swamy-Arora variance components)
    from linearmodels.panel import RandomEffects

    d = munnell.set_index(["state", "year"])
    re = RandomEffects(d["gsp"] / d["emp"], pd.DataFrame(
        {"const": 1.0, "lp": np.log(d["pcap"]), "unemp": d["unemp"]})).fit()
    np.testing.assert_allclose(mem.coef.to_numpy(), re.params.to_numpy(), rtol=1e-6)


@pytest.mark.parametrize("formula, needle", [
    ("log(gsp) ~ unemp", "log(gsp)' is not finite"),          # a zero in the column
    ("gsp / emp ~ unemp", "write it inside I(...)"),          # nesting, not division
    ("C(gsp) ~ unemp", "C() makes several columns"),
])
def test_transformed_outcome_refusals_name_the_problem(munnell, formula, needle):
    from bayespanel.core.errors import BayespanelError

    d = munnell.copy()
    d.loc[5, "gsp"] = 0
    with pytest.raises(BayespanelError, match=None) as e:
        bp.Panel(d, unit="state", time="year").design(formula)
    assert needle in str(e.value)
    if "finite" in needle:
        assert "state='ALABAMA', year=1975" in str(e.value)


def test_glm_mundlak_test_is_skipped_with_its_reason_and_nothing_fails(wage_panel):
    import statsmodels.api as sm

    from bayespanel.app.runner import Settings, run

    s = Settings(unit="nr", time="year", formula="union ~ I(year - 1980)", family="bernoulli",
                 models=(), reference=("pooled",))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run(s, df=wage_panel, quiet=True)
    # years since 1980: the same schedule for every worker, so no between variation
    [test] = res["tests"]
    assert test["p_value"] is None and "same unit mean of 'I(year - 1980)'" in test["skipped"]
    assert "failed" not in res and res["comparison"] is None  # nothing to score: no failure
    # outside check: the pooled logit reference is statsmodels' Logit
    x = sm.add_constant((wage_panel["year"] - 1980).astype(float).to_numpy())
    logit = sm.Logit(wage_panel["union"].to_numpy(), x).fit(disp=0)
    got = [c["estimate"] for c in res["reference"][0]["coefficients"]]
    np.testing.assert_allclose(got, logit.params, rtol=1e-7)


def test_hausman_rank_and_the_units_used_on_jobtraining(tmp_path):
    from linearmodels.datasets import jobtraining
    from linearmodels.panel import PanelOLS, RandomEffects

    from bayespanel.app.runner import Settings, run

    df = jobtraining.load()
    s = Settings(unit="fcode", time="year", formula="lscrap ~ d88 + d89 + grant + grant_1",
                 models=(), reference=("within",))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run(s, df=df, out=tmp_path, quiet=True)
    hausman = next(t for t in res["tests"] if t["name"] == "hausman")
    # outside check: the Hausman statistic from linearmodels' PanelOLS and RandomEffects
    # (classical covariances; 54 firms with lscrap in all three years, a balanced sample),
    # with the generalised inverse on the positive part of V_fe - V_re (Hausman 1978)
    d = df.dropna(subset=["lscrap"]).set_index(["fcode", "year"])
    x = d[["d88", "d89", "grant", "grant_1"]]
    fe = PanelOLS(d["lscrap"], x, entity_effects=True).fit()
    re = RandomEffects(d["lscrap"], x.assign(const=1.0)).fit()
    cols = list(x.columns)
    b = (fe.params[cols] - re.params[cols]).to_numpy()
    lam, vec = np.linalg.eigh((fe.cov.loc[cols, cols] - re.cov.loc[cols, cols]).to_numpy())
    pos = lam > 1e-10 * np.abs(lam).max()
    stat = float(np.sum((vec.T @ b)[pos] ** 2 / lam[pos]))
    assert hausman["df"] == pos.sum() < len(cols)
    assert hausman["statistic"] == pytest.approx(stat, rel=1e-5)
    assert f"on {int(pos.sum())} of 4 df" in hausman["conclusion"]  # said beside the reading
    # the first screen counts the units of the estimation sample (54 of the 157 firms)
    html = (tmp_path / "report.html").read_text("utf-8")
    assert "<b>54</b><small>units used (fcode)</small>" in html
