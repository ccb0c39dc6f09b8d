"""Panel validation and the between/within decomposition of describe().

Outside checks: the wage panel of Vella and Verbeek (1998, Journal of Applied Econometrics
13), shipped in linearmodels' datasets, decomposed directly with pandas/numpy and with
linearmodels' own PanelData demeaning.
"""

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.core.errors import PanelDataError


def test_describe_matches_direct_pandas_on_wage_panel(wage_panel):
    # Source: wage panel (Vella and Verbeek 1998) from linearmodels.datasets.
    panel = bp.Panel(wage_panel, unit="nr", time="year")
    d = panel.describe(["lwage", "hours", "exper", "black", "union"])
    for col in ["lwage", "hours", "exper", "black", "union"]:
        x = wage_panel[col].astype(float)
        means = x.groupby(wage_panel["nr"]).transform("mean")
        assert d.loc[col, "mean"] == pytest.approx(x.mean(), rel=1e-12)
        assert d.loc[col, "sd_overall"] == pytest.approx(np.std(x, ddof=1), rel=1e-12)
        assert d.loc[col, "sd_between"] == pytest.approx(
            x.groupby(wage_panel["nr"]).mean().std(ddof=1), rel=1e-12)
        assert d.loc[col, "sd_within"] == pytest.approx(
            np.sqrt(((x - means) ** 2).sum() / (len(x) - 1)), rel=1e-12)
    # black is constant within men; exper grows by one each year
    assert not d.loc["black", "varies_within"] and d.loc["black", "share_within"] == 0
    assert d.loc["exper", "varies_within"]


def test_within_part_matches_linearmodels_demeaning(wage_panel):
    # Reference library: linearmodels PanelData.demean("entity").
    from linearmodels.panel.data import PanelData

    panel = bp.Panel(wage_panel, unit="nr", time="year")
    d = panel.describe(["lwage"])
    lm_wages = PanelData(wage_panel.set_index(["nr", "year"])[["lwage"]])
    dm = lm_wages.demean("entity").values2d.ravel()
    assert d.loc["lwage", "sd_within"] == pytest.approx(np.sqrt((dm ** 2).sum() / (len(dm) - 1)), rel=1e-10)
    # variance decomposition identity: SS_total = SS_within + sum_i T_i (xbar_i - xbar)^2
    x = wage_panel["lwage"]
    ss_b = (x.groupby(wage_panel["nr"]).transform("mean") - x.mean()).pow(2).sum()
    ss_t = ((x - x.mean()) ** 2).sum()
    assert d.loc["lwage", "share_within"] == pytest.approx(1 - ss_b / ss_t, rel=1e-10)


def test_structure_of_unbalanced_demo(demo):
    df, truth = demo
    panel = bp.Panel(df, unit="clinic", time="quarter")
    s = panel.structure()
    assert s["n_units"] == 36 and not s["balanced"]
    counts = df.groupby("clinic").size()
    assert s["occasions_min"] == counts.min() and s["occasions_max"] == counts.max()
    # gaps: occasions missing between first and last, checked by a direct loop
    for u, g in df.groupby("clinic"):
        q = set(g["quarter"])
        expect = sorted(set(range(min(q), max(q) + 1)) - q)
        assert panel.gaps.get(u, []) == expect


def test_singletons_and_balance():
    df = pd.DataFrame({"u": [1, 1, 2, 3, 3], "t": [1, 2, 1, 1, 2], "y": [1., 2, 3, 4, 5]})
    panel = bp.Panel(df, "u", "t")
    assert panel.singleton_units == [2]
    assert not panel.is_balanced


@pytest.mark.parametrize(
    "frame, unit, time, match",
    [
        (pd.DataFrame({"u": [1, 2], "t": [1, 1]}), "unit", "t", "unit column 'unit'"),
        (pd.DataFrame({"u": [1, 2], "t": [1, 1]}), "u", "when", "time column 'when'"),
        (pd.DataFrame({"u": [1, 1, 2], "t": [1, 1, 1], "y": [1., 2, 3]}), "u", "t", r"u=1, t=1"),
        (pd.DataFrame({"u": [1, 1], "t": [1, 2], "y": [1., 2]}), "u", "t", "at least 2"),
        (pd.DataFrame({"u": [1, 2, 2], "t": [1, 1, 2], "y": [1., np.inf, 3]}), "u", "t",
         r"column 'y' has 1 infinite.*u=2, t=1"),
        (pd.DataFrame({"u": [1, None, 2], "t": [1, 1, 2], "y": [1., 2, 3]}), "u", "t", "missing"),
        (pd.DataFrame({"u": [], "t": []}), "u", "t", "no rows"),
    ],
    ids=["no-unit", "no-time", "duplicate", "one-unit", "infinite", "missing-unit", "empty"],
)
def test_bad_tables_name_the_fault(frame, unit, time, match):
    with pytest.raises(PanelDataError, match=match):
        bp.Panel(frame, unit=unit, time=time)


def test_input_is_not_modified(demo):
    df, _ = demo
    before = df.copy()
    bp.Panel(df.sample(frac=1, random_state=1), unit="clinic", time="quarter")
    pd.testing.assert_frame_equal(df, before)
