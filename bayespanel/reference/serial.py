"""A reference test for serial correlation in the occasion-level errors of a panel.

Wooldridge (2002, section 10.5.4) observes that when the errors ``e_it`` of the
fixed-effects model ``y_it = x_it'b + u_i + e_it`` are serially uncorrelated with one
variance, their first differences ``de_it = e_it - e_i,t-1`` are correlated ``-0.5`` one
occasion apart. The test therefore

1. estimates the first-differenced equation ``dy_it = dx_it'b + de_it`` by least squares
   (the unit intercepts and time-constant columns difference away; a column whose
   difference is constant, such as a time trend, becomes the constant of this equation),
2. regresses each first-differenced residual on the one before it in the same unit,
   ``ê_it = delta ê_i,t-1 + error`` (no constant), and
3. tests ``delta = -0.5`` with the cluster-robust (CR1, by unit) standard error.

A coefficient above -0.5 points to positive serial correlation of the errors (towards 0
for a random walk), below it to negative correlation. A difference is taken only between
occasions one time unit apart, and a lag only when both differences exist, so gaps in a
unit's occasions drop the pairs they break, never link across them. As in the source,
the first step's estimation is not accounted for in the second step's standard error.

References
----------
.. [1] Wooldridge, J. M. (2002). Econometric Analysis of Cross Section and Panel Data.
   MIT Press, section 10.5.4.
.. [2] Cameron, A. C. and Miller, D. L. (2015). A practitioner's guide to cluster-robust
   inference. Journal of Human Resources 50(2), 317-372. doi:10.3368/jhr.50.2.317
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from ..core.ar1 import Timeline
from ..core.errors import EstimationError
from ..core.linalg import group_scores
from .covariance import cr1
from .specification import SpecificationTest

__all__ = ["SerialCorrelationTest", "serial_correlation_test", "serial_correlation_arrays"]

#: the coefficient of a first-differenced error on its lag when the errors are
#: serially uncorrelated with one variance (Wooldridge 2002, 10.5.4)
NULL_COEF = -0.5


@dataclass
class SerialCorrelationTest(SpecificationTest):
    """:class:`~bayespanel.reference.specification.SpecificationTest` with the estimate:
    ``coef`` (delta), its cluster-robust ``se``, the ``n_pairs`` residual pairs used and
    the ``n_units`` units (clusters) they come from."""

    coef: float = float("nan")
    se: float = float("nan")
    n_pairs: int = 0
    n_units: int = 0


def _independent_columns(A, tol=1e-10):
    """Columns of ``A`` that add rank, in order (the first of collinear ones stays)."""
    keep = []
    scale = max(float(np.max(np.abs(A))) if A.size else 0.0, 1.0)
    for j in range(A.shape[1]):
        cols = keep + [j]
        s = np.linalg.svd(A[:, cols], compute_uv=False)
        if s[-1] > tol * scale * np.sqrt(len(A)):
            keep.append(j)
    return keep


def serial_correlation_arrays(X, y, keys, times, labels=None, column: str = "time"
                              ) -> SerialCorrelationTest:
    """The test on plain arrays (rows in any order).

    Parameters
    ----------
    X : array (n, k)
        Covariates (an intercept or time-constant columns may be present: they difference
        away and are dropped).
    y : array (n,)
    keys : array (n,)
        Unit of each row.
    times : array (n,)
        Occasion of each row, numbers (see :func:`bayespanel.core.ar1.occasion_times`);
        ``column`` names the time column in errors.
    labels : list of str, optional
        Names of the columns of ``X``, to report which differenced columns were used.

    Returns
    -------
    SerialCorrelationTest
    """
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    labels = list(labels) if labels is not None else [f"x{j}" for j in range(X.shape[1])]
    tl = Timeline.build(keys, times, column)
    Xs, ys = X[tl.order], y[tl.order]
    step = tl.linked & (tl.gap == 1.0)               # a difference with the occasion before
    rows = np.flatnonzero(step)
    dX = Xs[rows] - Xs[rows - 1]
    dy = ys[rows] - ys[rows - 1]
    used = [j for j in _independent_columns(dX) if np.any(dX[:, j] != 0)]
    if not used:
        raise EstimationError("serial-correlation test: no covariate changes between "
                              "consecutive occasions, so the differenced equation is empty")
    dX = dX[:, used]
    if len(rows) <= len(used):
        raise EstimationError(
            f"serial-correlation test: {len(rows)} first differences for {len(used)} "
            "coefficients; it needs units with consecutive occasions")
    b, *_ = np.linalg.lstsq(dX, dy, rcond=None)
    e = dy - dX @ b
    # the lag of a difference: the difference one row before, if that one exists too
    prev = np.zeros(len(tl.linked), dtype=bool)
    prev[rows] = True
    has_lag = np.zeros(len(rows), dtype=bool)
    has_lag[:] = prev[rows - 1]
    pos = np.full(len(tl.linked), -1)
    pos[rows] = np.arange(len(rows))
    cur = np.flatnonzero(has_lag)
    lag = pos[rows[cur] - 1]
    e_t, e_lag = e[cur], e[lag]
    codes = tl.codes[rows[cur]]
    units, clusters = np.unique(codes, return_inverse=True)
    G = len(units)
    n = len(e_t)
    if G < 2 or n < 2:
        raise EstimationError(
            "serial-correlation test: it needs at least two units with three consecutive "
            f"occasions; found {G} unit(s) and {n} residual pair(s)")
    sxx = float(e_lag @ e_lag)
    if sxx <= 0:
        raise EstimationError("serial-correlation test: the lagged differenced residuals "
                              "are all zero (the differenced equation fits exactly)")
    delta = float(e_lag @ e_t) / sxx
    u = e_t - delta * e_lag
    scores = group_scores(e_lag[:, None], u, clusters.ravel(), G)
    V = cr1(np.array([[1.0 / sxx]]), scores, n, 1)
    se = float(np.sqrt(V[0, 0]))
    t = (delta - NULL_COEF) / se
    stat = t * t
    p = float(stats.chi2.sf(stat, 1))
    f_p = float(stats.f.sf(stat, 1, G - 1))
    direction = ("positive serial correlation" if delta > NULL_COEF
                 else "negative serial correlation")
    verdict = (f"The errors look serially correlated at the 5% level ({direction}): "
               "intervals from models assuming independent occasions are likely too narrow; "
               "use cluster-robust errors or model the correlation (AR(1) errors)."
               if f_p < 0.05 else
               "No evidence at the 5% level of serial correlation in the errors.")
    return SerialCorrelationTest(
        name="Serial-correlation test (first-differenced residuals on their lag)",
        null="the occasion-level errors are serially uncorrelated (coefficient -0.5)",
        statistic=stat, df=1, p_value=p, terms=[labels[j] for j in used],
        message=(f"Coefficient {delta:.4g} (cluster-robust SE {se:.3g}) against -0.5, from "
                 f"{n} residual pairs in {G} units. {verdict}"),
        f_statistic=stat, f_df_denom=float(G - 1), f_p_value=f_p, cov_type="cluster",
        coef=delta, se=se, n_pairs=int(n), n_units=int(G))


def serial_correlation_test(data, formula=None, *, occasion_effects=False
                            ) -> SerialCorrelationTest:
    """Test for serial correlation in the errors of a panel (Wooldridge 2002, 10.5.4).

    Parameters
    ----------
    data : Panel or Design
        With a Panel, ``formula`` is required. The time column must be numeric (or an
        ordered categorical); spacing is read from it.
    formula : str, optional
    occasion_effects : bool
        Add an indicator per occasion (differenced like the other columns).

    Returns
    -------
    SerialCorrelationTest
        ``statistic = ((delta + 0.5) / se)^2``, chi-squared with 1 degree of freedom
        under the null (``p_value``); the same as F on ``(1, G - 1)`` degrees of freedom
        (``f_p_value``, the reference distribution of CR1 by Cameron and Miller 2015);
        ``coef`` is ``delta`` and ``se`` its CR1 standard error.
    """
    from .estimators import _design_of

    design = _design_of(data, formula, occasion_effects)
    return serial_correlation_arrays(design.X, design.y, design.unit_codes, design.time,
                                     labels=design.terms, column=design.spec.time)
