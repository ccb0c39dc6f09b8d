"""One result shape: the names every fit answers with, and the one interval default.

Reference fits (:class:`~bayespanel.reference.ReferenceResult`), Gaussian posteriors
(:class:`~bayespanel.bayes.posterior.Posterior`) and latent-effect posteriors
(:class:`~bayespanel.bayes.latent.LatentPosterior`) answer the same questions with the same
names and types:

========================  ================================================================
``coef``                  pandas.Series of point values by term, named ``"estimate"``
                          (estimates; posterior means)
``error_name``            the name of the error column: ``"se"`` (standard errors of a
                          reference fit) or ``"sd"`` (posterior SDs)
``error``                 pandas.Series by term, named by ``error_name`` (also reachable
                          as ``se`` / ``sd``)
``interval(prob)``        pandas.DataFrame, columns ``lower``, ``upper`` by term
``table(prob)``           pandas.DataFrame whose leading columns are
                          ``estimate, <error_name>, lower, upper``
``variance_partition()``  :class:`PartitionResult` (also ``bayespanel.bayes.partition``)
``icc``                   float (plug-in value; posterior mean); ``nan`` where the fit has
                          no unit variance
``n_obs``, ``n_units``    int: rows and units the fit uses
``to_record(prob)``       dict: the fit's part of ``results.json``
========================  ================================================================

Every interval the package reports by default has the probability of the ``interval``
option (:func:`bayespanel.set_option`; it starts at :data:`DEFAULT_INTERVAL`), read when
the function runs; a run's ``interval`` setting (``--interval``) defaults to it too.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..core.errors import SpecificationError
from ..core.jsonsafe import json_record
from ..core.options import OPTIONS, resolve_prob

__all__ = ["DEFAULT_INTERVAL", "LAG_ONE", "LEADING_COLUMNS", "check_prob", "leading_columns",
           "term_records", "summarise_draws", "PartitionResult"]

#: the starting value of the ``interval`` option: the probability of every interval
#: reported by default (summaries, tables, partitions, contrasts, ICC, average marginal
#: effects, predictive checks, run settings) until a user sets the option
DEFAULT_INTERVAL = OPTIONS["interval"]

#: the partition's quantity under AR(1) errors: the correlation of one unit's outcomes on
#: two occasions one time unit apart, given the covariates
LAG_ONE = "correlation one step apart"

#: the first columns of every ``table()``; ``"error"`` stands for ``sd`` or ``se``
LEADING_COLUMNS = ("estimate", "error", "lower", "upper")


def check_prob(prob) -> float:
    """``prob`` as a float strictly between 0 and 1, or :class:`SpecificationError`;
    ``None`` is the ``interval`` option (:func:`bayespanel.get_option`), read now."""
    return resolve_prob(prob)


def leading_columns(error_name: str) -> list:
    """The leading columns of ``table()`` for a fit whose error column is ``error_name``."""
    return [error_name if c == "error" else c for c in LEADING_COLUMNS]


#: record keys of table columns whose names are short in tables
_RECORD_KEYS = {"p": "p_value"}


def term_records(table, columns, key: str = "term") -> list:
    """One record per row of a table: ``{key: row label, column: value, ...}`` for the
    given columns (``p`` is recorded as ``p_value``), non-finite numbers ``None``."""
    return [json_record({key: label, **{_RECORD_KEYS.get(c, c): row[c] for c in columns}})
            for label, row in table[list(columns)].iterrows()]


def summarise_draws(draws: dict, prob: float = DEFAULT_INTERVAL) -> pd.DataFrame:
    """Mean, median, SD and the central (equal-tailed) interval of each quantity."""
    prob = check_prob(prob)
    lo, hi = (1 - prob) / 2, (1 + prob) / 2
    rows = {}
    for name, x in draws.items():
        x = np.asarray(x, dtype=float).ravel()
        if not np.all(np.isfinite(x)):
            rows[name] = [np.nan] * 5
            continue
        rows[name] = [x.mean(), np.median(x), x.std(ddof=1) if x.size > 1 else 0.0,
                      np.quantile(x, lo), np.quantile(x, hi)]
    out = pd.DataFrame.from_dict(rows, orient="index",
                                 columns=["mean", "median", "sd", "lower", "upper"])
    out.index.name = "quantity"
    out.attrs["prob"] = prob
    return out


class PartitionResult:
    """The variance partition of one fit, the type every fit's ``variance_partition()``
    returns: per-draw values and their summary (posteriors), or one set of plug-in values
    (reference fits, :meth:`from_estimates`).

    Attributes
    ----------
    draws : pandas.DataFrame
        One row per posterior draw (chains stacked), one column per quantity; a reference
        fit's one row of estimates.
    reference : pandas.Series or None
        The same quantities, plug-in, from a frequentist reference fit.
    kind : str
    point : bool
        True for the estimates of a reference fit (no draws to summarise).
    units : pandas.Series or None
        With ``point``: the number of units behind a quantity (the units of each panel
        length for the ``theta (T=...)`` rows).
    """

    def __init__(self, draws: dict, kind: str, reference: dict | None = None,
                 reference_name: str | None = None):
        self.draws = pd.DataFrame(draws)
        self.kind = kind
        self.reference = None if reference is None else pd.Series(
            {k: float(np.asarray(v).ravel()[0]) for k, v in reference.items()}, name="reference")
        self.reference_name = reference_name
        self.point = False
        self.units = None

    @classmethod
    def from_estimates(cls, values: dict, kind: str, units: dict | None = None):
        """The partition of a reference fit: one value per quantity (``nan`` where the
        fit does not define it), with the number of units behind some of them."""
        out = cls({k: [float(v)] for k, v in values.items()}, kind)
        out.point = True
        out.units = pd.Series({k: float((units or {}).get(k, np.nan)) for k in values},
                              name="units", dtype=float)
        return out

    @property
    def estimates(self) -> pd.Series:
        """One value per quantity: the posterior means, or a reference fit's estimates."""
        return self.draws.mean().rename("estimate")

    def table(self, prob: float = DEFAULT_INTERVAL) -> pd.DataFrame:
        """Summary per quantity: mean, median, SD and interval with the reference beside
        it (posteriors); ``estimate`` and ``units`` (reference fits, :attr:`point`)."""
        if self.point:
            out = pd.DataFrame({"estimate": self.estimates, "units": self.units})
            out.index.name = "quantity"
            out.attrs["kind"] = self.kind
            return out
        out = summarise_draws({c: self.draws[c].to_numpy() for c in self.draws}, prob)
        if self.reference is not None:
            out["reference"] = self.reference.reindex(out.index).to_numpy()
            out.attrs["reference"] = self.reference_name
        out.attrs["kind"] = self.kind
        return out

    def to_record(self, prob: float = DEFAULT_INTERVAL) -> dict:
        """The ``variance_partition`` record of a model in ``results.json``
        (docs/results-schema.md): ``summary`` (unit SD, occasion SD, ICC and, with
        AR(1) errors, :data:`LAG_ONE`: the posterior mean as ``estimate``, the key of
        every point estimate in the file, median, SD, interval and the reference's
        plug-in value), ``theta`` (per panel length: ``estimate`` and interval),
        ``explained`` (the Rights-Sterba shares of the total, within and between
        variance) and ``icc_draws`` (at most about 1,000 evenly thinned finite draws).
        Non-finite numbers are ``None``. A reference fit's record holds its estimates
        (``summary``: quantity and estimate; ``theta``: length, estimate and units)."""
        tab = self.table(prob)
        if self.point:
            return {"summary": term_records(tab.loc[[q for q in tab.index
                                                     if not q.startswith("theta (T=")]],
                                            ("estimate",), key="quantity"),
                    "theta": [json_record({"length": int(q.split("=")[1].rstrip(")")),
                                           "estimate": tab.at[q, "estimate"],
                                           "units": int(tab.at[q, "units"])})
                              for q in tab.index if q.startswith("theta (T=")]}
        if "reference" not in tab:
            tab["reference"] = np.nan
        # AR(1) errors add the correlation of two occasions one time unit apart
        rows = [q for q in ("unit SD", "occasion SD", "ICC", LAG_ONE) if q in tab.index]
        summary = term_records(tab.loc[rows].rename(columns={"mean": "estimate"}),
                               ("estimate", "median", "sd", "lower", "upper", "reference"),
                               key="quantity")
        theta = [json_record({"length": int(q.split("=")[1].rstrip(")")),
                               "estimate": tab.at[q, "mean"], "lower": tab.at[q, "lower"],
                               "upper": tab.at[q, "upper"]})
                 for q in tab.index if q.startswith("theta (T=")]
        explained = [json_record({"part": p, **{
            lev: tab.at[f"{lev}: {p}", "mean"] if f"{lev}: {p}" in tab.index else None
            for lev in ("total", "within", "between")}})
            for p in ("within part", "between part", "unit intercepts", "occasion residual")]
        icc = self.draws["ICC"].to_numpy(dtype=float)
        icc = icc[::max(1, int(np.ceil(len(icc) / 1000)))]
        return {"summary": summary, "theta": theta, "explained": explained,
                "icc_draws": [float(v) for v in icc if np.isfinite(v)]}

    def __repr__(self) -> str:
        what = "estimates" if self.point else f"{len(self.draws)} draws"
        return f"<PartitionResult {self.kind}, {what}>\n{self.table()}"
