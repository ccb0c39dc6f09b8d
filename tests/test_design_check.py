"""Design check: replicate outcomes on a real panel structure, refits, coverage and power.

Outside sources, named beside each check:

* the Grunfeld investment panel as shipped by statsmodels.datasets (its firms, years and
  covariate values are the structure every replicate keeps);
* exact coverage of normal intervals from generalised least squares with known variance
  components (Aitken 1935; a published identity: the estimator is exactly normal with
  covariance ``sigma^2 (X' Omega^-1 X)^-1``), and statsmodels' GLS for the same numbers;
* statsmodels' MixedLM (REML) refitted on the very same replicate outcomes, for the share
  of replicates whose unit variance lands on zero.
"""

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import bayespanel as bp
from bayespanel.analysis.recovery import ORACLE, REFERENCE, BAYES, design_check, design_check_section
from bayespanel.core.errors import SpecificationError

FORMULA = "invest ~ value + capital"


@pytest.fixture(scope="module")
def panel(grunfeld):
    return bp.Panel(grunfeld, unit="firm", time="year")


@pytest.fixture(scope="module")
def short_panel(grunfeld):
    """Ten firms over four years: few rows per unit, where the unit variance often
    collapses to zero in frequentist fits."""
    return bp.Panel(grunfeld[grunfeld["year"] <= 1938], unit="firm", time="year")


TRUTH = {"coef": {"Intercept": -40.0, "value": 0.11, "capital": 0.3},
         "sigma_unit": 60.0, "sigma_obs": 50.0}


@pytest.fixture(scope="module")
def closed_form(panel):
    return design_check(panel, "RandomIntercept", FORMULA, truth=TRUTH, replicates=2000,
                        bayes=False, reference=False, progress=False, seed=11)


def test_known_variance_gls_has_exact_coverage(closed_form):
    # Aitken (1935): with known variance components the GLS estimator is exactly normal,
    # so its normal intervals cover with exactly the nominal probability on any design,
    # here the balanced Grunfeld panel (statsmodels.datasets). Tolerance: 3.5 Monte Carlo
    # SE of a binomial share at the nominal rate (Morris, White and Crowther 2019).
    tab = closed_form.table().loc[ORACLE]
    R = closed_form.settings["replicates"]
    for prob in (0.9, 0.95):
        mcse = np.sqrt(prob * (1 - prob) / R)
        cov = tab[f"coverage {round(100 * prob)}%"]
        assert (cov - prob).abs().max() < 3.5 * mcse, cov
        assert (tab[f"mcse {round(100 * prob)}%"] > 0).all()
    # unbiased: mean error within 4 Monte Carlo SE of zero
    rec = closed_form.records
    one = rec[(rec["method"] == ORACLE) & (rec["prob"] == 0.95)]
    for par, g in one.groupby("parameter"):
        err = g["estimate"] - g["truth"]
        assert abs(err.mean()) < 4 * err.std(ddof=1) / np.sqrt(len(err)), par


def test_known_variance_gls_matches_statsmodels(closed_form):
    # statsmodels GLS with the true block covariance sigma_unit^2 J + sigma_obs^2 I gives the
    # same estimate and the same (exact) standard errors on replicate 0.
    import statsmodels.api as sm

    M, codes, labels = closed_form.rows
    y = closed_form.simulate(0)
    V = TRUTH["sigma_obs"] ** 2 * np.eye(len(y)) + TRUTH["sigma_unit"] ** 2 * (
        codes[:, None] == codes[None, :])
    fit = sm.GLS(y, M, sigma=V).fit()
    # with a known covariance the exact SE is sqrt(diag((X' V^-1 X)^-1)), not the
    # residual-rescaled one statsmodels prints by default
    se = np.sqrt(np.diag(np.linalg.inv(M.T @ np.linalg.solve(V, M))))
    rec = closed_form.records
    r0 = rec[(rec["replicate"] == 0) & (rec["method"] == ORACLE) & (rec["prob"] == 0.95)]
    r0 = r0.set_index("parameter").loc[labels]
    np.testing.assert_allclose(r0["estimate"], fit.params, rtol=1e-7)
    half = (r0["upper"] - r0["lower"]) / 2
    np.testing.assert_allclose(half, stats.norm.ppf(0.975) * se, rtol=1e-7)


def test_reference_fit_of_each_replicate_matches_statsmodels_mixedlm(short_panel):
    # Zero-variance frequency against statsmodels MixedLM (REML) on the same replicates.
    # MixedLM is fitted on standardised columns (REML depends on X only through its
    # column space) and with several optimisers, keeping the highest REML likelihood:
    # with a single default optimiser it stops short of the optimum on these data.
    import statsmodels.api as sm

    truth = {"coef": {"Intercept": 50.0, "value": 0.1, "capital": 0.3},
             "sigma_unit": 10.0, "sigma_obs": 40.0}
    res = design_check(short_panel, "RandomIntercept", FORMULA, truth=truth, replicates=30,
                       bayes=False, progress=False, seed=5)
    M, codes, _ = res.rows
    Ms = M.copy()
    Ms[:, 1:] = (M[:, 1:] - M[:, 1:].mean(0)) / M[:, 1:].std(0)
    zero_sm, su_sm = [], []
    for i in range(30):
        y = res.simulate(i)
        ys = (y - y.mean()) / y.std()
        fits = []
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for meth in ("lbfgs", "powell", "nm", "bfgs"):
                try:
                    fits.append(sm.MixedLM(ys, Ms, groups=codes).fit(reml=True, method=meth,
                                                                      maxiter=2000))
                except Exception:  # an optimiser that fails is simply not used
                    pass
        f = max(fits, key=lambda f: f.llf)
        s2u = float(np.asarray(f.cov_re)[0, 0])
        zero_sm.append(s2u < 1e-4 * f.scale)
        su_sm.append(np.sqrt(max(s2u, 0.0)) * y.std())
    ours = res.replicate_info["reference_sigma_unit"].to_numpy()
    zero_sm = np.array(zero_sm)
    assert 0.1 < zero_sm.mean() < 0.9  # the design is one where the boundary matters
    np.testing.assert_array_equal(ours == 0.0, zero_sm)
    assert res.zero_variance_share() == pytest.approx(zero_sm.mean())
    pos = ~zero_sm
    np.testing.assert_allclose(ours[pos], np.array(su_sm)[pos], rtol=1e-2)
    assert res.table().loc[(REFERENCE, "sigma_unit"), "zero unit variance"] == \
        pytest.approx(zero_sm.mean())


def test_power_for_a_within_between_difference(demo):
    # Power of the known-variance GLS Wald test of the contrast has the closed form
    # Phi(d/se - z) + Phi(-d/se - z) (normal theory; the contrast is exactly normal).
    df, truth = demo
    panel = bp.Panel(df, unit=truth["unit"], time=truth["time"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = design_check(panel, "WithinBetween", truth["formula"], truth=truth,
                           replicates=600, bayes=False, reference=False, progress=False,
                           seed=3,
                           difference={"staffing": 1.5})
    tab = res.table()
    row = tab.loc[(ORACLE, "staffing (between - within)")]
    assert row["truth"] == pytest.approx(1.5)
    assert tab.loc[(ORACLE, "staffing (between)"), "truth"] == pytest.approx(3.0)
    se = (res.records.query("method == @ORACLE and parameter == 'staffing (between - within)' "
                            "and prob == 0.95").eval("(upper - lower) / 2").median()
          / stats.norm.ppf(0.975))
    z = stats.norm.ppf(0.975)
    power = stats.norm.cdf(1.5 / se - z) + stats.norm.cdf(-1.5 / se - z)
    mc = np.sqrt(power * (1 - power) / 600)
    assert abs(row["excludes zero 95%"] - power) < 4 * mc
    # no difference in caseload: false detections at about the nominal 5%
    fp = tab.loc[(ORACLE, "caseload (between - within)"), "excludes zero 95%"]
    assert abs(fp - 0.05) < 4 * np.sqrt(0.05 * 0.95 / 600)


# ------------------------------------------------------------------ Bayesian refits
@pytest.fixture(scope="module")
def ri_model(short_panel):
    return bp.models.RandomIntercept(short_panel, FORMULA)


@pytest.mark.slow  # one nutpie compilation, so all Bayesian checks live in this one test
def test_bayesian_refits_swap_statistics_restore_and_reproduce(ri_model, short_panel):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bayes_check = design_check(None, ri_model, truth=TRUTH, replicates=12, draws=300,
                                   tune=300, progress=False, seed=2)
    rec = bayes_check.records
    assert set(rec["method"]) == {BAYES, REFERENCE, ORACLE}
    b = rec[(rec["method"] == BAYES) & (rec["prob"] == 0.95)]
    assert set(b["parameter"]) == {"Intercept", "value", "capital", "sigma_unit", "sigma_obs"}
    assert b["replicate"].nunique() == 12
    # every replicate is a different data set: the posterior means differ between them
    assert b[b["parameter"] == "value"]["estimate"].std() > 0
    # the posterior of the slopes tracks the REML reference fit on the same replicate
    # (weakly informative default priors, 40 rows); reference: the closed-form REML fit,
    # itself checked against statsmodels MixedLM above
    r = rec[(rec["method"] == REFERENCE) & (rec["prob"] == 0.95) & (rec["parameter"] == "value")]
    bb = b[b["parameter"] == "value"].set_index("replicate")["estimate"]
    rr = r.set_index("replicate")["estimate"]
    width = r.set_index("replicate").eval("upper - lower")
    assert ((bb - rr).abs() < 0.5 * width).all()
    # the model is left with the statistics of the real data
    design = short_panel.design(FORMULA)
    np.testing.assert_allclose(ri_model.stats.mean[-1], design.y.mean())
    assert bayes_check.replicate_info["divergences"].notna().all()
    assert bayes_check.replicate_info["rhat_max"].notna().all()
    # same seed, one thread instead of two: the same replicates and the same draws
    # (no recompilation: the compiled model is kept on the model)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        again = design_check(None, ri_model, truth=TRUTH, replicates=12, draws=300, tune=300,
                             progress=False, seed=2, workers=1)
    pd.testing.assert_frame_equal(bayes_check.records, again.records)
    # report section: table and figure
    tab, fig = design_check_section(bayes_check)
    assert "coverage 95%" in tab.columns and "median width 90%" in tab.columns
    assert tab.attrs["summary"].startswith("Design check of RandomIntercept on 10 units")
    assert len(fig.axes) == 2
    import matplotlib.pyplot as plt

    plt.close(fig)


def test_bad_input_names_the_fault(short_panel):
    with pytest.raises(SpecificationError, match="'capital'"):
        design_check(short_panel, "RandomIntercept", FORMULA, bayes=False,
                     truth={"coef": {"Intercept": 1.0, "value": 0.1}, "sigma_unit": 1.0,
                            "sigma_obs": 1.0})
    with pytest.raises(SpecificationError, match="difference"):
        design_check(short_panel, "RandomIntercept", FORMULA, truth=TRUTH, bayes=False,
                     difference={"value": 1.0})
    with pytest.raises(SpecificationError, match="reference_method"):
        design_check(short_panel, "RandomIntercept", FORMULA, truth=TRUTH, bayes=False,
                     reference_method="anova")
    with pytest.raises(SpecificationError, match="model="):
        design_check(short_panel, "Hierarchical", FORMULA, truth=TRUTH, bayes=False)
    with pytest.raises(SpecificationError, match="sigma_obs"):
        design_check(short_panel, "RandomIntercept", FORMULA, bayes=False,
                     truth={**TRUTH, "sigma_obs": -1.0})


def test_command_line_verb(tmp_path, grunfeld, capsys):
    # the verb runs on a file; the truth from --coef is used as given (Grunfeld panel,
    # statsmodels.datasets, written to CSV)
    from bayespanel.app.cli import main

    path = tmp_path / "grunfeld.csv"
    grunfeld.to_csv(path, index=False)
    rc = main([
        "design-check", str(path), "--unit", "firm", "--time", "year", "--formula", FORMULA,
        "--coef", "Intercept=-40", "--coef", "value=0.11", "--coef", "capital=0.3",
        "--sigma-unit", "60", "--sigma-obs", "50", "--replicates", "40", "--reference-only",
        "--quiet", "--out", str(tmp_path / "out")])
    assert rc == 0
    text = capsys.readouterr().out
    assert "Design check of RandomIntercept on 10 units, 200 rows" in text
    tab = pd.read_csv(tmp_path / "out" / "design_check.csv", index_col=[0, 1])
    assert tab.loc[(ORACLE, "value"), "truth"] == pytest.approx(0.11)
    assert (tmp_path / "out" / "design_check.png").stat().st_size > 1000
    assert main(["design-check", str(path), "--unit", "firm", "--time", "year", "--formula",
                 FORMULA, "--model", "hybrid"]) == 2
