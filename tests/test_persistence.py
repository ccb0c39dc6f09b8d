"""The near-unit-root note: AR(1) errors close to a random walk.

Outside reference: the simulated truth. The panel's errors are exact random walks
(``e_t = e_t-1 + z_t``, rho = 1 by construction) on top of unit intercepts of SD 1, so the
unit variance and the errors' persistence are the two things the note says are hard to
tell apart; a panel with rho = 0.3 is the contrast.
"""

import json

import numpy as np
import pandas as pd
import pytest

from bayespanel.analysis.persistence import RHO_HIGH, near_unit_root


def _panel(rho, N=40, T=12, seed=4):
    rng = np.random.default_rng(seed)
    e = np.empty((N, T))
    e[:, 0] = rng.normal(size=N)
    step = 1.0 if rho == 1 else np.sqrt(1 - rho ** 2)
    for t in range(1, T):
        e[:, t] = rho * e[:, t - 1] + step * rng.normal(size=N)
    x = rng.normal(size=(N, T))
    y = 1.0 + 0.5 * x + rng.normal(size=(N, 1)) + e
    return pd.DataFrame({"unit": np.repeat(np.arange(N), T), "year": np.tile(np.arange(T), N),
                         "x": x.ravel(), "y": y.ravel()})


def test_the_rule_on_draws():
    rng = np.random.default_rng(0)
    assert near_unit_root(rng.normal(0.5, 0.05, 2000)) is None
    assert near_unit_root(np.full(1000, RHO_HIGH - 1e-6)) is None
    text = near_unit_root(np.clip(rng.normal(0.95, 0.02, 2000), -1, 0.999),
                          title="Random intercept", icc=0.09)
    assert text.startswith("Random intercept:")
    for words in ("hard to tell apart", "ICC is not a reliable summary", "0.09",
                  "lagged outcome", "differences"):
        assert words in text
    # mean below the cut-off, but 60% of the draws at or above it: flagged
    assert near_unit_root(np.r_[np.full(600, 0.92), np.full(400, 0.8)]) is not None
    # 40% above and the mean below: not flagged
    assert near_unit_root(np.r_[np.full(400, 0.95), np.full(600, 0.84)]) is None


def test_a_run_on_a_random_walk_panel_says_so(tmp_path, cli_in_process):
    path = tmp_path / "walk.csv"
    _panel(1.0).to_csv(path, index=False)
    out = tmp_path / "run"
    res = cli_in_process("fit", path, "--unit", "unit", "--time", "year", "--formula",
                         "y ~ x", "--errors", "ar1", "--models", "random_intercept",
                         "--draws", "300", "--tune", "300", "--chains", "2",
                         "--reference", "random", "--reference-folds", "2", "--out", out)
    assert res.returncode == 0, res.stderr
    assert "hard to tell apart" in res.stdout
    doc = json.loads((out / "results.json").read_text())
    said = [w for w in doc["warnings"] if "hard to tell apart" in w]
    assert len(said) == 1 and said[0].startswith("Random intercept")
    assert "hard to tell apart" in (out / "report.html").read_text()


def test_a_moderate_rho_is_not_flagged():
    import warnings

    import bayespanel as bp
    from bayespanel.analysis.persistence import persistence_notes

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        post = bp.models.RandomIntercept(bp.Panel(_panel(0.3), "unit", "year"), "y ~ x",
                                         errors="ar1").sample(draws=200, tune=200, chains=2,
                                                              seed=1, progress=False)
    assert post.draws("rho").mean() == pytest.approx(0.3, abs=0.15)
    assert persistence_notes({"random_intercept": post}) == []
