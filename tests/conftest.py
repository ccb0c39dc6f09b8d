"""Shared fixtures: published panels shipped by registry packages, and the demo scenario."""

import os
import warnings

import numpy as np
import pandas as pd
import pytest

os.environ.setdefault("MPLBACKEND", "Agg")


@pytest.fixture(scope="session")
def grunfeld() -> pd.DataFrame:
    """Grunfeld investment panel from statsmodels.datasets, 10 firms, 1935-1954.

    statsmodels ships 11 firms; the textbook version (Baltagi, Econometric Analysis of
    Panel Data, chapter 2) has 10, without American Steel, so it is dropped here.
    """
    from statsmodels.datasets import grunfeld as g

    df = g.load_pandas().data.copy()
    df = df[df["firm"] != "American Steel"].reset_index(drop=True)
    df["year"] = df["year"].astype(int)
    return df


@pytest.fixture(scope="session")
def wage_panel() -> pd.DataFrame:
    """Wage panel of Vella and Verbeek (1998), as shipped in linearmodels.datasets."""
    from linearmodels.datasets import wage_panel as w

    return w.load().copy()


@pytest.fixture(scope="session")
def wage_csv(tmp_path_factory, wage_panel):
    """The wage panel written to CSV, for the command line."""
    path = tmp_path_factory.mktemp("wage") / "wage.csv"
    wage_panel.to_csv(path, index=False)
    return path


@pytest.fixture(scope="session")
def demo():
    import bayespanel as bp

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        df, truth = bp.datasets.clinic_panel(seed=2026)
    return df, truth
