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


def run_main(*args, env=None, cwd=None):
    """``python -m bayespanel ARGS`` run in this process, for tests that read what a run
    writes and prints rather than how an interpreter starts: ``bayespanel.app.cli.main``
    with its output captured, returned as a ``subprocess.CompletedProcess`` (``returncode``,
    ``stdout``, ``stderr``) like the subprocess it replaces, without the seconds each fresh
    interpreter spends importing PyMC. ``env`` sets environment variables for the run
    (restored after it), ``cwd`` the working directory. Tests of the entry point itself,
    of signals, resource limits, start-up warnings or a fresh process's caches keep their
    real subprocess."""
    import contextlib
    import io
    import subprocess

    from bayespanel.app.cli import main

    argv = [str(a) for a in args]
    out, err = io.StringIO(), io.StringIO()
    saved = {k: os.environ.get(k) for k in (env or {})}
    try:
        os.environ.update({k: str(v) for k, v in (env or {}).items()})
        with contextlib.ExitStack() as stack:
            if cwd is not None:
                stack.enter_context(contextlib.chdir(cwd))
            stack.enter_context(contextlib.redirect_stdout(out))
            stack.enter_context(contextlib.redirect_stderr(err))
            try:
                rc = main(argv)
            except SystemExit as exc:  # argparse's --help, --version and usage errors
                rc = exc.code if isinstance(exc.code, int) else int(exc.code is not None)
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
    return subprocess.CompletedProcess(["bayespanel", *argv], rc, out.getvalue(),
                                       err.getvalue())


@pytest.fixture(scope="session")
def cli_in_process():
    """:func:`run_main`, for module-scoped fixtures and tests (see its docstring)."""
    return run_main
