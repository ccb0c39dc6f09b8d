"""The design check with AR(1) errors (``errors="ar1"``).

Outside sources, named beside each check:

* the Grunfeld investment panel as shipped by statsmodels.datasets (its firms, years and
  covariate values are the structure every replicate keeps; some years are dropped so
  that firms have gaps between their occasions);
* statsmodels' ArmaProcess for the autocorrelation of a stationary AR(1) (rho^k at lag
  k), against the replicates' simulated errors;
* statsmodels' GLS with the dense block-diagonal covariance of the AR(1) random-intercept
  model, against the known-variance GLS computed from the AR(1) statistics;
* exact coverage of normal intervals from GLS with the true covariance (Aitken 1935, a
  published identity), over replicates.
"""

import json
import warnings

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.tsa.arima_process import ArmaProcess

import bayespanel as bp
from bayespanel.analysis.recovery import BAYES, ORACLE, REFERENCE, design_check
from bayespanel.core import ar1
from bayespanel.core.ar1gls import gls
from bayespanel.core.errors import SpecificationError

FORMULA = "invest ~ value + capital"
RHO = 0.6
TRUTH = {"coef": {"Intercept": -40.0, "value": 0.11, "capital": 0.3},
         "sigma_unit": 60.0, "sigma_obs": 50.0, "rho": RHO}


@pytest.fixture(scope="module")
def panel(grunfeld):
    # gaps: firm-years 1940 and 1947-1948 left out for the first five firms
    firms = sorted(grunfeld["firm"].unique())[:5]
    gap = grunfeld["firm"].isin(firms) & grunfeld["year"].isin([1940, 1947, 1948])
    return bp.Panel(grunfeld[~gap], unit="firm", time="year")


@pytest.fixture(scope="module")
def closed_form(panel):
    return design_check(panel, "RandomIntercept", FORMULA, truth=TRUTH, errors="ar1",
                        replicates=1500, bayes=False, reference=False, progress=False,
                        seed=5)


def test_simulated_errors_have_the_ar1_autocorrelation(closed_form):
    # statsmodels' ArmaProcess: the autocorrelation of a stationary AR(1) is rho^k. The
    # errors of replicate i are its outcome minus M b minus the unit's intercept; with
    # sigma_unit set to 0 here they are the AR(1) errors alone.
    res = closed_form
    M, codes, _ = res.rows
    ctx = dict(res._ctx, su=0.0)
    zero = type(res)(res.records, res.replicate_info, res.truth, res.structure,
                     res.settings, ctx)
    b = ctx["b"]
    E = np.array([zero.simulate(i) - M @ b for i in range(400)])      # (replicates, rows)
    tl = ctx["timeline"]
    acf = ArmaProcess([1.0, -RHO], [1.0]).acf(4)
    gap = np.where(tl.linked, tl.gap, 0)
    s = tl.order
    for k in (1, 2, 3):
        pairs = np.flatnonzero(tl.linked & (gap == k))      # sorted rows k years after the previous
        assert len(pairs) >= 5
        r = np.corrcoef(E[:, s[pairs]].ravel(), E[:, s[pairs - 1]].ravel())[0, 1]
        # Monte Carlo SE of a correlation from m pairs about (1 - r^2) / sqrt(m)
        m = E.shape[0] * len(pairs)
        assert abs(r - acf[k]) < 4 * (1 - acf[k] ** 2) / np.sqrt(m), (k, r, acf[k])
    sd = E.std()
    assert abs(sd - TRUTH["sigma_obs"]) < 0.02 * TRUTH["sigma_obs"]


def test_known_variance_gls_equals_statsmodels_and_covers_exactly(closed_form, panel):
    res = closed_form
    M, codes, _ = res.rows
    time = res._ctx["time"]
    y = res.simulate(0)
    b, V = gls(ar1.compute(M, y, codes, time).arrays(), RHO, 50.0, 60.0)
    # statsmodels GLS with the dense covariance sigma^2 rho^|t - s| + tau^2 per firm
    n = len(y)
    S = np.zeros((n, n))
    for u in np.unique(codes):
        r = np.flatnonzero(codes == u)
        S[np.ix_(r, r)] = 50.0 ** 2 * RHO ** np.abs(time[r][:, None] - time[r]) + 60.0 ** 2
    fit = sm.GLS(y, M, sigma=S).fit()
    np.testing.assert_allclose(b, fit.params, rtol=1e-8)
    np.testing.assert_allclose(V, fit.normalized_cov_params, rtol=1e-8)
    # Aitken (1935): exact normal intervals at the true covariance; 3.5 Monte Carlo SE
    tab = res.table().loc[ORACLE]
    R = res.settings["replicates"]
    for prob in (0.9, 0.95):
        cov = tab[f"coverage {round(100 * prob)}%"]
        assert (cov - prob).abs().max() < 3.5 * np.sqrt(prob * (1 - prob) / R), cov
    assert res.truth["rho"] == RHO and res.settings["errors"] == "ar1"


def test_reference_truth_and_record(panel):
    res = design_check(panel, "RandomIntercept", FORMULA, errors="ar1", replicates=3,
                       bayes=False, progress=False, seed=1)
    # truth "reference": the maximum of the AR(1) marginal likelihood of the real outcome;
    # no point nearby has a higher likelihood
    m = res._ctx["model"]
    arrays = m.ar1_stats.arrays()
    t = res.truth
    v = np.append(-np.array(list(t["coef"].values())), 1.0)
    best = ar1.loglik(v, arrays, t["rho"], t["sigma_obs"], t["sigma_unit"])
    for d in (-0.01, 0.01):
        assert ar1.loglik(v, arrays, t["rho"] + d, t["sigma_obs"], t["sigma_unit"]) < best
        assert ar1.loglik(v, arrays, t["rho"], t["sigma_obs"] * (1 + d), t["sigma_unit"]) < best
    assert 0 < t["rho"] < 1          # Grunfeld's investment is persistent within firms
    rec = json.loads(json.dumps(res.to_record(), allow_nan=False))
    assert rec["truth"]["rho"] == pytest.approx(t["rho"])
    assert {r["method"] for r in rec["table"]} == {REFERENCE, ORACLE}
    assert rec["summary"].startswith("Design check of RandomIntercept on 10 units")
    assert "AR(1) within units" in rec["summary"]


def test_bad_input_names_rho(panel):
    with pytest.raises(SpecificationError, match="rho"):
        design_check(panel, "RandomIntercept", FORMULA, errors="ar1", bayes=False,
                     truth={k: v for k, v in TRUTH.items() if k != "rho"})
    with pytest.raises(SpecificationError, match="rho"):
        design_check(panel, "RandomIntercept", FORMULA, bayes=False, truth=TRUTH)
    with pytest.raises(SpecificationError, match="rho"):
        design_check(panel, "RandomIntercept", FORMULA, errors="ar1", bayes=False,
                     truth={**TRUTH, "rho": 1.0})
    with pytest.raises(SpecificationError, match="errors"):
        design_check(panel, "RandomIntercept", FORMULA, errors="arma", bayes=False,
                     truth=TRUTH)


@pytest.mark.slow   # one nutpie compilation of the AR(1) model
def test_bayesian_refits_report_rho(panel):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = design_check(panel, "RandomIntercept", FORMULA, truth=TRUTH, errors="ar1",
                           replicates=4, draws=150, tune=150, progress=False, seed=3)
    rec = res.records
    b = rec[(rec["method"] == BAYES) & (rec["prob"] == 0.9)]
    assert set(b["parameter"]) == {"Intercept", "value", "capital", "sigma_unit",
                                   "sigma_obs", "rho"}
    assert (b[b["parameter"] == "rho"]["truth"] == RHO).all()
    assert b["replicate"].nunique() == 4
    # each replicate's posterior mean of rho lies within its own 90% interval and in (-1, 1)
    r = b[b["parameter"] == "rho"]
    assert ((r["lower"] < r["estimate"]) & (r["estimate"] < r["upper"])).all()
    assert ((r["lower"] > -1) & (r["upper"] < 1)).all()
    assert "rho" in res.table().loc[BAYES].index


def test_command_line_verb_with_ar1_errors(tmp_path, grunfeld, capsys):
    # Grunfeld (statsmodels.datasets) written to CSV; the truth from --coef and --rho
    from bayespanel.app.cli import main

    path = tmp_path / "grunfeld.csv"
    grunfeld.to_csv(path, index=False)
    args = ["design-check", str(path), "--unit", "firm", "--time", "year", "--formula",
            FORMULA, "--coef", "Intercept=-40", "--coef", "value=0.11", "--coef",
            "capital=0.3", "--sigma-unit", "60", "--sigma-obs", "50", "--replicates", "5",
            "--reference-only", "--quiet", "--errors", "ar1"]
    assert main(args + ["--rho", "0.6"]) == 0
    assert "errors AR(1) within units with rho = 0.6" in capsys.readouterr().out
    assert main(args) == 2                     # no --rho: the truth lacks rho
    assert "rho" in capsys.readouterr().err
