"""The checks that say when a model's intervals are too narrow (issue 17, item 4):
the posterior predictive check of the lag-one autocorrelation of within residuals
(bayespanel.analysis.serialcheck) and the narrow-interval warning (bayespanel.analysis.narrowcheck).

Outside references: the observed statistic is recomputed directly with pandas (groupby
demeaning and a shift within units); the replicated statistic's mean is compared with the
ratio of expectations from the dense AR(1) covariance matrix (numpy, scipy.linalg.toeplitz);
the warning stays quiet on a panel simulated with independent errors (it fires on
statsmodels' Grunfeld panel in a whole run, tests/test_cli_serial.py, checked there against
linearmodels' PanelOLS).
"""

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import linalg

import bayespanel as bp
from bayespanel.analysis.narrowcheck import (RATIO_THRESHOLD, compare_uncertainty,
                                             narrow_interval_check, narrow_message)
from bayespanel.analysis.serialcheck import LABEL, lag1_check

DRAWS = dict(draws=150, tune=150, chains=2, seed=3)


def _pandas_ac1(df, resid):
    """Lag-one autocorrelation of within residuals, pooled over units, written directly:
    residuals minus their unit's mean; pairs one year apart in the same unit."""
    d = df.assign(r=resid)
    d["r"] = d["r"] - d.groupby("firm")["r"].transform("mean")
    d = d.sort_values(["firm", "year"])
    prev = d.groupby("firm")["r"].shift(1)
    step = d.groupby("firm")["year"].diff() == 1
    return float((d["r"] * prev)[step].sum() / (d["r"] ** 2).sum())


def test_observed_statistic_equals_pandas(grunfeld):
    # Grunfeld (statsmodels), rows shuffled and two rows removed (a gap in two firms)
    df = grunfeld.drop(index=[5, 47]).sample(frac=1.0, random_state=4).reset_index(drop=True)
    M = np.column_stack([np.ones(len(df)), df["value"], df["capital"]])
    rng = np.random.default_rng(0)
    coef = np.array([-40.0, 0.11, 0.31]) + rng.normal(scale=[5, 0.01, 0.02], size=(7, 3))
    sigma = np.full(7, 50.0)
    got = lag1_check(M, df["invest"], df["firm"], df["year"], coef, sigma, seed=1)
    want = np.mean([_pandas_ac1(df, df["invest"].to_numpy() - M @ b) for b in coef])
    assert got["label"] == LABEL and len(got["replicated"]) == 7
    assert got["observed"] == pytest.approx(want, rel=1e-12)
    # Grunfeld's residuals are strongly positively correlated over time: in the right tail
    assert got["observed"] > 0.3 and got["p_value"] == 0.0


def _expected_ac1(T, rho, times):
    """E[sum of pair products] / E[sum of squares] of one unit's demeaned AR(1) errors,
    from the dense covariance (numpy): C Sigma C with C the centring matrix."""
    t = np.asarray(times, dtype=float)
    S = rho ** np.abs(t[:, None] - t[None, :]) if rho else np.eye(T)
    C = np.eye(T) - 1.0 / T
    V = C @ S @ C
    pairs = [k for k in range(1, T) if t[k] - t[k - 1] == 1]
    return sum(V[k, k - 1] for k in pairs) / np.trace(V)


@pytest.mark.parametrize("rho", [None, 0.6, -0.4])
def test_replicated_statistic_matches_dense_expectation(rho):
    # every unit observed at 0, 1, 2, 4, 5, 6 (a gap of two between 2 and 4)
    times = [0, 1, 2, 4, 5, 6]
    n_units, S = 2500, 24
    keys = np.repeat(np.arange(n_units), len(times))
    t = np.tile(times, n_units)
    M = np.zeros((len(t), 1))
    y = np.random.default_rng(1).normal(size=len(t))
    got = lag1_check(M, y, keys, t, np.zeros((S, 1)), np.full(S, 2.0),
                     None if rho is None else np.full(S, rho), seed=5)
    want = _expected_ac1(len(times), rho or 0.0, times)
    if rho is None:
        assert want == pytest.approx(-4 / 30)  # demeaned iid errors: -sigma^2 / T per pair
    # ratio of sums over 15,000 rows: its SD is well below 0.01
    assert got["replicated_mean"] == pytest.approx(want, abs=0.01)


def test_check_tells_ar1_errors_from_iid():
    # simulated: y = x + u_i + e_it with AR(1) errors, rho = 0.7, N = 200, T = 8
    rng = np.random.default_rng(11)
    n, T, rho = 200, 8, 0.7
    e = np.empty((n, T))
    e[:, 0] = rng.normal(size=n)
    for k in range(1, T):
        e[:, k] = rho * e[:, k - 1] + np.sqrt(1 - rho ** 2) * rng.normal(size=n)
    x = rng.normal(size=(n, T))
    y = (x + rng.normal(size=(n, 1)) + e).ravel()
    keys, t = np.repeat(np.arange(n), T), np.tile(np.arange(T), n)
    coef = np.ones((40, 1))
    iid = lag1_check(x.reshape(-1, 1), y, keys, t, coef, np.ones(40), seed=2)
    ar1 = lag1_check(x.reshape(-1, 1), y, keys, t, coef, np.ones(40), np.full(40, rho), seed=2)
    assert iid["p_value"] == 0.0                      # independent errors cannot produce it
    assert 0.05 < ar1["p_value"] < 0.95               # the true error model can


def test_message_names_causes_and_remedies():
    # the rows of a model with unit intercepts and of the pooled model; the numbers are
    # Grunfeld's capital slope (statsmodels) as tests/test_cli_serial.py measures it
    rows = [{"model": "fixed_effects", "title": "Fixed effects", "term": "capital",
             "posterior_sd": 0.018, "reference_se": 0.053, "ratio": 0.34, "narrow": True},
            {"model": "fixed_effects", "title": "Fixed effects", "term": "value",
             "posterior_sd": 0.012, "reference_se": 0.015, "ratio": 0.79, "narrow": False},
            {"model": "pooled", "title": "Pooled regression", "term": "value",
             "posterior_sd": 0.006, "reference_se": 0.016, "ratio": 0.40, "narrow": True}]
    msg = narrow_message(rows, n_units=10)
    for words in ("--errors ar1", "random slope for capital", "Bell, Fairbrother and Jones",
                  "53(2)", "With 10 units", f"below {RATIO_THRESHOLD:g}", "No unit intercepts"):
        assert words in msg
    assert "random slope for capital, value" not in msg   # the pooled row names no slope
    # with AR(1) errors already in the models, the advice is the random slope
    ar1 = narrow_message(rows[:2], errors="ar1", n_units=200)
    assert "already allow AR(1)" in ar1 and "--errors ar1" not in ar1
    assert "units the cluster-robust SE is itself imprecise" not in ar1
    assert narrow_message(rows[1:2]) is None


def test_warning_quiet_on_iid_panel():
    # simulated with independent errors and one slope for all units: the posterior SDs
    # match the cluster-robust SEs up to noise
    rng = np.random.default_rng(7)
    n, T = 80, 6
    x = rng.normal(size=(n, T)) + rng.normal(size=(n, 1))
    y = 2.0 + 0.5 * x + rng.normal(size=(n, 1)) + rng.normal(size=(n, T))
    df = pd.DataFrame({"firm": np.repeat(np.arange(n), T), "year": np.tile(np.arange(T), n),
                       "invest": y.ravel(), "value": x.ravel(),
                       "capital": rng.normal(size=n * T)})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        panel = bp.Panel(df, "firm", "year")
        post = bp.models.FixedEffects(panel, "invest ~ value + capital").sample(**DRAWS)
        ref = bp.reference.within(panel, "invest ~ value + capital", cov="cluster")
    tab = compare_uncertainty(post.sd, ref.se)
    assert not tab["narrow"].any() and (tab["ratio"] > 0.7).all()
    assert narrow_interval_check([{"model": "fixed_effects", "title": "Fixed effects",
                                   "reference": "within", "sd": post.sd,
                                   "se": ref.se}])["message"] is None
    # the lag-one check on the same fit: nothing in the tail
    M, yy, codes = post.rows
    chk = lag1_check(M, yy, codes, post.time, post._flat("coef"), post._flat("sigma_obs"))
    assert 0.01 < chk["p_value"] < 0.99
