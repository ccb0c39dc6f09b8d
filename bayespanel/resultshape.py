"""One result shape: the names every fit answers with, and the one interval default.

Reference fits (:class:`~bayespanel.reference.ReferenceResult`), Gaussian posteriors
(:class:`~bayespanel.posterior.Posterior`) and latent-effect posteriors
(:class:`~bayespanel.models.latent.LatentPosterior`) answer the same questions with the same
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
``variance_partition()``  :class:`bayespanel.partition.PartitionResult`
``icc``                   float (plug-in value; posterior mean); ``nan`` where the fit has
                          no unit variance
``n_obs``, ``n_units``    int: rows and units the fit uses
``to_record(prob)``       dict: the fit's part of ``results.json``
========================  ================================================================

Every interval the package reports by default has the probability
:data:`DEFAULT_INTERVAL`; a run's ``interval`` setting overrides it for a whole run.
"""

from __future__ import annotations

from .errors import SpecificationError
from .jsonsafe import json_record

__all__ = ["DEFAULT_INTERVAL", "LEADING_COLUMNS", "check_prob", "leading_columns",
           "term_records"]

#: probability of every interval reported by default (summaries, tables, partitions,
#: contrasts, ICC, average marginal effects, predictive checks, run settings)
DEFAULT_INTERVAL = 0.95

#: the first columns of every ``table()``; ``"error"`` stands for ``sd`` or ``se``
LEADING_COLUMNS = ("estimate", "error", "lower", "upper")


def check_prob(prob) -> float:
    """``prob`` as a float strictly between 0 and 1, or :class:`SpecificationError`."""
    if isinstance(prob, bool) or not isinstance(prob, (int, float)) or not 0 < prob < 1:
        raise SpecificationError(f"prob={prob!r} is not valid; choose a number strictly "
                                 "between 0 and 1")
    return float(prob)


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
