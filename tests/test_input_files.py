"""Files and settings that are bad input get exit code 2 and a message naming them; nothing
hangs, nothing crashes with a raw exception: devices and pipes are never opened, unreadable
and damaged files, wrong types and absurd nesting in analysis files and results.json,
``--out`` naming a file, draws x chains beyond the memory available. Runs with too few
draws or no tuning finish, their LOO flagged as not computed.

Outside checks, named beside them: the data are the Grunfeld panel shipped in
statsmodels.datasets; ``/dev/zero`` and a FIFO (``os.mkfifo``) are the operating system's
own endless files; the limits of Python's ``tomllib`` and ``json`` on nesting (they raise
RecursionError); the file is damaged by flipping bits, and an attribute edited, with h5py
itself; the fewest draws PSIS can smooth is arviz-stats' rule (the tail holds
``floor(S / 5)`` draws and needs at least 5, so S >= 25); the memory available is the
kernel's MemAvailable (proc(5)).
"""

from __future__ import annotations

import json
import os
import random
import subprocess
import sys
import warnings
from contextlib import redirect_stderr, redirect_stdout
from io import StringIO

import numpy as np
import pytest

from bayespanel.app.cli import main
from bayespanel.core.errors import EstimationError, SpecificationError

UNIT, TIME = "firm", "year"
F = "invest ~ value + capital"


def _main(argv):
    out, err = StringIO(), StringIO()
    with warnings.catch_warnings(), redirect_stdout(out), redirect_stderr(err):
        warnings.simplefilter("ignore")
        rc = main(argv)
    return rc, out.getvalue(), err.getvalue()


def _fit(data, out, *extra):
    return ["fit", str(data), "--unit", UNIT, "--time", TIME, "--formula", F, "--quiet",
            "--out", str(out), *extra]


@pytest.fixture(scope="module")
def grunfeld_csv(tmp_path_factory, grunfeld):
    path = tmp_path_factory.mktemp("input_files") / "grunfeld.csv"
    grunfeld.to_csv(path, index=False)
    return path


@pytest.fixture
def no_sampling(monkeypatch):
    import bayespanel.bayes.sampling as sampling

    def tripwire(*args, **kwargs):
        raise AssertionError("sampling started on bad input")

    monkeypatch.setattr(sampling, "_run_pymc", tripwire)
    monkeypatch.setattr(sampling, "_run_nutpie", tripwire)
    monkeypatch.setattr(sampling, "_run_own", tripwire)


def _analysis(tmp_path, data_line, model_extra=""):
    path = tmp_path / "analysis.toml"
    path.write_text(f"[data]\n{data_line}\nunit = \"{UNIT}\"\ntime = \"{TIME}\"\n\n"
                    f"[model]\nformula = \"{F}\"\n{model_extra}\n")
    return path


# ---------------------------------------------------------------------- endless files
@pytest.mark.parametrize("kind", ["dev_zero_in_analysis_file", "fifo_as_data",
                                  "fifo_as_analysis_file", "dev_zero_as_results"])
def test_devices_and_pipes_are_refused_without_reading(tmp_path, kind):
    fifo = tmp_path / "pipe.csv"
    os.mkfifo(fifo)  # opening it for reading would wait for a writer forever
    argv = {"dev_zero_in_analysis_file":
            ["fit", "--config", str(_analysis(tmp_path, 'file = "/dev/zero"')), "--out",
             str(tmp_path / "o")],
            "fifo_as_data": _fit(fifo, tmp_path / "o"),
            "fifo_as_analysis_file": ["fit", "--config", str(fifo), "--out", str(tmp_path / "o")],
            "dev_zero_as_results": ["report", "/dev/zero", "--out", str(tmp_path / "o")]}[kind]
    proc = subprocess.run([sys.executable, "-m", "bayespanel", *argv], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    assert "not a regular file" in proc.stderr and "Traceback" not in proc.stderr
    assert not (tmp_path / "o").exists()


def test_a_device_is_not_a_posterior_file():
    from bayespanel.bayes.posterior import Posterior

    with pytest.raises(SpecificationError, match="not a regular file"):
        Posterior.load("/dev/zero")


def test_an_unreadable_data_file_exits_two(grunfeld_csv, tmp_path, monkeypatch, no_sampling):
    import pandas as pd

    path = tmp_path / "locked.csv"
    path.write_bytes(grunfeld_csv.read_bytes())
    os.chmod(path, 0)
    if os.geteuid() == 0:  # root reads anything: let the reader fail as it would for others
        def denied(*a, **k):
            raise PermissionError(13, "Permission denied", str(path))
        monkeypatch.setattr(pd, "read_csv", denied)
        monkeypatch.setattr("bayespanel.app.data_stage.sha256", denied)
    rc, _, err = _main(_fit(path, tmp_path / "o"))
    assert rc == 2, err
    assert "locked.csv" in err and "ermission denied" in err


def test_out_naming_a_file_exits_two(grunfeld_csv, tmp_path, no_sampling):
    target = tmp_path / "results.txt"
    target.write_text("mine\n")
    rc, _, err = _main(_fit(grunfeld_csv, target))
    assert rc == 2 and "is a file, not a folder" in err
    assert target.read_text() == "mine\n"


# ---------------------------------------------------------------------- analysis files
@pytest.mark.parametrize("data_line, model_extra, named", [
    ("file = 42", "", "[data] file = 42 must be text"),
    ('file = "DATA"', "models = 5", "[model] models = 5 must be a list of names or text"),
    ('file = "DATA"', "models = [1, 2]", "[model] models = [1, 2]"),
    ('file = "DATA"', 'formula = ["y ~ x"]', "[model] formula = ['y ~ x'] must be text"),
])
def test_wrong_types_in_the_analysis_file_exit_two(grunfeld_csv, tmp_path, no_sampling,
                                                    data_line, model_extra, named):
    data_line = data_line.replace("DATA", str(grunfeld_csv))
    path = tmp_path / "analysis.toml"
    extra = model_extra if not model_extra.startswith("formula") else ""
    formula = model_extra.split("=", 1)[1].strip() if model_extra.startswith("formula") \
        else json.dumps(F)
    path.write_text(f"[data]\n{data_line}\nunit = \"{UNIT}\"\ntime = \"{TIME}\"\n\n"
                    f"[model]\nformula = {formula}\n{extra}\n")
    rc, _, err = _main(["fit", "--config", str(path), "--out", str(tmp_path / "o")])
    assert rc == 2, err
    assert named in err


def test_a_deeply_nested_analysis_file_exits_two(tmp_path):
    # outside check: Python's own TOML reader gives up with RecursionError
    import tomllib

    text = "title = " + "[" * 50_000 + "]" * 50_000 + "\n"
    with pytest.raises(RecursionError):
        tomllib.loads(text)
    path = tmp_path / "deep.toml"
    path.write_text(text)
    rc, _, err = _main(["fit", "--config", str(path), "--out", str(tmp_path / "o")])
    assert rc == 2 and "too deeply" in err


# ---------------------------------------------------------------------- results.json
@pytest.mark.parametrize("text, named", [
    ("[1, 2, 3]\n", "a JSON list, not an object"),
    ("[" * 50_000 + "]" * 50_000, "too deeply"),          # json gives up (RecursionError)
    ('{"schema": ' + "[" * 900 + "]" * 900 + "}", "results file"),  # json reads it
])
def test_report_on_a_results_file_that_is_not_one_exits_two(tmp_path, text, named):
    (tmp_path / "results.json").write_text(text)
    rc, _, err = _main(["report", str(tmp_path), "--out", str(tmp_path / "o")])
    assert rc == 2, err
    assert named in err and "Traceback" not in err


# ---------------------------------------------------------------------- damaged posteriors
@pytest.fixture(scope="module")
def tiny_run(grunfeld_csv, tmp_path_factory):
    """A run with 4 draws per chain: too few for PSIS (8 in all), enough to save."""
    out = tmp_path_factory.mktemp("tiny") / "run"
    rc, _, err = _main(_fit(grunfeld_csv, out, "--models", "pooled", "--reference", "pooled",
                            "--draws", "4", "--tune", "30", "--chains", "2", "--sampler",
                            "pymc", "--ppc-draws", "4"))
    return out, rc, err


def test_a_run_with_too_few_draws_finishes_with_its_loo_flagged(tiny_run):
    out, rc, err = tiny_run
    assert rc == 0, err
    res = json.loads((out / "results.json").read_text())
    loo = res["models"][0]["loo"]
    assert loo["elpd"] is None
    assert "at least 25 draws in all" in loo["warning"] and "has 8" in loo["warning"]
    row = next(r for r in res["comparison"]["rows"] if r["model"] == "pooled")
    assert row["elpd"] is None and "at least 25 draws" in row["note"]


def test_psis_refuses_fewer_draws_than_it_can_smooth(tiny_run):
    import arviz_stats

    from bayespanel.analysis.loo.psis import MIN_PSIS_DRAWS, psis_arrays
    from bayespanel.bayes.posterior import Posterior

    post = Posterior.load(tiny_run[0] / "posteriors/pooled.nc")
    with pytest.raises(EstimationError, match="at least 25 draws in all"):
        post.loo("occasion")
    # outside check: arviz-stats itself fails below the minimum and works at it
    ll = np.random.default_rng(1).normal(size=(1, MIN_PSIS_DRAWS - 1, 3))
    import xarray as xr

    tree = xr.DataTree.from_dict({"log_likelihood": xr.DataTree(
        xr.Dataset({"occasion": (("chain", "draw", "row"), ll)}))})
    with pytest.raises(ValueError, match="at least 5"):
        arviz_stats.loo(tree, var_name="occasion", reff=1.0)
    ll = np.random.default_rng(1).normal(size=(1, MIN_PSIS_DRAWS, 3))
    assert np.isfinite(psis_arrays(ll, "occasion").elpd)


def test_a_run_without_tuning_finishes(grunfeld_csv, tmp_path):
    rc, _, err = _main(_fit(grunfeld_csv, tmp_path / "o", "--models", "pooled", "--reference",
                            "pooled", "--draws", "30", "--tune", "0", "--chains", "2",
                            "--sampler", "pymc", "--ppc-draws", "4"))
    assert rc == 0, err
    res = json.loads((tmp_path / "o/results.json").read_text())
    m = res["models"][0]
    assert m["diagnostics"]["warnings"]  # the untuned sampler's problems are reported
    loo = m["loo"]
    assert loo["elpd"] is not None or "could not fit the tail" in loo["warning"]


def _flip(data: bytes, pos: int, bit: int) -> bytes:
    b = bytearray(data)
    b[pos] ^= 1 << bit
    return bytes(b)


def test_a_posterior_with_flipped_bits_is_refused_or_read_unchanged(tiny_run, tmp_path):
    from bayespanel.bayes.posterior import Posterior

    src = tiny_run[0] / "posteriors/pooled.nc"
    ref = Posterior.load(src).draws("coef")
    data = src.read_bytes()
    rng = random.Random(7)
    refused = 0
    for i in range(20):
        path = tmp_path / f"flip{i}.nc"
        path.write_bytes(_flip(data, rng.randrange(len(data)), rng.randrange(8)))
        try:
            got = Posterior.load(path).draws("coef")
        except SpecificationError:
            refused += 1
            continue
        # a bit in padding or an unused byte: the same numbers, never others
        assert np.array_equal(got, ref), i
    assert refused > 0


def test_a_flipped_bit_in_the_draws_is_caught_by_the_checksum(tiny_run, tmp_path):
    import h5py

    from bayespanel.bayes.posterior import Posterior

    src = tiny_run[0] / "posteriors/pooled.nc"
    with h5py.File(src, "r") as f:  # outside tool: HDF5 says where the draws are stored
        offset = f["posterior/coef"].id.get_chunk_info(0).byte_offset
    path = tmp_path / "flipped.nc"
    path.write_bytes(_flip(src.read_bytes(), offset + 3, 5))
    with pytest.raises(SpecificationError, match="flipped.nc.*damaged"):
        Posterior.load(path)


@pytest.mark.parametrize("group, attr, value", [
    ("/", "bayespanel_sampling", "{"),                       # not JSON any more
    ("/", "bayespanel_spec", '{"kind": "pooled"}'),          # valid JSON, fields missing
    ("/", "bayespanel_scaling", "null"),                     # valid, but not what was saved
    ("/bayespanel_stats", "n", 999),                         # a size changed
])
def test_a_posterior_with_an_edited_attribute_is_refused(tiny_run, tmp_path, group, attr, value):
    import h5py

    from bayespanel.bayes.posterior import Posterior

    path = tmp_path / "edited.nc"
    path.write_bytes((tiny_run[0] / "posteriors/pooled.nc").read_bytes())
    with h5py.File(path, "r+") as f:  # outside tool: HDF5's own library edits the file
        f[group].attrs[attr] = value
    with pytest.raises(SpecificationError, match="edited.nc"):
        Posterior.load(path)


def test_a_posterior_saved_before_checksums_still_loads(tiny_run, tmp_path):
    from bayespanel.bayes.posterior import Posterior

    post = Posterior.load(tiny_run[0] / "posteriors/pooled.nc")
    post._tree(True).to_netcdf(tmp_path / "plain.nc", engine="h5netcdf")  # as before
    assert Posterior.load(tmp_path / "plain.nc").summary().equals(post.summary())


# ---------------------------------------------------------------------- memory
@pytest.mark.parametrize("option, value", [("--draws", "1000000000000"),
                                           ("--chains", "100000")])
def test_draws_and_chains_beyond_memory_are_refused_up_front(grunfeld_csv, tmp_path,
                                                             no_sampling, option, value):
    from bayespanel.core.budget import available_bytes

    rc, _, err = _main(_fit(grunfeld_csv, tmp_path / "o", "--models", "pooled",
                            "--reference", "pooled", option, value))
    assert rc == 2, err
    name = option.lstrip("-")
    assert f"{name}={value}" in err and "available" in err
    # the limit named is the kernel's figure (MemAvailable), within the few MB that moved
    gb = float(err.split("than the ")[1].split(" GB")[0])
    assert abs(gb * 1e9 - available_bytes()) < 0.05 * available_bytes()
    other = "chains" if name == "draws" else "draws"
    assert f"{name} at most" in err or f"{other} at most" in err
    assert not (tmp_path / "o").exists()


def test_the_largest_draws_named_fit_and_one_more_does_not(grunfeld, tmp_path):
    from bayespanel.core.budget import check_run_memory
    from bayespanel.app.runner import Settings

    import bayespanel as bp

    design = bp.Panel(grunfeld, UNIT, TIME).design(F)
    s = Settings(unit=UNIT, time=TIME, formula=F, models=("pooled",), draws=10**7, chains=2)
    with pytest.raises(SpecificationError) as info:
        check_run_memory(s, design, available=2 * 10**9)
    most = int(str(info.value).split("draws at most ")[1].split(" ")[0])
    check_run_memory(s.__class__(**{**s.to_dict(), "draws": most}), design, available=2 * 10**9)
    with pytest.raises(SpecificationError):
        check_run_memory(s.__class__(**{**s.to_dict(), "draws": most + 1}), design,
                         available=2 * 10**9)
