"""Sufficient statistics without one unit or one row, by exact downdates (private).

Exact leave-one-out of the reference fits refits the estimator once per point. Every
reference estimator reads the data only through :class:`~bayespanel.core.suffstats.SuffStats`
(``n``, the mean and centred total cross-products, the within cross-products and, per
distinct panel length, the count, mean and centred cross-products of the unit means), so
a refit without a point needs only those statistics without the point. They follow from
the statistics of all rows by the pairwise update of Chan, Golub and LeVeque (1979) run
backwards, at a cost of ``O(T_i p^2)`` per point instead of ``O(n p^2)`` for a
recomputation:

* a set ``B`` of ``m`` rows with mean ``mu_B`` and centred cross-products ``C_B`` leaves
  ``n' = n - m``, ``mu' = (n mu - m mu_B) / n'`` and
  ``C' = C - C_B - (n' m / n) (mu' - mu_B)(mu' - mu_B)'``;
* the within cross-products lose the unit's own (``W_i``, a whole unit) or
  ``T_i / (T_i - 1) (z - zbar_i)(z - zbar_i)'`` (one row ``z``);
* the unit mean leaves the group of its panel length (the same downdate on the group's
  unit means) and, when one row goes, the unit's new mean joins the group of length
  ``T_i - 1`` (the forward update).

The per-unit arrays of the result (``unit_count``, ``unit_mean``) are ``None``: the
estimators' cores (:mod:`bayespanel.reference.core`) do not read them.

References
----------
.. [1] Chan, T. F., Golub, G. H. and LeVeque, R. J. (1979). Updating formulae and a pairwise
   algorithm for computing sample variances. Technical report STAN-CS-79-773, Stanford.
"""

from __future__ import annotations

import numpy as np

from ...core.suffstats import SuffStats

__all__ = ["Downdates"]


#: a diagonal entry left by a downdate within this many units of rounding of the terms it
#: came from is zero (the column has no variation left)
_ROUNDING = 16 * np.finfo(float).eps


def _vanished(before, removed, after):
    """Columns whose cross-product ``after = before - removed`` is zero up to rounding."""
    db, dr, da = np.diag(before), np.abs(np.diag(removed)), np.diag(after)
    return np.flatnonzero(da <= _ROUNDING * (np.abs(db) + dr))


def _zero(A, cols):
    """Set rows and columns ``cols`` of the (last two axes of) ``A`` to exactly zero."""
    if len(cols):
        A = A.copy()
        A[..., cols, :] = 0.0
        A[..., :, cols] = 0.0
    return A


def _remove_from_group(lengths, count, gmean, gcp, T, u):
    """The groups by panel length without one unit mean ``u`` of a unit of length ``T``."""
    d = int(np.searchsorted(lengths, T))
    c = int(count[d])
    if c == 1:
        keep = np.arange(len(lengths)) != d
        return lengths[keep], count[keep], gmean[keep], gcp[keep]
    count, gmean, gcp = count.copy(), gmean.copy(), gcp.copy()
    dev = u - gmean[d]
    gcp[d] = gcp[d] - (c / (c - 1.0)) * np.outer(dev, dev)
    gmean[d] = gmean[d] - dev / (c - 1.0)
    count[d] = c - 1
    return lengths, count, gmean, gcp


def _add_to_group(lengths, count, gmean, gcp, T, u):
    """The groups by panel length with one more unit mean ``u`` of a unit of length ``T``."""
    d = int(np.searchsorted(lengths, T))
    if d < len(lengths) and lengths[d] == T:
        c = int(count[d])
        count, gmean, gcp = count.copy(), gmean.copy(), gcp.copy()
        dev = u - gmean[d]
        gcp[d] = gcp[d] + (c / (c + 1.0)) * np.outer(dev, dev)
        gmean[d] = gmean[d] + dev / (c + 1.0)
        count[d] = c + 1
        return lengths, count, gmean, gcp
    p = len(u)
    return (np.concatenate([lengths[:d], [T], lengths[d:]]),
            np.concatenate([count[:d], [1], count[d:]]),
            np.concatenate([gmean[:d], u[None], gmean[d:]]),
            np.concatenate([gcp[:d], np.zeros((1, p, p)), gcp[d:]]))


class Downdates:
    """The statistics of ``Z = [M, y]`` with one unit or one row left out.

    Parameters
    ----------
    stats : SuffStats
        The statistics of all rows (:func:`bayespanel.core.suffstats.compute`).
    Z : (n, p) array
        The rows, sorted by unit (``codes`` non-decreasing).
    codes : (n,) array of int
        Unit of each row, 0..N-1.
    """

    def __init__(self, stats: SuffStats, Z, codes):
        self.ss = stats
        self.Z = np.asarray(Z, dtype=float)
        self.codes = np.asarray(codes, dtype=np.int64)
        if np.any(np.diff(self.codes) < 0):
            raise ValueError("rows must be sorted by unit")
        T = np.bincount(self.codes, minlength=stats.n_units)
        self.starts = np.concatenate([[0], np.cumsum(T)]).astype(np.int64)

    def _stats(self, n, n_units, mean, total, within, groups, gone_total, gone_within):
        """Assemble the result. ``gone_total`` are the columns left constant on the
        remaining rows, ``gone_within`` those left constant within every unit: their
        cross-products are exactly zero (as a recomputation from the rows gives), not
        the rounding a downdate leaves, so the estimators drop the same columns as a
        refit from scratch would (a dummy whose only ones were held out, say)."""
        lengths, count, gmean, gcp = groups
        total = _zero(total, gone_total)
        within = _zero(within, np.union1d(gone_total, gone_within).astype(np.int64))
        if len(gone_total):
            gcp = _zero(gcp, gone_total)
            gmean = gmean.copy()
            gmean[:, gone_total] = mean[gone_total]
        return SuffStats(n=int(n), n_units=int(n_units), mean=mean, total=total,
                         within=within, unit_count=None, unit_mean=None,
                         lengths=np.asarray(lengths, dtype=np.int64),
                         group_count=np.asarray(count, dtype=np.int64), group_mean=gmean,
                         group_cp=gcp, names=self.ss.names)

    def unit_rows(self, i) -> slice:
        return slice(int(self.starts[i]), int(self.starts[i + 1]))

    def without_unit(self, i) -> SuffStats:
        """The statistics of every row except those of unit ``i``."""
        ss = self.ss
        rows = self.Z[self.unit_rows(i)]
        T = len(rows)
        zbar = ss.unit_mean[i]
        dev = rows - zbar
        W = dev.T @ dev
        n1 = ss.n - T
        if n1 <= 0:
            raise ValueError("leaving out the only unit leaves no rows")
        mean1 = (ss.n * ss.mean - T * zbar) / n1
        delta = mean1 - zbar
        removed = W + (n1 * T / ss.n) * np.outer(delta, delta)
        total = ss.total - removed
        within = ss.within - W
        groups = _remove_from_group(ss.lengths, ss.group_count, ss.group_mean, ss.group_cp,
                                    T, zbar)
        return self._stats(n1, ss.n_units - 1, mean1, total, within, groups,
                           _vanished(ss.total, removed, total),
                           _vanished(ss.within, W, within))

    def without_row(self, j) -> SuffStats:
        """The statistics of every row except row ``j``."""
        ss = self.ss
        i = int(self.codes[j])
        z = self.Z[j]
        T = int(self.starts[i + 1] - self.starts[i])
        n1 = ss.n - 1
        if n1 <= 0:
            raise ValueError("leaving out the only row leaves no rows")
        dev = z - ss.mean
        removed = (ss.n / n1) * np.outer(dev, dev)
        total = ss.total - removed
        gone = _vanished(ss.total, removed, total)
        mean1 = ss.mean - dev / n1
        zbar = ss.unit_mean[i]
        groups = _remove_from_group(ss.lengths, ss.group_count, ss.group_mean, ss.group_cp,
                                    T, zbar)
        if T == 1:  # the unit leaves with its only row
            return self._stats(n1, ss.n_units - 1, mean1, total, ss.within, groups, gone,
                               np.zeros(0, np.int64))
        du = z - zbar
        W = (T / (T - 1.0)) * np.outer(du, du)
        within = ss.within - W
        groups = _add_to_group(*groups, T - 1, zbar - du / (T - 1.0))
        return self._stats(n1, ss.n_units, mean1, total, within, groups, gone,
                           _vanished(ss.within, W, within))
