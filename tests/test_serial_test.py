"""The reference serial-correlation test (Wooldridge 2002, Econometric Analysis of Cross
Section and Panel Data, section 10.5.4).

Checked against the same two regressions done with statsmodels (OLS on first differences
built with pandas, then OLS of the residuals on their lag with statsmodels' cluster-robust
covariance) on two panels that packages ship: linearmodels' wage panel and statsmodels'
Grunfeld data; and for its size on panels simulated with serially uncorrelated errors.
"""

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import bayespanel as bp
from bayespanel.core.errors import PanelDataError
from bayespanel.reference.serial import serial_correlation_arrays, serial_correlation_test


def _statsmodels_version(df, unit, time, outcome, covariates):
    """The test written directly with pandas and statsmodels."""
    d = df.sort_values([unit, time]).reset_index(drop=True)
    step = d.groupby(unit)[time].diff() == 1
    diffs = d.groupby(unit)[[outcome] + covariates].diff()[step]
    keep = [c for c in covariates if diffs[c].abs().sum() > 0]
    fd = sm.OLS(diffs[outcome], diffs[keep]).fit()
    e = pd.Series(np.nan, index=d.index)
    e[fd.resid.index] = fd.resid
    lag = e.groupby(d[unit]).shift(1)
    ok = e.notna() & lag.notna()
    X = pd.DataFrame({"lag": lag[ok]})
    res = sm.OLS(e[ok], X).fit(cov_type="cluster", cov_kwds={"groups": d.loc[ok, unit]},
                               use_t=True)
    tt = res.t_test("lag = -0.5")
    return res, float(np.squeeze(tt.pvalue)), int(ok.sum())


def _check(df, unit, time, outcome, covariates):
    res, p, n = _statsmodels_version(df, unit, time, outcome, covariates)
    panel = bp.Panel(df, unit=unit, time=time)
    test = serial_correlation_test(panel, f"{outcome} ~ " + " + ".join(covariates))
    assert test.n_pairs == n
    assert test.coef == pytest.approx(res.params["lag"], rel=1e-9)
    assert test.se == pytest.approx(res.bse["lag"], rel=1e-9)
    assert test.f_p_value == pytest.approx(p, rel=1e-8)      # t with G - 1 df, two-sided
    assert test.statistic == pytest.approx(((res.params["lag"] + 0.5) / res.bse["lag"]) ** 2,
                                           rel=1e-9)
    return test


def test_wage_panel_equals_statsmodels():
    # linearmodels' wage panel (545 men, 1980-1987); exper rises by one each year, so its
    # difference is the constant of the differenced equation
    from linearmodels.datasets import wage_panel

    df = wage_panel.load()
    test = _check(df, "nr", "year", "lwage", ["exper", "expersq", "union", "married", "hours"])
    assert test.n_units == 545 and test.df == 1
    assert test.coef > -0.5      # this panel's wage errors are positively correlated


def test_grunfeld_equals_statsmodels():
    # statsmodels' Grunfeld investment data (11 firms, 1935-1954, 220 rows)
    from statsmodels.datasets import grunfeld

    df = grunfeld.load_pandas().data
    df["year"] = df["year"].astype(int)
    test = _check(df, "firm", "year", "invest", ["value", "capital"])
    assert test.n_units == 11 and test.n_pairs == 11 * 18


def test_gaps_break_differences_and_lags():
    # one unit with occasions 1, 2, 4, 5, 6: differences at 2, 5, 6; lag pairs only (5, 6).
    # Reference: the same pairs written out by hand, fitted with statsmodels OLS.
    rng = np.random.default_rng(4)
    rows = []
    for u in range(12):
        occ = [1, 2, 4, 5, 6] if u == 0 else list(range(1, 7))
        for t in occ:
            rows.append((u, t, rng.normal(), rng.normal()))
    df = pd.DataFrame(rows, columns=["unit", "t", "x", "y"])
    test = serial_correlation_arrays(df[["x"]].to_numpy(), df["y"].to_numpy(),
                                     df["unit"].to_numpy(), df["t"].to_numpy())
    # 11 full units: 5 differences, 4 lag pairs each; unit 0: 3 differences, 1 pair
    assert test.n_pairs == 11 * 4 + 1
    res, p, n = _statsmodels_version(df, "unit", "t", "y", ["x"])
    assert n == test.n_pairs
    assert test.coef == pytest.approx(res.params["lag"], rel=1e-9)
    assert test.se == pytest.approx(res.bse["lag"], rel=1e-9)


def test_text_time_is_refused_naming_the_column():
    df = pd.DataFrame({"u": [1, 1, 2, 2], "wave": ["a", "b", "a", "b"], "x": [1.0, 2, 3, 5],
                       "y": [0.0, 1, 1, 3]})
    with pytest.raises(PanelDataError, match="'wave'"):
        serial_correlation_arrays(df[["x"]], df["y"], df["u"], df["wave"].to_numpy(),
                                  column="wave")


def test_size_under_no_serial_correlation():
    # Simulated panels with unit effects correlated with x and iid errors (rho = 0): the
    # test at 5% should reject in about 5% of replicates. 500 replicates: binomial SD
    # about 1 point, so the bound of 8% is three SDs above the nominal level (measured
    # when written: 5.6% here, 5.1% over 3,000 replicates of the same design; with
    # N = 40, T = 5 it was 7%: few clusters over-reject a little, as CR1 does)
    rng = np.random.default_rng(20261202)
    N, T, reps = 100, 6, 500
    keys = np.repeat(np.arange(N), T)
    times = np.tile(np.arange(T), N)
    rejections = 0
    for _ in range(reps):
        u = rng.normal(size=N)
        x = rng.normal(size=N * T) + 0.5 * u[keys]
        y = 1.0 + 0.7 * x + u[keys] + rng.normal(size=N * T)
        X = np.column_stack([np.ones(N * T), x])
        rejections += serial_correlation_arrays(X, y, keys, times).f_p_value < 0.05
    rate = rejections / reps
    assert rate <= 0.08
    # and it has power against AR(1) errors with rho = 0.5 (same design)
    power = 0
    for _ in range(40):
        u = rng.normal(size=N)
        x = rng.normal(size=N * T) + 0.5 * u[keys]
        e = np.empty((N, T))
        e[:, 0] = rng.normal(size=N)
        for t in range(1, T):
            e[:, t] = 0.5 * e[:, t - 1] + np.sqrt(1 - 0.25) * rng.normal(size=N)
        y = 1.0 + 0.7 * x + u[keys] + e.ravel()
        X = np.column_stack([np.ones(N * T), x])
        power += serial_correlation_arrays(X, y, keys, times).f_p_value < 0.05
    assert power / 40 >= 0.8


def test_occasion_effects_equal_statsmodels_with_year_indicators():
    # linearmodels' wage panel with an indicator per year (1980 the reference), differenced
    # like the other columns; statsmodels fits the same differenced indicators
    from linearmodels.datasets import wage_panel

    df = wage_panel.load()
    years = [f"y{y}" for y in range(1981, 1988)]
    dummies = df.assign(**{c: (df["year"] == int(c[1:])).astype(float) for c in years})
    res, p, n = _statsmodels_version(dummies, "nr", "year", "lwage",
                                     ["expersq", "union", "married"] + years)
    test = serial_correlation_test(bp.Panel(df, unit="nr", time="year"),
                                   "lwage ~ expersq + union + married", occasion_effects=True)
    assert test.n_pairs == n
    assert test.coef == pytest.approx(res.params["lag"], rel=1e-9)
    assert test.se == pytest.approx(res.bse["lag"], rel=1e-9)
    assert test.f_p_value == pytest.approx(p, rel=1e-8)
