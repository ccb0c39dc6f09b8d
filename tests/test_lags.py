"""lag(x) / lag(x, k) in formulas: values within units on the time axis, gaps, errors.

Outside reference for the values: pandas itself, by a different route than the
package's (which looks each (unit, t - k) pair up): the table is reindexed onto the full
grid of units x occasions (gaps become rows of NaN) and ``groupby(unit).shift(k)`` is
taken there, then read back on the observed rows.
"""

import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.core.errors import FormulaError, PanelDataError
from bayespanel.data.lags import lag_values


def _gappy_panel(seed=3, n_units=12, years=range(2001, 2011), drop=0.2):
    rng = np.random.default_rng(seed)
    rows = [(f"u{i:02d}", t, rng.normal(), rng.normal(), rng.integers(0, 2) == 1)
            for i in range(n_units) for t in years if rng.random() > drop]
    df = pd.DataFrame(rows, columns=["unit", "year", "y", "x", "flag"])
    df.loc[df.sample(5, random_state=seed).index, "x"] = np.nan
    return df.sample(frac=1.0, random_state=seed + 1).reset_index(drop=True)  # shuffled input


def _pandas_lag(df, column, k, unit="unit", time="year"):
    """Reference: full grid, groupby-shift, read back on the observed rows."""
    grid = pd.MultiIndex.from_product(
        [sorted(df[unit].unique()), range(df[time].min(), df[time].max() + 1)],
        names=[unit, time])
    full = df.set_index([unit, time])[column].astype(float).reindex(grid)
    shifted = full.groupby(level=0).shift(k)
    return shifted.reindex(pd.MultiIndex.from_frame(df[[unit, time]])).to_numpy()


@pytest.mark.parametrize("k", [1, 2, 3])
def test_lag_values_equal_pandas_groupby_shift_on_a_grid(k):
    df = _gappy_panel()
    panel = bp.Panel(df, unit="unit", time="year")
    from bayespanel.data.lags import expand

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lagged = expand(f"y ~ lag(x, {k}) + lag(y, {k})", panel)
    for col in ("x", "y"):
        label = f"lag({col})" if k == 1 else f"lag({col}, {k})"
        got = lagged.frame[label].to_numpy()            # input row order
        ref = _pandas_lag(df, col, k)
        np.testing.assert_array_equal(np.isnan(got), np.isnan(ref))
        np.testing.assert_array_equal(got[~np.isnan(got)], ref[~np.isnan(ref)])
    # the counts of the report: undefined lags are the NaNs pandas gives
    term = lagged.report.terms[0]
    assert term.undefined == int(np.isnan(_pandas_lag(df, "x", k)).sum())


def test_design_drops_rows_without_a_lag_and_reports_them():
    df = _gappy_panel()
    panel = bp.Panel(df, unit="unit", time="year")
    with pytest.warns(bp.errors.DataHandlingWarning, match="have no lag"):
        d = panel.design("y ~ lag(y) + x", initial_conditions=False)
    ref_lag = _pandas_lag(df, "y", 1)
    keep = ~np.isnan(ref_lag) & df["x"].notna().to_numpy()
    assert d.n == int(keep.sum())
    assert d.terms == ["Intercept", "lag(y)", "x"]
    assert d.lags.has_lagged_outcome and d.lags.outcome_lags == ("lag(y)",)
    # the lag column of the design equals the pandas reference on the kept rows
    ref = pd.Series(ref_lag, index=pd.MultiIndex.from_frame(df[["unit", "year"]]))
    units = np.asarray(d.units)[d.unit_codes]
    expect = ref.reindex(pd.MultiIndex.from_arrays([units, d.time])).to_numpy()
    np.testing.assert_array_equal(d.X[:, 1], expect)
    rec = d.lags.to_record()
    first = df.groupby("unit").size().size  # one first occasion per unit
    assert rec["lags"][0]["before_first_occasion"] == first
    assert d.dropped_by_column["lag(y)"] == rec["lags"][0]["undefined"]


def test_ordered_categorical_time_and_transforms_of_lags():
    df = pd.DataFrame({"u": np.repeat([1, 2, 3], 4),
                       "wave": pd.Categorical(["a", "b", "c", "d"] * 3,
                                              categories=["a", "b", "c", "d"], ordered=True),
                       "y": np.arange(12.0) ** 1.5 + 1, "x": np.linspace(1, 3, 12) ** 2})
    df = df.drop(index=[6]).reset_index(drop=True)  # unit 2 misses wave c
    panel = bp.Panel(df, unit="u", time="wave")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        d = panel.design("y ~ log(lag(x)) + x")
    assert d.terms == ["Intercept", "log(lag(x))", "x"]
    # unit 1: waves b, c, d; unit 2: b only (d's lag crosses the gap); unit 3: b, c, d
    assert d.n == 7
    x = df["x"].to_numpy()
    np.testing.assert_allclose(d.X[:3, 1], np.log(x[0:3]))


def test_formulas_without_lag_are_unchanged():
    df = _gappy_panel()
    panel = bp.Panel(df, unit="unit", time="year")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        d = panel.design("y ~ x")
    assert d.lags is None
    assert d.n == int(df["x"].notna().sum())


@pytest.mark.parametrize("formula, match", [
    ("y ~ lag(z)", "unknown column 'z'"),
    ("y ~ lag(x, 0)", "whole number of occasions from 1"),
    ("y ~ lag(x, -1)", "whole number of occasions from 1"),
    ("y ~ lag(x, 1.5)", "whole number of occasions from 1"),
    ("y ~ lag(log(x))", "one column name"),
    ("y ~ lag(lag(x))", "one column name"),
    ("y ~ lag()", "lag takes a column"),
    ("y ~ lag(unit)", "identifies the units"),
])
def test_bad_lags_are_refused_naming_the_piece(formula, match):
    panel = bp.Panel(_gappy_panel(), unit="unit", time="year")
    with pytest.raises(FormulaError, match=match):
        panel.design(formula)


def test_time_axes_that_cannot_count_occasions_are_refused():
    df = _gappy_panel()
    dated = df.assign(year=pd.to_datetime(df["year"].astype(str) + "-01-01"))
    with pytest.raises(PanelDataError, match="'year'.*lag\\(\\) needs"):
        bp.Panel(dated, unit="unit", time="year").design("y ~ lag(x)")
    half = df.assign(year=df["year"] / 2.0)
    with pytest.raises(PanelDataError, match="not whole numbers"):
        bp.Panel(half, unit="unit", time="year").design("y ~ lag(x)")


def test_lag_values_reasons():
    # unit 0 at 1, 2, 4; unit 1 at 1, 2 (x missing at 1)
    codes = np.array([0, 0, 0, 1, 1])
    t = np.array([1, 2, 4, 1, 2])
    x = np.array([10.0, 20.0, 40.0, np.nan, 5.0])
    lagged, why = lag_values(x, codes, t, 1)
    np.testing.assert_array_equal(why, [1, 0, 2, 1, 3])
    assert lagged[1] == 10.0 and np.isnan(lagged[[0, 2, 3, 4]]).all()
    lagged, why = lag_values(x, codes, t, 2)
    np.testing.assert_array_equal(why, [1, 1, 0, 1, 1])
    assert lagged[2] == 20.0


def test_screen_alone_refuses_lag_with_the_reason():
    # a formula read without the panel's rows (a partitioned source) cannot take lags
    from bayespanel.data.formula import screen

    with pytest.raises(FormulaError, match="rows are in memory"):
        screen("y ~ lag(x)", ["y", "x"])
