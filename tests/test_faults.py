"""Faults: atomic outputs, interrupted and killed fits, and sampling problems flagged in
every output with a strict mode that fails the run.

Outside checks, named beside them: PyMC itself returns a truncated trace when interrupted
(shown on ``pymc.sample`` directly, which is why our sampler refuses one); the R-hat and
ESS written to results.json equal arviz-stats' own ``rhat``/``ess`` on the saved draws;
the file permissions follow the process umask as ``os.open`` would give them; the data
are the Grunfeld panel shipped in statsmodels.datasets.
"""

from __future__ import annotations

import json
import os
from contextlib import redirect_stderr, redirect_stdout
from io import StringIO
import subprocess
import sys
import warnings

import numpy as np
import pytest

import bayespanel as bp
from bayespanel.app.cli import EXIT_SAMPLING, _strict_exit, main
from bayespanel.report.results_json import write_atomic

UNIT, TIME = "firm", "year"
F = "invest ~ value + capital"
N_DIVERGENT = 3


def _snapshot(folder):
    """Every file under ``folder`` (hidden ones too) -> its bytes, except the lock file,
    which names the last process that held the folder (docs/guarantees.md, section 4)."""
    return {str(p.relative_to(folder)): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()
            and p.relative_to(folder).as_posix() != ".bayespanel/lock"}


@pytest.fixture(scope="module")
def grunfeld_csv(tmp_path_factory, grunfeld):
    path = tmp_path_factory.mktemp("faults_data") / "grunfeld.csv"
    grunfeld.to_csv(path, index=False)
    return path


def _argv(csv, out, *extra, draws=40):
    return ["fit", str(csv), "--unit", UNIT, "--time", TIME, "--formula", F,
            "--models", "random_intercept", "--reference", "random", "--draws", str(draws),
            "--tune", "40", "--chains", "2", "--seed", "11", "--ppc-draws", "20",
            "--out", str(out), *extra]


@pytest.fixture(scope="module")
def flawed_run(grunfeld_csv, tmp_path_factory):
    """A finished run whose sampler reported divergences and a chain off on its own.

    The real sampler runs; its trace is then marked with ``N_DIVERGENT`` divergences and
    chain 1 of ``coef`` is shifted, so R-hat is high. 80 draws also leave ESS low, and
    Pareto k at the occasion level is high for Grunfeld's largest firms.
    """
    import bayespanel.bayes.sampling as sampling

    real = sampling._run_own

    def flawed(*args, **kwargs):
        dt = real(*args, **kwargs)
        dt["sample_stats"]["diverging"].values[0, :N_DIVERGENT] = True  # in place
        coef = dt["posterior"]["coef"].values
        coef[1] += 10 * coef.std(axis=(0, 1))
        return dt

    out = tmp_path_factory.mktemp("faults_run")
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(sampling, "_run_own", flawed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            stdout, stderr = StringIO(), StringIO()
            with redirect_stdout(stdout), redirect_stderr(stderr):
                rc = main(_argv(grunfeld_csv, out, "--strict"))
    assert rc in (0, 3), stderr.getvalue()
    return out, rc, stdout.getvalue(), stderr.getvalue()


# ---------------------------------------------------------------------- atomic writes
@pytest.mark.parametrize("where", ["write", "fsync", "replace"])
def test_an_interrupted_write_leaves_the_old_file(tmp_path, monkeypatch, where):
    target = tmp_path / "results.json"
    target.write_text('{"old": true}\n')
    real_fdopen = os.fdopen

    def interrupt(*a, **k):
        raise KeyboardInterrupt

    class Half:  # writes half, then is interrupted
        def __init__(self, fh):
            self.fh = fh

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            self.fh.close()

        def write(self, data):
            self.fh.write(data[: len(data) // 2])
            raise KeyboardInterrupt

    if where == "write":
        monkeypatch.setattr(os, "fdopen", lambda *a, **k: Half(real_fdopen(*a, **k)))
    else:
        monkeypatch.setattr(os, where, interrupt)
    with pytest.raises(KeyboardInterrupt):
        write_atomic(target, '{"new": true, "long": "' + "x" * 10000 + '"}\n')
    monkeypatch.undo()
    assert target.read_text() == '{"old": true}\n'
    assert sorted(p.name for p in tmp_path.iterdir()) == ["results.json"]  # no temp left


def test_atomic_files_get_the_usual_permissions(tmp_path):
    # outside check: the mode os.open gives a new file under this process's umask
    probe = tmp_path / "probe"
    os.close(os.open(probe, os.O_CREAT | os.O_WRONLY, 0o666))
    write_atomic(tmp_path / "new.txt", "x")
    assert (tmp_path / "new.txt").stat().st_mode & 0o777 == probe.stat().st_mode & 0o777
    os.chmod(tmp_path / "new.txt", 0o640)
    write_atomic(tmp_path / "new.txt", "y")  # a replaced file keeps its mode
    assert (tmp_path / "new.txt").stat().st_mode & 0o777 == 0o640


# ---------------------------------------------------------------------- sampling problems
def test_problems_are_flagged_in_results_json(flawed_run):
    import arviz_stats as azs

    from bayespanel.bayes.posterior import Posterior

    out, rc, _, _ = flawed_run
    res = json.loads((out / "results.json").read_text("utf-8"))
    m = res["models"][0]
    d = m["diagnostics"]
    text = " | ".join(d["warnings"])
    assert d["divergences"] == N_DIVERGENT
    assert f"{N_DIVERGENT} divergent transition(s)" in text
    assert "R-hat above 1.01" in text and "ESS below" in text
    assert m["loo"]["n_high_pareto_k"] > 0  # Grunfeld's largest firms at the occasion level
    # outside check: arviz-stats' R-hat and ESS of the saved draws are the numbers written
    post = Posterior.load(out / m["posterior_file"])
    coef = post.draws("coef")
    rhat = max(float(azs.rhat(coef[:, :, j])) for j in range(coef.shape[2]))
    ess = min(float(azs.ess(coef[:, :, j], method="bulk")) for j in range(coef.shape[2]))
    assert d["max_rhat"] >= rhat - 1e-9 and rhat > 1.5
    assert d["min_ess_bulk"] <= ess + 1e-9


def test_problems_are_flagged_in_the_report_and_on_screen(flawed_run, tmp_path, capsys):
    out, rc, stdout, stderr = flawed_run
    html = (out / "report.html").read_text("utf-8")
    assert "divergent transition" in html and "R-hat above" in html and "Pareto k" in html
    assert "warning: 3 divergent transition(s)" in stdout
    assert "sampling problems (" in stdout and "comparison problems (" in stdout
    assert "with Pareto k above" in stdout and "--refit-high-k" in stdout
    # the report rebuilt from results.json alone carries them too
    assert main(["report", str(out), "--out", str(tmp_path)]) == 0
    capsys.readouterr()
    assert "divergent transition" in (tmp_path / "report.html").read_text("utf-8")


def test_strict_mode_fails_the_run_and_still_writes(flawed_run):
    out, rc, _, stderr = flawed_run
    assert rc == EXIT_SAMPLING == 3
    assert "--strict:" in stderr and "problem(s) (sampling or comparison)" in stderr
    assert (out / "results.json").exists()  # outputs are written either way
    res = json.loads((out / "results.json").read_text("utf-8"))
    assert _strict_exit(res, strict=False) == 0  # without --strict: reported, exit 0
    clean = {**res, "models": [{**m, "diagnostics": {**m["diagnostics"], "warnings": []},
                                "loo": {**m["loo"], "n_high_pareto_k": 0}} for m in res["models"]]}
    assert _strict_exit(clean, strict=True) == EXIT_SAMPLING  # the stored list counts
    clean.pop("problems")  # an older results file: the list is computed the same way
    assert _strict_exit(clean, strict=True) == 0


# ---------------------------------------------------------------------- interruptions
def test_keyboard_interrupt_in_sampling_leaves_earlier_outputs(flawed_run, grunfeld_csv,
                                                               monkeypatch, capsys):
    import bayespanel.bayes.sampling as sampling

    out = flawed_run[0]
    before = _snapshot(out)

    def interrupted(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(sampling, "_run_own", interrupted)
    argv = _argv(grunfeld_csv, out, "--quiet")
    argv[argv.index("11")] = "12"  # another run into the same folder
    assert main(argv) == 1
    assert "bayespanel: interrupted" in capsys.readouterr().err
    assert _snapshot(out) == before  # analysis.toml, results.json, report, posterior


def test_pymc_swallows_an_interrupt_and_we_refuse_the_truncated_trace(grunfeld, monkeypatch):
    import pymc as pm

    m = bp.models.RandomIntercept(bp.Panel(grunfeld, UNIT, TIME), F)

    def stop(trace, draw):
        if not draw.tuning and draw.draw_idx >= 40 + 15:
            raise KeyboardInterrupt

    # outside check: pymc.sample catches the interrupt and returns fewer draws than asked
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        dt = pm.sample(draws=60, tune=40, chains=1, cores=1, model=m.pymc_model,
                       random_seed=1, progressbar=False, callback=stop,
                       compute_convergence_checks=False)
    assert dt["posterior"].sizes["draw"] < 60
    real = pm.sample
    monkeypatch.setattr(pm, "sample", lambda *a, **k: real(*a, callback=stop, **k))
    with pytest.raises(KeyboardInterrupt, match=r"interrupted after 1 chain\(s\) x \d+ draws "
                                                r"of the 1 x 60 asked for"):
        m.sample(draws=60, tune=40, chains=1, seed=1, progress=False, sampler="pymc")


def test_a_killed_fit_leaves_earlier_outputs(flawed_run, grunfeld_csv):
    out = flawed_run[0]
    before = _snapshot(out)
    argv = _argv(grunfeld_csv, out, draws=100000)
    argv[argv.index("11")] = "13"
    proc = subprocess.Popen([sys.executable, "-m", "bayespanel", *argv],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        lines = []
        for line in proc.stderr:  # progress lines: wait until the sampler runs
            lines.append(line)
            if "sampling random_intercept" in line:
                break
        assert any("sampling random_intercept" in x for x in lines), lines
        proc.kill()
    finally:
        proc.wait(timeout=60)
        proc.stderr.close()
    assert proc.returncode == -9
    assert _snapshot(out) == before
    assert np.isfinite(json.loads(before["results.json"])["models"][0]["coefficients"][0]
                       ["estimate"])


def test_an_interrupt_in_our_sampler_keeps_no_draws(grunfeld, monkeypatch):
    # bayespanel's own sampler does not catch the interrupt: nothing partial comes back
    from bayespanel.bayes import nuts

    m = bp.models.RandomIntercept(bp.Panel(grunfeld, UNIT, TIME), F)
    real = nuts.sample_chain

    def stop(*a, **k):
        def interrupt(it):
            if it >= 100:
                raise KeyboardInterrupt
        return real(*a, **{**k, "callback": interrupt})

    monkeypatch.setattr(nuts, "sample_chain", stop)
    with pytest.raises(KeyboardInterrupt):
        m.sample(draws=60, tune=80, chains=1, seed=1, progress=False)
