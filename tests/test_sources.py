"""One Design over a source: the in-memory and the Dask designs are the same class, and a
block function run over a design's rows sees the same rows on either source.

Outside data: the wage panel of Vella and Verbeek (1998) shipped in linearmodels.datasets.
Outside references: pandas groupby sums and a per-unit numpy computation of the within
cross-products; linearmodels' RandomEffects for a reference fit given a Dask design.
"""

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.data.design import Design
from bayespanel.data.sources.dask import DaskPanel, DaskSource
from bayespanel.core.errors import EstimationError
from bayespanel.data.sources import InMemoryRows

dd = pytest.importorskip("dask.dataframe")

from test_dask import as_dask, spanning  # noqa: E402  (shared helpers)

FORMULA = "lwage ~ exper + union + married"


@pytest.fixture(scope="module")
def designs(wage_panel):
    df = wage_panel.reset_index(drop=True)
    mem = bp.Panel(df, "nr", "year").design(FORMULA)
    dsk = DaskPanel(as_dask(df, spanning(df)), "nr", "year",
                    client="synchronous").design(FORMULA)
    return df, mem, dsk


def test_one_design_class_over_two_sources(designs):
    _, mem, dsk = designs
    assert type(mem) is Design and type(dsk) is Design
    assert isinstance(mem.source, InMemoryRows) and isinstance(dsk.source, DaskSource)
    assert mem.has_rows and not dsk.has_rows
    assert dsk.terms == mem.terms and list(dsk.units) == list(mem.units)
    np.testing.assert_array_equal(dsk.T, mem.T)
    assert dsk.varies_within.equals(mem.varies_within)
    with pytest.raises(AttributeError, match="has_rows"):
        dsk.X
    with pytest.raises(EstimationError, match="keeps no rows"):
        dsk.matrices("random")


def _unit_sums(rows, _shared):
    """Per-unit row counts and column sums of one block, keyed by unit."""
    keys, codes = np.unique(rows.units, return_inverse=True)
    sums = np.zeros((len(keys), rows.Z.shape[1]))
    np.add.at(sums, codes.ravel(), rows.Z)
    return pd.DataFrame(sums, index=keys).assign(n=np.bincount(codes.ravel()))


def _merge_sums(pieces):
    return pd.concat(pieces).groupby(level=0).sum()


def test_run_rows_sees_the_same_rows_on_both_sources(designs):
    # Reference: pandas groupby sums of the raw table's columns, per unit.
    df, mem, dsk = designs
    truth = df.groupby("nr")[["exper", "union", "married", "lwage"]].sum()
    counts = df.groupby("nr").size()
    for d in (mem, dsk):
        got = d.run_rows(_unit_sums, _merge_sums)
        keys = got.index if d is dsk else mem.units[got.index]
        got.index = keys
        got = got.loc[truth.index]
        cols = [d.terms.index(c) for c in ("exper", "union", "married")] + [d.k]
        np.testing.assert_allclose(got[cols].to_numpy(), truth.to_numpy(), rtol=1e-12)
        np.testing.assert_array_equal(got["n"].to_numpy(), counts.loc[truth.index].to_numpy())


def test_unit_cross_products_on_both_sources(designs):
    # Reference: each unit's within cross-products of [X, y] computed with numpy from the
    # raw table's rows of that unit.
    df, mem, dsk = designs
    cols = [t for t in mem.terms if t != "Intercept"]
    for d in (mem, dsk):
        ucp = d.unit_cross_products("random")
        for g in (0, 7, len(d.units) - 1):
            rows = df.loc[df["nr"] == d.units[g]]
            Z = np.column_stack([np.ones(len(rows))] + [rows[c] for c in cols]
                                + [rows["lwage"]])
            D = Z - Z.mean(axis=0)
            np.testing.assert_allclose(ucp[g], D.T @ D, rtol=1e-9, atol=1e-9)


def test_reference_fit_takes_a_dask_design(designs, wage_panel):
    # Reference: linearmodels RandomEffects on the same rows (a Design over a partitioned
    # source is a Design, so the estimators take it as they take an in-memory one).
    from linearmodels.panel import RandomEffects

    _, _, dsk = designs
    df = wage_panel.set_index(["nr", "year"])
    ref = RandomEffects.from_formula(f"{FORMULA} + 1", df).fit()
    ours = bp.reference.random(dsk)
    np.testing.assert_allclose(ours.coef[list(ref.params.index)].to_numpy(),
                               ref.params.to_numpy(), rtol=1e-8)
