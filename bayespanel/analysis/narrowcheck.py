"""Intervals narrower than the data support: posterior SDs well below cluster-robust SEs.

A Gaussian panel model's posterior SD of a coefficient rests on its assumptions: given the
unit intercept, a unit's occasions are independent, and a covariate's within effect is the
same in every unit. The cluster-robust (by unit) standard error of the matching reference
fit assumes neither; it only takes units to be independent of each other. When the two
disagree by much, the model's intervals are too narrow for the data, whatever the model's
posterior looks like on its own. The two usual causes, and their remedies:

* errors correlated over time within units (a good year followed by another): model them,
  ``errors="ar1"`` (``--errors ar1``), and read the serial-correlation test
  (:func:`bayespanel.reference.serial_correlation_test`);
* within effects that differ between units: a random slope for that covariate
  (``random_slopes``); leaving such slopes out makes intervals of within effects too
  narrow (Bell, Fairbrother and Jones 2019).

The check compares, term by term, the posterior SD with the matching reference fit's
cluster-robust SE and flags a ratio ``SD / SE`` below :data:`RATIO_THRESHOLD` (0.5: the
robust variance at least four times the model's). The threshold is a rule of thumb (common
practice in reading robust against model-based standard errors, our choice of cut-off),
not a test: a cluster-robust SE is itself uncertain with few units (Cameron and Miller
2015 advise caution below a few dozen clusters), so the message says so when there are
fewer than :data:`FEW_UNITS` units. Intercepts and occasion indicators are left out (their
robust SEs also carry common shocks across units, which these remedies do not address).

References
----------
.. [1] Bell, A., Fairbrother, M. and Jones, K. (2019). Fixed and random effects models:
   making an informed choice. Quality & Quantity 53(2), 1051-1074.
   doi:10.1007/s11135-018-0802-x
.. [2] Cameron, A. C. and Miller, D. L. (2015). A practitioner's guide to cluster-robust
   inference. Journal of Human Resources 50(2), 317-372. doi:10.3368/jhr.50.2.317
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..core.jsonsafe import json_record
from ..core.terms import AS_IS, WITHIN, parse

__all__ = ["RATIO_THRESHOLD", "FEW_UNITS", "compare_uncertainty", "narrow_interval_check",
           "narrow_message", "message_parts", "serial_reading"]

#: a posterior SD below this share of the cluster-robust SE is flagged (rule of thumb)
RATIO_THRESHOLD = 0.5

#: below this many units the cluster-robust SE is itself imprecise (Cameron and Miller 2015)
FEW_UNITS = 30


def _checked(label: str) -> bool:
    """Whether a coefficient enters the check: not the intercept, not an occasion."""
    t = parse(label)
    return not t.is_occasion and t.base != "Intercept"


def compare_uncertainty(posterior_sd, reference_se, threshold: float = RATIO_THRESHOLD
                        ) -> pd.DataFrame:
    """Posterior SDs beside cluster-robust SEs, term by term.

    Parameters
    ----------
    posterior_sd : pandas.Series
        Posterior SDs by term label (:attr:`bayespanel.bayes.posterior.Posterior.sd`).
    reference_se : pandas.Series
        Cluster-robust SEs of the matching reference fit by term label
        (:attr:`bayespanel.reference.ReferenceResult.se`).
    threshold : float
        Ratios ``sd / se`` below it are flagged.

    Returns
    -------
    pandas.DataFrame
        Indexed by the terms both give (intercept and occasion indicators left out), in
        the posterior's order: ``posterior_sd``, ``reference_se``, ``ratio``, ``narrow``.
    """
    sd = pd.Series(posterior_sd, dtype=float)
    se = pd.Series(reference_se, dtype=float)
    terms = [t for t in sd.index if t in se.index and _checked(str(t))]
    out = pd.DataFrame({"posterior_sd": sd.reindex(terms).to_numpy(),
                        "reference_se": se.reindex(terms).to_numpy()}, index=terms)
    with np.errstate(divide="ignore", invalid="ignore"):
        out["ratio"] = out["posterior_sd"] / out["reference_se"]
    out["narrow"] = np.isfinite(out["ratio"]) & (out["ratio"] < threshold)
    out.index.name = "term"
    return out


def narrow_interval_check(fits, *, threshold: float = RATIO_THRESHOLD, errors: str = "iid",
                          n_units: int | None = None, cov: str = "cluster",
                          serial: str | None = None) -> dict:
    """The narrow-interval check of a run: its ``results.json`` record.

    Parameters
    ----------
    fits : iterable of dict
        One per Bayesian model with a matching reference fit: ``model`` (name),
        ``title``, ``reference`` (name), ``reference_title``, ``sd`` (posterior SDs by
        term) and ``se`` (the reference fit's cluster-robust SEs by term).
    threshold : float
    errors : {"iid", "ar1"}
        The models' errors (the message's advice depends on it).
    n_units : int, optional
        Units (clusters) behind the SEs.
    cov : str
        The reference covariance compared with (``"cluster"`` or ``"cr2"``).
    serial : str, optional
        The serial-correlation test's reading when it found correlation, added to the
        message.

    Returns
    -------
    dict
        ``threshold``, ``cov``, ``rows`` (one per model and term: model, title,
        reference, term, posterior_sd, reference_se, ratio, narrow) and ``message``
        (plain words when a row is flagged, else ``None``: :func:`narrow_message`).
    """
    rows = []
    for f in fits:
        tab = compare_uncertainty(f["sd"], f["se"], threshold)
        for term, r in tab.iterrows():
            rows.append(json_record({
                "model": f["model"], "title": f["title"], "reference": f["reference"],
                "reference_title": f.get("reference_title", f["reference"]), "term": term,
                "posterior_sd": r["posterior_sd"], "reference_se": r["reference_se"],
                "ratio": r["ratio"], "narrow": bool(r["narrow"])}))
    return {"threshold": float(threshold), "cov": cov, "rows": rows,
            "message": narrow_message(rows, threshold=threshold, errors=errors,
                                      n_units=n_units, serial=serial)}


def serial_reading(tests) -> str | None:
    """The sentence the warning adds when the run's serial-correlation test (its
    ``tests`` records) found correlation at the 5% level, else ``None``."""
    t = next((t for t in tests or [] if t.get("name") == "serial_correlation"
              and not t.get("skipped")), None)
    p = None if t is None else t.get("reported_p_value")
    if p is None or not p < 0.05:
        return None
    return ("The serial-correlation test points the same way ("
            + t["conclusion"].split(" (")[0] + ").")


def _num(x: float) -> str:
    return f"{x:.3g}"


def message_parts(rows, *, threshold: float = RATIO_THRESHOLD, errors: str = "iid",
                  n_units: int | None = None, serial: str | None = None) -> dict | None:
    """The warning in parts, for outputs that lay it out (the report lists the causes):
    ``lead`` (what is too narrow), ``causes`` (each usual cause with its remedy) and
    ``notes`` (what to bear in mind); ``None`` when no row is flagged."""
    flagged = [r for r in rows if r.get("narrow")]
    if not flagged:
        return None
    worst = min(flagged, key=lambda r: r["ratio"])
    models = list(dict.fromkeys(r["title"] for r in flagged))
    lead = (f"Intervals too narrow: in {len(flagged)} coefficient(s) of "
            f"{', '.join(models)} the posterior SD is less than {threshold:g} times the "
            "cluster-robust SE of the matching reference fit (worst: "
            f"{worst['term']} in {worst['title']}, SD {_num(worst['posterior_sd'])} against "
            f"SE {_num(worst['reference_se'])}, ratio {worst['ratio']:.2f}). Treat those "
            "intervals as too narrow until a remedy brings the two closer.")
    # the pooled model has a cause of its own: no unit intercepts at all
    with_units = [r for r in flagged if r["model"] != "pooled"]
    covariates = list(dict.fromkeys(parse(r["term"]).base for r in with_units
                                    if parse(r["term"]).part in (AS_IS, WITHIN)))
    slope = (f"add a random slope for {', '.join(covariates)} (--random-slopes)"
             if covariates else "add a random slope for that covariate (--random-slopes)")
    bell = ("; leaving such slopes out makes within-effect intervals too narrow (Bell, "
            "Fairbrother and Jones 2019, Quality & Quantity 53(2)).")
    causes = []
    if with_units and errors == "ar1":
        causes.append("Within effects that differ between units (the models already allow "
                      "AR(1) errors within units, so this is the likelier cause): " + slope
                      + bell)
    elif with_units:
        causes += ["Errors correlated over time within units: refit with AR(1) errors "
                   "(errors = \"ar1\" in the analysis file, --errors ar1) and see the "
                   "serial-correlation test.",
                   "Within effects that differ between units: " + slope + bell]
    if len(with_units) < len(flagged):
        causes.append("No unit intercepts (the pooled model): lasting differences between "
                      "units count as independent noise; prefer a model with unit "
                      "intercepts.")
    notes = []
    if serial:
        notes.append(serial)
    if n_units is not None and n_units < FEW_UNITS:
        notes.append(f"With {n_units} units the cluster-robust SE is itself imprecise (few "
                     "clusters), so read the ratio as a warning sign, not a measurement.")
    notes.append(f"Rule of thumb: a ratio below {threshold:g} means the robust variance is "
                 f"more than {1 / threshold ** 2:.0f} times the model's.")
    return {"lead": lead, "causes": causes, "notes": notes}


def narrow_message(rows, **kwargs) -> str | None:
    """What the flagged rows mean and what to do, in plain words, as one text (``None``
    when none is flagged); keyword arguments as :func:`message_parts`."""
    parts = message_parts(rows, **kwargs)
    if parts is None:
        return None
    causes = parts["causes"]
    head = "Usual causes and remedies: " if len(causes) > 1 else "Likely cause and remedy: "
    return " ".join([parts["lead"], head + " ".join(
        f"({i}) {c}" for i, c in enumerate(causes, 1)), *parts["notes"]])
