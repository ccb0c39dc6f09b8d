"""AR(1) errors on a Dask-backed panel (``errors="ar1"`` out of core).

Outside sources: the wage panel of Vella and Verbeek (1998) as shipped by
linearmodels.datasets, written as four Parquet files cut inside units (units span
partitions); scipy's dense multivariate normal log-density of each unit's rows for the
AR(1) random-intercept model, against the density the Dask-built model's statistics give.

The model reads the data only through statistics, so "the same posterior" is checked where
it is exact: the statistics, the log density and its gradient agree with the in-memory
model's to 1e-10 relative. The draws of the same seed agree while the sampler's
trajectories agree; NUTS amplifies the 1e-16 differences that merging partitions leaves in
the statistics, so the draws are compared within Monte Carlo error (as in
tests/test_dask_models.py).
"""

import json
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import bayespanel as bp
from bayespanel.core import ar1
from bayespanel.core.errors import PanelDataError

dd = pytest.importorskip("dask.dataframe")

FORMULA = "lwage ~ exper + union + married + black"
BUILDERS = ["Pooled", "RandomIntercept", "WithinBetween", "CorrelatedEffects", "FixedEffects"]
CUTS = [0, 1003, 2005, 3333]           # row cuts inside units (7 rows per unit)


@pytest.fixture(scope="module")
def files(wage_panel, tmp_path_factory):
    df = wage_panel.reset_index(drop=True).sort_values(["nr", "year"]).reset_index(drop=True)
    root = tmp_path_factory.mktemp("wage_ar1")
    bounds = CUTS + [len(df)]
    for j, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
        df.iloc[a:b].to_parquet(root / f"part{j}.parquet", index=False)
    # the cuts fall inside units: the unit at each cut has rows in two files
    assert all(df["nr"].iloc[c - 1] == df["nr"].iloc[c] for c in CUTS[1:])
    return root, df


@pytest.fixture(scope="module")
def panels(files):
    root, df = files
    dp = bp.Panel.from_parquet(root, unit="nr", time="year", engine="dask",
                               client="synchronous")
    assert dp.npartitions == len(CUTS)
    # Dask may read neighbouring small files as one block; the pass must still see more
    # than one block, with a unit whose rows are in two of them
    blocks = []
    dp.design(FORMULA).run_rows(lambda rows, _: blocks.append(set(rows.units)),
                                lambda pieces: None)
    assert len(blocks) >= 2 and any(a & b for i, a in enumerate(blocks) for b in blocks[i + 1:])
    return dp, bp.Panel(df, "nr", "year")


def _build(builder, panel):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return getattr(bp.models, builder)(panel, FORMULA, errors="ar1")


@pytest.mark.parametrize("builder", BUILDERS)
def test_statistics_and_log_density_match_memory(panels, builder):
    dp, mem = panels
    a, b = _build(builder, dp), _build(builder, mem)
    assert a.labels == b.labels
    A, B = a.ar1_stats.arrays(), b.ar1_stats.arrays()
    np.testing.assert_array_equal(A["gaps"], B["gaps"])
    for key in ("first", "link_start", "link_end", "link_cross"):
        np.testing.assert_allclose(A[key], B[key], rtol=1e-10, atol=1e-10 * np.abs(B[key]).max())
    assert ar1.structure(A) == ar1.structure(B)
    fa, fb = a.pymc_model.compile_logp(), b.pymc_model.compile_logp()
    ga, gb = a.pymc_model.compile_dlogp(), b.pymc_model.compile_dlogp()
    rng = np.random.default_rng(5)
    start = a.pymc_model.initial_point()
    for _ in range(3):
        pt = {k: v + rng.normal(0, 0.3, np.shape(v)) for k, v in start.items()}
        la, lb = float(fa(pt)), float(fb(pt))
        assert abs(la - lb) <= 1e-10 * abs(lb)
        da, db = np.asarray(ga(pt)), np.asarray(gb(pt))
        assert np.max(np.abs(da - db)) <= 1e-9 * max(np.max(np.abs(db)), 1.0)


def test_dask_statistics_give_scipys_dense_density(panels, files):
    # scipy.stats.multivariate_normal per unit, covariance sigma^2 rho^|t - s| + tau^2
    dp, _ = panels
    _, df = files
    m = _build("RandomIntercept", dp)
    b = np.array([1.2, 0.05, 0.09, 0.08, -0.15])
    rho, sigma, tau = 0.35, 0.37, 0.33
    ours = ar1.loglik(np.append(-b, 1.0), m.ar1_stats.arrays(), rho, sigma, tau)
    X = np.column_stack([np.ones(len(df)), df[["exper", "union", "married", "black"]]])
    r = df["lwage"].to_numpy() - X @ b
    dense = 0.0
    for _, idx in df.groupby("nr").indices.items():
        t = df["year"].to_numpy()[idx].astype(float)
        S = sigma ** 2 * rho ** np.abs(t[:, None] - t[None]) + tau ** 2
        dense += stats.multivariate_normal(np.zeros(len(idx)), S).logpdf(r[idx])
    assert ours == pytest.approx(dense, rel=1e-10)


def test_sampling_matches_memory_within_monte_carlo_error(panels):
    dp, mem = panels
    kw = dict(draws=250, tune=250, chains=2, seed=7, progress=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pa = _build("RandomIntercept", dp).sample(**kw)
        pb = _build("RandomIntercept", mem).sample(**kw)
    sa, sb = pa.summary(), pb.summary()
    assert "rho" in sa.index
    for name in ("rho", "sigma_obs", "sigma_unit", "exper", "union"):
        # two independent sets of draws: 4 Monte Carlo SE of their difference
        mcse = np.hypot(sa.loc[name, "sd"] / np.sqrt(sa.loc[name, "ess_bulk"]),
                        sb.loc[name, "sd"] / np.sqrt(sb.loc[name, "ess_bulk"]))
        assert abs(sa.loc[name, "mean"] - sb.loc[name, "mean"]) < 4 * mcse, name


def test_command_line_out_of_core_with_ar1_errors(files, tmp_path, cli_in_process):
    root, _ = files
    out = tmp_path / "run"
    res = cli_in_process("fit", root, "--unit", "nr", "--time", "year", "--formula", FORMULA,
                         "--out-of-core", "--errors", "ar1", "--models", "random_intercept",
                         "--draws", "150", "--tune", "150", "--out", out)
    assert res.returncode == 0, res.stderr
    assert "rho" in res.stdout
    doc = json.loads((out / "results.json").read_text())
    assert doc["settings"]["errors"] == "ar1" and doc["settings"]["out_of_core"] is True
    model = doc["models"][0]
    names = [c.get("term", c.get("parameter")) for c in model["coefficients"]]
    assert model["name"] == "random_intercept" and len(names) == 5


def test_rows_of_a_unit_out_of_time_order_across_partitions_are_named(wage_panel):
    # the first unit's years alternate between two partitions (1980, 1982, ... in one,
    # 1981, 1983, ... in the other): no order of the partitions makes its rows consecutive
    from bayespanel.data.sources.dask import DaskPanel

    df = wage_panel.reset_index(drop=True).sort_values(["nr", "year"])
    first = df.iloc[:8]
    frames = [pd.concat([first.iloc[::2], df.iloc[8:]]), first.iloc[1::2]]
    ddf = dd.from_map(lambda x: x, frames, meta=df.iloc[:0], enforce_metadata=False)
    dp = DaskPanel(ddf, "nr", "year", client="synchronous")
    with pytest.raises(PanelDataError, match="sort the files by unit and 'year'"):
        _build("RandomIntercept", dp)
