"""The command line on Parquet folders out of core (``--out-of-core``).

Outside checks, named beside each: the wage panel of Vella and Verbeek (1998), as
shipped in linearmodels' datasets, written as several Parquet files; the out-of-core
``describe`` prints what the in-memory one prints on the same file; the out-of-core
``fit`` gives the in-memory reference estimates to 1e-10 and linearmodels' PanelOLS
within estimates, Bayesian posterior means within Monte Carlo error of the in-memory
run, and a results.json that jsonschema's Draft 2020-12 validator accepts.
Passes run on Dask's synchronous scheduler (no cluster), chosen by the environment
variable the command line reads.
"""

import json
import warnings

import numpy as np
import pytest

from bayespanel.app.cli import main

FORMULA = "lwage ~ exper + expersq + union + married + educ + black"


@pytest.fixture(autouse=True)
def _no_cluster(monkeypatch):
    monkeypatch.setenv("BAYESPANEL_DASK_SCHEDULER", "synchronous")


@pytest.fixture(scope="module")
def wage_files(tmp_path_factory, wage_panel):
    """The wage panel as one Parquet file and as a folder of 5 files split inside units."""
    root = tmp_path_factory.mktemp("wage_parquet")
    wage_panel.to_parquet(root / "wage.parquet", index=False)
    folder = root / "parts"
    folder.mkdir()
    for i, idx in enumerate(np.array_split(np.arange(len(wage_panel)), 5)):
        wage_panel.iloc[idx].to_parquet(folder / f"part{i}.parquet", index=False)
    wage_panel.to_csv(root / "wage.csv", index=False)
    return root


def test_describe_out_of_core_prints_the_in_memory_numbers(wage_files, wage_panel, capsys):
    # outside data: linearmodels' wage panel; the reference is the in-memory describe
    assert main(["describe", str(wage_files / "wage.parquet"), "--unit", "nr", "--time",
                 "year"]) == 0
    memory = capsys.readouterr().out
    assert main(["describe", str(wage_files / "parts"), "--unit", "nr", "--time", "year",
                 "--out-of-core"]) == 0
    captured = capsys.readouterr()
    assert captured.out == memory
    assert "545 units (nr) observed on 8 occasions" in captured.out
    assert "pass: describe and structure (5 partitions)" in captured.err
    # the between and within SDs of lwage, computed here with pandas from the rows
    row = next(x for x in captured.out.splitlines() if x.startswith("lwage")).split()
    g = wage_panel.groupby("nr")["lwage"]
    within = wage_panel["lwage"] - g.transform("mean")
    assert float(row[5]) == pytest.approx(g.mean().std(), abs=5e-4)
    assert float(row[6]) == pytest.approx(np.sqrt((within ** 2).sum() / (len(within) - 1)),
                                          abs=5e-4)


def test_out_of_core_refuses_csv(wage_files, capsys):
    assert main(["describe", str(wage_files / "wage.csv"), "--unit", "nr", "--time", "year",
                 "--out-of-core"]) == 2
    err = capsys.readouterr().err
    assert "is not Parquet" in err and "--out-of-core" in err


def _fit(data, out, *extra):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(["fit", str(data), "--unit", "nr", "--time", "year", "--formula", FORMULA,
                   "--models", "random_intercept,within_between", "--draws", "300", "--tune",
                   "300", "--chains", "2", "--seed", "3", "--out", str(out), "--quiet", *extra])
    assert rc == 0
    return json.loads((out / "results.json").read_text("utf-8"))


@pytest.fixture(scope="module")
def runs(wage_files, tmp_path_factory):
    import os

    os.environ["BAYESPANEL_DASK_SCHEDULER"] = "synchronous"  # module scope: no monkeypatch
    try:
        large = _fit(wage_files / "parts", tmp_path_factory.mktemp("large"), "--out-of-core")
    finally:
        del os.environ["BAYESPANEL_DASK_SCHEDULER"]
    # The in-memory run scores its reference fits by 2-fold CV, not by the default exact
    # leave-one-out of all 4,360 rows (thousands of refits, about half a minute): no test
    # here reads them (the out-of-core run leaves reference fits out of its comparison),
    # and tests/test_comparison_story.py checks that default on this panel.
    memory = _fit(wage_files / "wage.parquet", tmp_path_factory.mktemp("memory"),
                  "--reference-folds", "2")
    return memory, large


def _by(entries, key="term"):
    return {e[key]: e for e in entries}


def test_reference_fits_and_tests_equal_the_in_memory_run(runs, wage_panel):
    from linearmodels.panel import PanelOLS

    memory, large = runs
    for fm, fl in zip(memory["reference"], large["reference"]):
        assert fm["name"] == fl["name"]
        cm, cl = _by(fm["coefficients"]), _by(fl["coefficients"])
        assert cm.keys() == cl.keys()
        for t in cm:  # reference: the in-memory fit on the same file
            for q in ("estimate", "se", "lower", "upper"):
                assert cl[t][q] == pytest.approx(cm[t][q], rel=1e-10, abs=1e-12), (fm["name"], t, q)
        for q in ("sigma_unit", "sigma_obs", "icc"):
            if fm[q] is not None:
                assert fl[q] == pytest.approx(fm[q], rel=1e-10)
    # outside check: linearmodels PanelOLS with entity effects, clustered by unit
    d = wage_panel.set_index(["nr", "year"])
    fe = PanelOLS(d["lwage"], d[["exper", "expersq", "union", "married"]],
                  entity_effects=True).fit(cov_type="clustered", cluster_entity=True)
    within = _by(_by(large["reference"], "name")["within"]["coefficients"])
    for t in ("exper", "expersq", "union", "married"):
        assert within[t]["estimate"] == pytest.approx(fe.params[t], rel=1e-8)
    for tm, tl in zip(memory["tests"], large["tests"]):
        assert tl["name"] == tm["name"]
        assert tl["statistic"] == pytest.approx(tm["statistic"], rel=1e-8)


def test_posterior_means_agree_within_monte_carlo_error(runs):
    memory, large = runs
    for mm, ml in zip(memory["models"], large["models"]):
        assert mm["name"] == ml["name"]
        rows = [(_by(mm["coefficients"]), _by(ml["coefficients"])),
                (_by(mm["scale"], "name"), _by(ml["scale"], "name"))]
        for cm, cl in rows:
            for t in cm:
                # Monte Carlo SE of each mean: sd / sqrt(ESS); 4 joint SEs
                mcse = np.hypot(cm[t]["sd"] / np.sqrt(cm[t]["ess_bulk"]),
                                cl[t]["sd"] / np.sqrt(cl[t]["ess_bulk"]))
                assert abs(cl[t]["estimate"] - cm[t]["estimate"]) < 4 * mcse, (mm["name"], t)
        # the plug-in variance partition of the reference fit: from the statistics out of
        # core, from the rows in memory (two independent computations)
        vm, vl = _by(mm["variance_partition"]["summary"], "quantity"), \
            _by(ml["variance_partition"]["summary"], "quantity")
        for q in ("unit SD", "occasion SD", "ICC"):
            assert vl[q]["reference"] == pytest.approx(vm[q]["reference"], rel=1e-10)
        em = _by(mm["variance_partition"]["explained"], "part")
        el = _by(ml["variance_partition"]["explained"], "part")
        for part in em:
            for lev in ("total", "within", "between"):
                if em[part][lev] is not None:
                    assert el[part][lev] == pytest.approx(em[part][lev], abs=0.02)
    cm = _by(_by(memory["models"], "name")["within_between"]["contrasts"], "covariate")
    cl = _by(_by(large["models"], "name")["within_between"]["contrasts"], "covariate")
    for c in cm:
        assert cl[c]["reference_estimate"] == pytest.approx(cm[c]["reference_estimate"],
                                                            rel=1e-10)


def test_out_of_core_results_validate_and_say_what_is_left_out(runs, wage_files):
    import jsonschema  # outside check: the jsonschema library's Draft 2020-12 validator

    import bayespanel as bp
    from bayespanel.app.runner import load_settings

    memory, large = runs
    schema = bp.report.results_json.schema()
    for r in runs:
        jsonschema.Draft202012Validator(schema).validate(r)
    assert "out_of_core" not in memory
    ooc = large["out_of_core"]
    assert ooc["partitions"] == 5 and ooc["rows_read"] == 4360
    assert ooc["loo_observations"] == 400
    items = {x["item"] for x in ooc["left_out"]}
    assert "posterior predictive checks" in items
    assert "reference fits in the LOO comparison" in items
    assert all(m["ppc"] == [] for m in large["models"])
    # the comparison holds the Bayesian models, scored by the sub-sampling estimator
    rows = large["comparison"]["rows"]
    assert {r["kind"] for r in rows} == {"bayesian"} and len(rows) == 2
    for m in large["models"]:
        loo = m["loo"]
        assert loo["observations"] == 400 and loo["n_points"] == 4360
        assert "sub-sampled" in loo["method"]
        full = _by(memory["models"], "name")[m["name"]]["loo"]  # full PSIS-LOO in memory
        assert abs(loo["elpd"] - full["elpd"]) < 4 * np.hypot(loo["subsampling_se"] or 0, 5.0)
    # the analysis file reruns the out-of-core route
    toml = large["settings"]["toml"]
    path = wage_files / "large.toml"
    path.write_text(toml, "utf-8")
    assert load_settings(path).out_of_core is True


def test_a_parquet_folder_is_fingerprinted_for_reruns(tmp_path, wage_panel):
    # Reference: hashlib's SHA-256 of each file, combined in path order as documented in
    # docs/results-schema.md; a changed file must change the fingerprint and make the
    # rerun of the analysis file warn.
    import hashlib

    from bayespanel.app.data_stage import source_record
    from bayespanel.app.runner import Settings

    folder = tmp_path / "parts"
    folder.mkdir()
    for i, idx in enumerate(np.array_split(np.arange(len(wage_panel)), 3)):
        wage_panel.iloc[idx].to_parquet(folder / f"part{i}.parquet", index=False)
    (folder / ".hidden").write_text("not data")
    expected = hashlib.sha256()
    for f in sorted(folder.glob("part*.parquet")):
        expected.update(f.name.encode() + b"\0" + hashlib.sha256(f.read_bytes()).digest())
    settings = Settings(unit="nr", time="year", formula=FORMULA, data=str(folder))
    digest = source_record(settings, "test")["sha256"]
    assert digest == expected.hexdigest()
    wage_panel.iloc[:10].to_parquet(folder / "part1.parquet", index=False)
    rerun = Settings(unit="nr", time="year", formula=FORMULA, data=str(folder),
                     data_sha256=digest)
    with pytest.warns(UserWarning, match="has changed since the analysis file"):
        assert source_record(rerun, "test")["sha256"] != digest
