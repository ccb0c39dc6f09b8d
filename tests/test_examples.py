"""Every script in examples/ runs, with small draws, and its numbers check out.

Outside checks, named beside each: statsmodels MixedLM (REML variance components),
linearmodels PanelOLS (within estimates), scipy normal densities in a hand-written
leave-one-out loop (the exact-CV ELPD of a pooled reference fit).
"""

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"


def _load(name):
    sys.path.insert(0, str(EXAMPLES))
    try:
        spec = importlib.util.spec_from_file_location(name, EXAMPLES / f"{name}.py")
        mod = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(mod)
    finally:
        sys.path.remove(str(EXAMPLES))
    return mod


@pytest.fixture(autouse=True)
def small_draws(monkeypatch):
    monkeypatch.setenv("BAYESPANEL_EXAMPLE_DRAWS", "150")


def test_every_example_is_tested():
    scripts = {p.stem for p in EXAMPLES.glob("*.py") if not p.stem.startswith("_")}
    assert scripts == {"few_schools_icc", "contextual_effect", "loo_levels", "run_and_report",
                       "dynamic_panel"}


def test_few_schools_icc():
    import statsmodels.formula.api as smf

    r = _load("few_schools_icc").main()
    # outside check: statsmodels MixedLM REML on the same rows
    mx = smf.mixedlm("score ~ spend", r["data"], groups=r["data"]["school"]).fit(reml=True)
    assert r["reml"].sigma_unit ** 2 == pytest.approx(float(mx.cov_re.iloc[0, 0]), rel=1e-4)
    assert r["reml"].sigma_obs ** 2 == pytest.approx(float(mx.scale), rel=1e-4)
    icc = r["partition"].loc["ICC"]
    assert icc["lower"] < icc["median"] < icc["upper"]
    assert icc["reference"] == pytest.approx(r["reml"].icc)


def test_contextual_effect():
    from linearmodels.panel import PanelOLS

    r = _load("contextual_effect").main()
    d = r["data"].set_index(["household", "wave"])
    fe = PanelOLS(d["food"], d[["income"]], entity_effects=True).fit()
    tab = r["posterior"].table()
    w = tab.loc["income (within)"]
    # outside check: linearmodels PanelOLS within estimate, within four posterior SDs
    assert abs(w["estimate"] - fe.params["income"]) < 4 * w["sd"]
    ct = r["contrast"].table().loc["income"]
    assert ct["P(> 0)"] > 0.99  # simulated contextual effect 0.3 > 0
    assert r["contrast"].tests  # Hausman and Mundlak tests beside it


def test_loo_levels():
    r = _load("loo_levels").main()
    occ, unit = r["tables"]["occasion"], r["tables"]["unit"]
    assert occ.index[0] in ("random intercept", "fixed effects")
    assert np.isnan(unit.loc["fixed effects", "elpd"]) and "new unit" in unit.loc[
        "fixed effects", "note"]
    # outside check: hand-written leave-one-row-out of pooled OLS with scipy's normal
    # density and the refit's residual variance, equal to the reference exact CV
    d = r["data"]
    X = np.column_stack([np.ones(len(d)), d["footfall"]])
    y = d["sales"].to_numpy()
    total = 0.0
    for i in range(len(y)):
        keep = np.arange(len(y)) != i
        b, rss, *_ = np.linalg.lstsq(X[keep], y[keep], rcond=None)
        s2 = float(rss[0]) / (keep.sum() - X.shape[1])
        total += stats.norm.logpdf(y[i], X[i] @ b, np.sqrt(s2))
    assert occ.loc["pooled OLS (ref.)", "elpd"] == pytest.approx(total, rel=1e-8)


def test_run_and_report(tmp_path):
    from linearmodels.panel import PanelOLS
    import pandas as pd

    res = _load("run_and_report").main(str(tmp_path))
    assert (tmp_path / "report.html").exists() and (tmp_path / "analysis.toml").exists()
    import bayespanel as bp

    df, _ = bp.datasets.clinic_panel(seed=2026)
    d = df.dropna().set_index(["clinic", "quarter"])
    fe = PanelOLS(d["satisfaction"], d[["staffing", "caseload"]], entity_effects=True).fit()
    within = next(f for f in res["reference"] if f["name"] == "within")
    # outside check: linearmodels PanelOLS equals the reference fit in results.json
    got = {c["term"]: c["estimate"] for c in within["coefficients"]}
    assert got["caseload"] == pytest.approx(fe.params["caseload"], rel=1e-8)
    assert isinstance(pd.read_csv(tmp_path / "tables" / "comparison.csv"), pd.DataFrame)


def test_dynamic_panel():
    import pandas as pd
    from linearmodels.panel import PanelOLS

    r = _load("dynamic_panel").main()
    tab = r["table"].set_index("estimate of the lag")
    ic = tab.iloc[0]
    assert ic["lower"] < 0.6 < ic["upper"]                      # the known lag coefficient
    # outside check: the within estimate equals linearmodels PanelOLS on the rows with a
    # lag, the lag made by pandas on the full clinic x quarter grid (gaps stay missing)
    df = r["data"]
    grid = pd.MultiIndex.from_product([sorted(df["clinic"].unique()),
                                       range(df["quarter"].min(), df["quarter"].max() + 1)])
    full = df.set_index(["clinic", "quarter"])["wait"].reindex(grid)
    lagged = full.groupby(level=0).shift(1).reindex(
        pd.MultiIndex.from_frame(df[["clinic", "quarter"]])).to_numpy()
    d = df.assign(lag_wait=lagged).dropna().set_index(["clinic", "quarter"])
    fe = PanelOLS(d["wait"], d[["lag_wait", "nurses"]], entity_effects=True).fit()
    assert r["within"].coef["lag(wait)"] == pytest.approx(fe.params["lag_wait"], abs=1e-10)
    assert tab.iloc[1]["bias"] > 0.1 and tab.iloc[2]["bias"] < -0.05   # pooled up, within down
