"""One list of a run's problems, for every output.

:func:`problems` reads a results dictionary and returns every problem a reader must know
about, once. The runner stores the list in ``results.json`` (``problems``); the console
summary, the report's first screen and its diagnostics section all print that stored
list, so the three never disagree. A results file written before the list existed gets
it from the same function when read.

Kinds:

* ``"sampling"``: the posterior sample itself is in doubt (divergent transitions, R-hat,
  ESS, energy), so the estimates may be wrong;
* ``"comparison"``: the sample is fine but a model's LOO estimate is not: points whose
  Pareto k exceeds the threshold make its ELPD, and so its place in the comparison,
  unreliable (Vehtari et al. 2024); also problems of the exact refits made for them.
"""

from __future__ import annotations

__all__ = ["problems", "stored", "KINDS", "REFIT_OPTION"]

KINDS = ("sampling", "comparison")

#: the command-line option (and analysis-file key) that refits high-k points exactly
REFIT_OPTION = "--refit-high-k"


def _high_k_text(loo) -> str:
    n, pts = loo.get("n_high_pareto_k"), loo.get("n_points")
    good = loo.get("good_k")
    good = 0.7 if good is None else good
    of = f" of {pts}" if pts else ""
    top = f" (largest {loo['max_k']:.2f})" if loo.get("max_k") is not None else ""
    what = "units" if loo.get("level") == "unit" else "points"
    text = (f"{n}{of} {what} with Pareto k above {good:.2f} in PSIS-LOO at the "
            f"{loo.get('level')} level{top}: its ELPD, and so its place in the LOO "
            "comparison, is unreliable")
    if loo.get("refit_note"):
        return f"{text}; {loo['refit_note']}"
    if "sub-sampled" in (loo.get("method") or ""):
        return (f"{text}; exact refits need the rows, which the out-of-core route does not "
                "load: read the points' values as approximate")
    return (f"{text}; rerun with {REFIT_OPTION} to replace them by exact refits "
            f"(refit_high_k = true in the analysis file)")


def problems(results: dict) -> list[dict]:
    """Every problem recorded in a results dictionary, one record each.

    Returns
    -------
    list of dict
        ``{"kind", "model", "title", "text"}``: ``kind`` one of ``KINDS``, ``model`` the
        model's name, ``title`` its title, ``text`` one line saying what is wrong and
        what to do.
    """
    out = []
    for m in results.get("models", []):
        who = {"model": m["name"], "title": m.get("title", m["name"])}
        for w in (m.get("diagnostics") or {}).get("warnings", []):
            out.append({"kind": "sampling", **who, "text": w})
    for m in results.get("models", []):
        who = {"model": m["name"], "title": m.get("title", m["name"])}
        loo = m.get("loo") or {}
        if loo.get("n_high_pareto_k"):
            out.append({"kind": "comparison", **who, "text": _high_k_text(loo)})
        for w in loo.get("refit_warnings") or []:
            out.append({"kind": "comparison", **who,
                        "text": f"an exact refit for LOO had sampling problems: {w}"})
    return out


def stored(results: dict) -> list[dict]:
    """The list stored in ``results`` (computed by :func:`problems` when absent)."""
    found = results.get("problems")
    return problems(results) if found is None else list(found)

