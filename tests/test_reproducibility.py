"""Reproducibility: the same seed and settings give identical numbers, at the command line
(results.json and the saved draws) and in Python; the analysis file written by a run
repeats it exactly; the input's row order does not matter.

Outside checks, named beside them: the data are the Grunfeld panel shipped in
statsmodels.datasets; the reproduced posterior sits on statsmodels MixedLM (REML); the
analysis file is read back with the standard library's ``tomllib``.
"""

from __future__ import annotations

import json
import tomllib
import warnings

import numpy as np
import pytest

import bayespanel as bp
from bayespanel.app.cli import main
from bayespanel.bayes.posterior import Posterior

UNIT, TIME = "firm", "year"
F = "invest ~ value + capital"
VOLATILE = {"created", "seconds"}  # wall-clock facts, not results


def _strip(obj):
    if isinstance(obj, dict):
        return {k: _strip(v) for k, v in obj.items() if k not in VOLATILE}
    if isinstance(obj, list):
        return [_strip(v) for v in obj]
    return obj


@pytest.fixture(scope="module")
def two_runs(grunfeld, tmp_path_factory):
    """Run A from options; run B from A's analysis file into another folder."""
    root = tmp_path_factory.mktemp("repro")
    csv = root / "grunfeld.csv"
    grunfeld.to_csv(csv, index=False)
    a, b = root / "a", root / "b"
    argv = ["fit", str(csv), "--unit", UNIT, "--time", TIME, "--formula", F,
            "--models", "within_between", "--reference", "random",
            "--draws", "60", "--tune", "60", "--chains", "2", "--seed", "2024",
            "--ppc-draws", "30", "--out", str(a), "--quiet"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(argv) == 0
        assert main(["fit", "--config", str(a / "analysis.toml"), "--out", str(b),
                     "--quiet"]) == 0
    return a, b


def test_rerun_from_the_analysis_file_gives_identical_results(two_runs, capsys):
    a, b = two_runs
    capsys.readouterr()
    ra = json.loads((a / "results.json").read_text("utf-8"))
    rb = json.loads((b / "results.json").read_text("utf-8"))
    assert ra["created"] and ra["models"][0]["sampling"]["seconds"] > 0  # present, stripped
    assert _strip(ra) == _strip(rb)  # every number, bit for bit
    # outside check: the analysis file is plain TOML with the seed and the data's SHA-256
    doc = tomllib.loads((a / "analysis.toml").read_text("utf-8"))
    assert doc["sampling"]["seed"] == 2024
    assert doc["data"]["sha256"] == ra["data"]["source"]["sha256"]
    assert (a / "analysis.toml").read_text() == (b / "analysis.toml").read_text()


def test_saved_draws_are_identical(two_runs, grunfeld):
    a, b = two_runs
    for name in ("within_between",):
        pa = Posterior.load(a / "posteriors" / f"{name}.nc")
        pb = Posterior.load(b / "posteriors" / f"{name}.nc")
        for var in pa.idata["posterior"].data_vars:
            np.testing.assert_array_equal(pa.idata["posterior"][var].values,
                                          pb.idata["posterior"][var].values)
    # outside check: the reproduced posterior is on statsmodels MixedLM (REML)
    import statsmodels.formula.api as smf

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ml = smf.mixedlm(F, grunfeld, groups=UNIT).fit(reml=True)
    # (Grunfeld's within and between slopes are close, so the hybrid's within slope sits
    # on the random-effects slope as well)
    pa = Posterior.load(a / "posteriors" / "within_between.nc")
    for t in ("value", "capital"):
        assert abs(pa.coef[f"{t} (within)"] - ml.params[t]) < 4 * pa.sd[f"{t} (within)"]


@pytest.fixture(scope="module")
def model(grunfeld):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return bp.models.RandomIntercept(bp.Panel(grunfeld, UNIT, TIME), F)


def _sample(m, seed):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return m.sample(draws=40, tune=40, chains=2, cores=1, seed=seed, progress=False)


def test_python_api_same_seed_same_draws(model):
    a, b, c = _sample(model, 7), _sample(model, 7), _sample(model, 8)
    np.testing.assert_array_equal(a.draws("coef"), b.draws("coef"))
    np.testing.assert_array_equal(a.draws("sigma_unit"), b.draws("sigma_unit"))
    assert not np.array_equal(a.draws("coef"), c.draws("coef"))  # the seed matters


def test_a_drawn_seed_is_recorded_and_repeats_the_run(model):
    a = _sample(model, None)
    seed = a.sampling["seed"]
    assert isinstance(seed, int) and seed >= 0
    np.testing.assert_array_equal(_sample(model, seed).draws("coef"), a.draws("coef"))


def test_row_order_of_the_input_does_not_change_the_draws(grunfeld, model):
    shuffled = grunfeld.sample(frac=1.0, random_state=3).reset_index(drop=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m2 = bp.models.RandomIntercept(bp.Panel(shuffled, UNIT, TIME), F)
    np.testing.assert_array_equal(_sample(m2, 7).draws("coef"), _sample(model, 7).draws("coef"))
