"""The compiled log density kept on disk across processes is never reused for another
graph, and a reused one reads the current data.

Each run fits RandomIntercept to the wage panel of Vella and Verbeek (1998,
linearmodels.datasets) with the compile cache in a private folder; run 1 is one fresh
interpreter, runs 2 to 5 another, so every entry they find was written by another
process (and each run builds its model anew, so it can only find an entry on disk):

1. a model: compiled and stored (a miss);
2. the same model again: found (a hit), and the same draws bit for bit as run 1;
3. the same graph with a different prior *parameter* (a pm.Data value, not the graph):
   found, and the draws follow the new prior (a normal prior of SD 0.001 at 3.0 on
   ``union`` puts the posterior mean there, which the data alone put near 0.08);
4. a different prior *family* on ``union`` (another graph): not found, compiled, stored;
5. one more covariate (another graph): not found, and ``married`` gets a coefficient.

The stored entry holds none of the model's data (the statistics and prior parameters
are pushed in before every use).
"""

import json
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest

SCRIPT = textwrap.dedent("""
    import json, os, sys, warnings
    import numpy as np
    import bayespanel as bp
    from linearmodels.datasets import wage_panel
    warnings.simplefilter("ignore")
    panel = bp.Panel(wage_panel.load(), "nr", "year")
    for formula, priors in json.loads(sys.argv[1]):
        m = bp.models.RandomIntercept(panel, formula, priors=priors or None)
        post = m.sample(draws=100, tune=100, chains=2, seed=5, progress=False,
                        sampler="pymc", cores=1)
        entries = [f for f in os.listdir(os.environ["BAYESPANEL_COMPILE_CACHE"])
                   if f.endswith(".pkl")]
        print("RESULT " + json.dumps({
            "cache": post.sampling["compile_cache"], "coef": post.coef.to_dict(),
            "draws": post.draws("coef").ravel().tolist(), "entries": len(entries)}),
            flush=True)
""")


def _run(cache, *jobs):
    """One fresh interpreter fitting each ``(formula, priors)`` of ``jobs`` in turn."""
    env = dict(os.environ, BAYESPANEL_COMPILE_CACHE=str(cache))
    res = subprocess.run([sys.executable, "-c", SCRIPT,
                          json.dumps([[f, p or {}] for f, p in jobs])],
                         capture_output=True, text=True, timeout=900, env=env)
    assert res.returncode == 0, res.stderr[-3000:]
    out = [json.loads(x[7:]) for x in res.stdout.splitlines() if x.startswith("RESULT ")]
    assert len(out) == len(jobs), res.stdout[-3000:]
    return out


@pytest.mark.slow  # two fresh interpreters importing PyMC, five compiled or found models
def test_cache_entries_follow_the_graph_and_the_data(tmp_path):
    base = "lwage ~ exper + union"
    (first,) = _run(tmp_path, (base, None))
    assert first["cache"] == "miss"
    entries = list(tmp_path.glob("*.pkl"))
    assert len(entries) == 1 and first["entries"] == 1
    # the entry holds no data: not the model's cross-products (nor any statistic)
    from linearmodels.datasets import wage_panel

    import bayespanel as bp

    m = bp.models.RandomIntercept(bp.Panel(wage_panel.load(), "nr", "year"), base)
    stored = entries[0].read_bytes()
    for name, value in m._data_values().items():
        value = np.asarray(value, dtype=float)
        if value.size > 1 and np.any(value != 0):
            assert value.tobytes() not in stored, name
    again, tight, other, wider = _run(
        tmp_path, (base, None),
        (base, {"union": {"family": "normal", "mu": 3.0, "sigma": 0.001}}),
        (base, {"union": "student_t"}), (base + " + married", None))
    assert again["cache"] == "hit"
    assert again["draws"] == first["draws"]  # the stored function computes the same numbers
    assert tight["cache"] == "hit"  # prior parameters are data of the same graph ...
    assert abs(first["coef"]["union"] - 3.0) > 2.0
    assert tight["coef"]["union"] == pytest.approx(3.0, abs=0.01)  # ... and are read anew
    assert tight["entries"] == 1
    assert other["cache"] == "miss"
    assert other["entries"] == 2
    assert wider["cache"] == "miss" and "married" in wider["coef"]
    assert wider["entries"] == 3
    assert len(list(tmp_path.glob("*.pkl"))) == 3
