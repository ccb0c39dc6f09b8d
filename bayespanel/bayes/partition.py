"""Variance partition: unit and occasion SDs, ICC, quasi-demeaning shares and explained
variance at each level.

The explained-variance measures follow the integrative framework of Rights and Sterba
(2019) for a random-intercept model. Every row's linear predictor is split into a
*within part* (the unit-demeaned time-varying covariates times their within
coefficients) and a *between part* (the unit means of the time-varying covariates and the
time-constant covariates, times their between coefficients). With ``Phi_w`` and
``Phi_b`` the covariance matrices, over the estimation rows, of the within and between
columns, the model-implied outcome variance is

    total = g_w' Phi_w g_w + g_b' Phi_b g_b + tau^2 + sigma^2,

the within-unit variance is ``g_w' Phi_w g_w + sigma^2`` and the between-unit variance
``g_b' Phi_b g_b + tau^2``. The within and between parts are uncorrelated over the rows
(the within columns sum to zero in every unit), so the shares of each of the three add to
one exactly, per posterior draw. Covariances use the divisor ``n`` (all rows weighted
alike), so the parts equal the sample variances of the fitted components.

A model without explicit within and between columns is mapped onto the same split:
random-intercept and pooled coefficients act on both parts (``g_w = g_b``), Mundlak's
``x (unit mean)`` adds to the between part (``g_b = b + b_mean``), and fixed effects have
only a within part (their unit intercepts are not given a variance). A time-varying term
with no between column (an occasion indicator in a balanced panel, whose unit means are
all equal) has a between coefficient of 0 in the hybrid model and its one coefficient in
Mundlak's; its unit means do not vary, so either way its between part adds nothing.

References
----------
.. [1] Rights, J. D. and Sterba, S. K. (2019). Quantifying explained variance in multilevel
   models: An integrative framework for defining R-squared measures. Psychological
   Methods 24(3), 309-338. doi:10.1037/met0000184
.. [2] Baltagi, B. H. (2021). *Econometric Analysis of Panel Data*, 6th ed., section 2.3
   (the GLS quasi-demeaning share). Springer. doi:10.1007/978-3-030-53953-5
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .. import kinds
from ..data.design import group_means
from ..core.errors import SpecificationError, choices_error
from ..core.mathcore import partition_quantities, unit_sd_draws
from ..data.resultshape import PartitionResult, summarise_draws  # noqa: F401 (public here)
from ..core.terms import BETWEEN, UNIT_MEAN, WITHIN, parse

__all__ = ["PartitionResult", "coefficient_parts", "partition_draws", "partition_from_stats",
           "variance_partition", "design_partition", "reference_partition", "summarise_draws",
           "design_columns", "PARTITION_KINDS"]

#: the column maps whose coefficients carry within effects (all but the between fit's)
PARTITION_KINDS = tuple(n for n in kinds.COLUMNS if kinds.column_map(n).within is not None)


# ---------------------------------------------------------------------------- array core
_VARY_TOL = 1e-10


def _unit_means(A, codes):
    """Unit means (N x k) of the columns of ``A`` for rows sorted by unit."""
    T = np.bincount(codes)
    starts = np.concatenate([[0], np.cumsum(T)[:-1]]).astype(np.int64)
    return group_means(A, starts, T.astype(float))


def design_columns(M, codes, labels, kind):
    """The original covariates ``X``, their names and the time-varying ones, rebuilt from a
    model's columns (``Design.matrices(kind)``), so that a posterior without its Design
    can still be split into within and between parts.

    Returns
    -------
    X : array (n, k0); terms : list of str; time_varying : list of str
    """
    if kind not in PARTITION_KINDS:
        raise choices_error("kind", kind, PARTITION_KINDS)
    M = np.asarray(M, dtype=float)
    codes = np.asarray(codes, dtype=np.int64)
    labels = list(labels)
    parts = [parse(lab) for lab in labels]
    pos = {t: j for j, t in enumerate(parts)}
    if kind == "within_between":
        terms, cols, tv = [], [], []
        for lab, t in zip(labels, parts):
            if t.part == BETWEEN and t.with_part(WITHIN) in pos:
                continue
            if t.part == WITHIN:
                # a term without a between column (an occasion indicator in a balanced
                # panel) is rebuilt from its within part: its unit mean is not among the
                # model's columns, so the model gives it no between part
                between = pos.get(t.with_part(BETWEEN))
                cols.append(M[:, pos[t]] + (M[:, between] if between is not None else 0.0))
                lab = t.column.label
                tv.append(lab)
            else:
                cols.append(M[:, pos[t]])
            terms.append(lab)
        return np.column_stack(cols), terms, tv
    if kind == "mundlak":
        keep = [j for j, t in enumerate(parts) if t.part != UNIT_MEAN]
        X = M[:, keep]
        keep = [labels[j] for j in keep]
        # every term that varies within units, with or without a unit-mean column (an
        # occasion indicator in a balanced panel has none)
        varying = set(_varies_within(X, codes, keep))
        varying |= {t.column.label for t in parts if t.part == UNIT_MEAN}
        return X, keep, [t for t in keep if t in varying]
    return M, labels, _varies_within(M, codes, labels)


def _varies_within(M, codes, labels):
    """The labels (not the intercept) whose columns vary within units."""
    W = M - _unit_means(M, codes)[codes]
    scale = np.maximum(np.abs(M).max(axis=0), 1.0)
    varies = np.sqrt((W ** 2).mean(axis=0)) > _VARY_TOL * scale
    return [lab for lab, v in zip(labels, varies) if v and lab != "Intercept"]


def coefficient_parts(terms, time_varying, kind, labels, coef):
    """Within and between coefficients of every draw, on the Rights-Sterba split.

    Parameters and returns as :meth:`bayespanel.kinds.ColumnMap.effects` of the column map
    ``kind`` (one of :data:`PARTITION_KINDS`, how the model's columns were built by
    :meth:`Design.matrices`): which coefficients carry each covariate's within and
    between effect is a fact of the registry. ``g_b`` is None for fixed effects.
    """
    if kind not in PARTITION_KINDS:
        raise choices_error("kind", kind, PARTITION_KINDS)
    return kinds.column_map(kind).effects(terms, time_varying, labels, coef)


def _row_cov(A):
    """Covariance over rows with divisor n (every row weighted alike)."""
    if A.shape[1] == 0:
        return np.zeros((0, 0))
    C = A - A.mean(axis=0)
    return C.T @ C / A.shape[0]


def partition_draws(X, codes, terms, time_varying, kind, labels, coef, sigma, tau=None) -> dict:
    """Every quantity of the partition, per draw, from the estimation rows.

    Parameters
    ----------
    X : array (n, k0)
        The original covariates on the estimation rows (``Design.X``), sorted by unit.
    codes : array (n,)
        Unit of each row, 0..N-1.
    terms, time_varying, kind, labels, coef
        See :func:`coefficient_parts`.
    sigma : array (S,)
        Occasion-level (residual) SD draws.
    tau : array (S,) or None
        Unit-level SD draws; ``0`` for the pooled model, ``None`` for fixed effects.

    Returns
    -------
    dict of str -> array (S,)
        ``"unit SD"``, ``"occasion SD"``, ``"ICC"``, ``"theta (T=...)"`` for each distinct
        panel length, the variance parts ``"variance: ..."`` and the Rights-Sterba
        shares ``"total: ..."``, ``"within: ..."``, ``"between: ..."`` (Rights and Sterba
        2019). Quantities a model does not define are ``nan``. The same quantities as
        :func:`partition_from_stats` (the row covariances computed from the rows).
    """
    g_w, g_b = coefficient_parts(terms, time_varying, kind, labels, coef)
    X = np.asarray(X, dtype=float)
    codes = np.asarray(codes, dtype=np.int64)
    tv = [terms.index(t) for t in time_varying]
    tc = [j for j, t in enumerate(terms) if t not in time_varying and t != "Intercept"]
    means = _unit_means(X[:, tv], codes)[codes]
    Wc = X[:, tv] - means
    Bc = np.column_stack([means, X[:, tc]])
    return partition_quantities(g_w, g_b, _row_cov(Wc), _row_cov(Bc), sigma, tau,
                                np.unique(np.bincount(codes)))


def partition_from_stats(stats, terms, time_varying, kind, labels, coef, sigma,
                         tau=None) -> dict:
    """The quantities of :func:`partition_draws` from the statistics of ``[X, y]``.

    For a design whose rows are not at hand (``Design.has_rows`` false: a partitioned
    source). The row covariances are ``within / n`` for the demeaned time-varying columns
    and ``(total - within) / n`` for the unit means and the time-constant columns (the
    analysis-of-variance decomposition of the cross-products), equal to the covariances
    :func:`partition_draws` takes over the rows.

    Parameters
    ----------
    stats : SuffStats
        Of the design's own columns ``[X, y]`` (``Design.design_suffstats()``), columns in
        ``terms`` order.
    terms, time_varying, kind, labels, coef, sigma, tau
        See :func:`partition_draws`.
    """
    g_w, g_b = coefficient_parts(terms, time_varying, kind, labels, coef)
    i_w = [terms.index(t) for t in time_varying]
    i_b = i_w + [j for j, t in enumerate(terms) if t not in time_varying and t != "Intercept"]
    phi_w = stats.within[np.ix_(i_w, i_w)] / stats.n
    phi_b = (stats.total - stats.within)[np.ix_(i_b, i_b)] / stats.n
    return partition_quantities(g_w, g_b, phi_w, phi_b, sigma, tau, stats.lengths)




def reference_partition(ref) -> dict:
    """Plug-in partition of a frequentist reference fit (``ReferenceResult``)."""
    kind = ref.estimator  # a reference kind is named by the columns it fits
    if kind not in PARTITION_KINDS:
        raise SpecificationError(
            f"a {ref.estimator!r} reference fit has no variance partition; use a "
            + ", ".join(PARTITION_KINDS) + " fit")
    if ref.design is None:
        raise SpecificationError("the reference fit carries no design to partition")
    coef = ref.coef
    labels = list(coef.index)
    tau = unit_sd_draws(kinds.reference(kind).unit_effects, ref.sigma_unit, (1,))
    d = ref.design
    args = (d.terms, d.time_varying, kind, labels, coef.to_numpy()[None, :],
            np.array([ref.sigma_obs]), tau)
    if d.has_rows and getattr(d, "initial", None) is not None:
        # a lagged outcome's initial-conditions columns (bayespanel.data.initial): the
        # covariates are read back from the fit's own columns, as for a posterior
        X, terms, tv = design_columns(d.matrices(kind)[0], d.unit_codes, labels, kind)
        return partition_draws(X, d.unit_codes, terms, tv, *args[2:])
    if d.has_rows:
        return partition_draws(d.X, d.unit_codes, *args)
    return partition_from_stats(d.design_suffstats(), *args)


def variance_partition(M, codes, kind, labels, coef, sigma, tau=None, reference=None,
                       reference_name=None) -> PartitionResult:
    """The variance partition of a posterior, beside an optional reference fit.

    Parameters
    ----------
    M : array (n, k)
        The model's columns on the estimation rows (``Design.matrices(kind)``, or the
        original time-varying columns for fixed effects), sorted by unit.
    codes : array (n,)
    kind, labels, coef, sigma, tau
        See :func:`partition_draws`; ``coef`` is ``(S, k)`` with chains stacked.
    reference : ReferenceResult, optional
        A frequentist fit of the same design whose plug-in values go beside the
        posterior summary.

    Returns
    -------
    PartitionResult

    References
    ----------
    Rights and Sterba (2019), see the module docstring.
    """
    X, terms, tv = design_columns(M, codes, labels, kind)
    draws = partition_draws(X, codes, terms, tv, kind, labels, coef, sigma, tau)
    ref = None
    if reference is not None:
        _check_same_rows(np.asarray(M).shape[0], np.asarray(codes), reference)
        ref = reference_partition(reference)
        reference_name = reference_name or reference.estimator
    return PartitionResult(draws, kind, ref, reference_name)


def design_partition(design, kind, labels, coef, sigma, tau=None, reference=None,
                     reference_name=None) -> PartitionResult:
    """The variance partition of a posterior from the statistics of its design.

    For a model on a design whose rows are not at hand (``Design.has_rows`` false); the
    quantities of :func:`variance_partition` through :func:`partition_from_stats`.

    Parameters
    ----------
    design : Design
        The design the model was built on (``terms``, ``time_varying``,
        ``design_suffstats()``).
    kind, labels, coef, sigma, tau, reference, reference_name
        As for :func:`variance_partition`; a reference fit must be on the same design.
    """
    draws = partition_from_stats(design.design_suffstats(), list(design.terms),
                                 list(design.time_varying), kind, labels, coef, sigma, tau)
    ref = None
    if reference is not None:
        d = getattr(reference, "design", None)
        if d is None or (d is not design and not (
                d.n == design.n and np.array_equal(d.T, design.T)
                and list(d.units) == list(design.units))):
            raise SpecificationError(
                "reference: the reference fit is not on the same estimation rows as the "
                "posterior; fit both on the same panel and formula")
        ref = reference_partition(reference)
        reference_name = reference_name or reference.estimator
    return PartitionResult(draws, kind, ref, reference_name)


def _check_same_rows(n, codes, ref):
    d = getattr(ref, "design", None)
    if d is None or d.n != n or not np.array_equal(d.unit_codes, codes):
        raise SpecificationError(
            "reference: the reference fit is not on the same estimation rows as the "
            "posterior; fit both on the same panel and formula")
