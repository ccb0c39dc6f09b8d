"""Sufficient statistics of the Gaussian panel likelihood, in one pass.

With ``Z = [X, y]`` (``p = k + 1`` columns, y last) the Gaussian random-intercept,
within-between, Mundlak, fixed-effects and pooled likelihoods depend on the data only
through

* ``within``: ``sum_i sum_t (z_it - zbar_i)(z_it - zbar_i)'`` (p x p),
* per distinct panel length ``T_d``: the number of units, the mean of their unit means and
  the centred cross-products of their unit means,
* ``n``, the global mean and the centred total cross-products.

The pass is a map-reduce. :func:`partial` summarises any block of rows (units may be split
across blocks) as a :class:`Partial`; :func:`merge` combines two blocks with the pairwise
update of Chan, Golub and LeVeque (1979), applied to the totals and to every unit split
between blocks; :func:`finalize` turns the merged result into :class:`SuffStats`. The
in-memory :func:`compute` is the same thing on one block.

References
----------
.. [1] Chan, T. F., Golub, G. H. and LeVeque, R. J. (1979). Updating formulae and a pairwise
   algorithm for computing sample variances. Technical report STAN-CS-79-773, Stanford.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["SuffStats", "Partial", "partial", "merge", "finalize", "compute", "quad_terms"]


@dataclass
class Partial:
    """Moments of a block of rows; mergeable with other blocks in any order.

    Everything is stored relative to a reference point ``ref`` (a row mean, rounded),
    so that large common offsets in the data do not cost precision: ``shift`` is the
    block mean minus ``ref``, ``m2`` the cross-products about the block mean. ``keys`` are
    the units present in the block (sorted, unique) with their row ``counts`` and the
    ``offsets`` of their block means from ``ref``. ``within_m2`` holds the cross-products
    of the rows about their block-unit means.
    """

    n: int
    ref: np.ndarray
    shift: np.ndarray
    m2: np.ndarray
    within_m2: np.ndarray
    keys: np.ndarray
    counts: np.ndarray
    offsets: np.ndarray

    @property
    def p(self) -> int:
        return int(self.ref.shape[0])

    @property
    def mean(self) -> np.ndarray:
        return self.ref + self.shift


@dataclass
class SuffStats:
    """Everything the Gaussian marginal likelihood needs (see module docstring)."""

    n: int
    n_units: int
    mean: np.ndarray
    total: np.ndarray
    within: np.ndarray
    unit_count: np.ndarray
    unit_mean: np.ndarray
    lengths: np.ndarray
    group_count: np.ndarray
    group_mean: np.ndarray
    group_cp: np.ndarray
    unit_keys: np.ndarray = field(default=None)
    names: list = field(default=None)

    @property
    def p(self) -> int:
        return int(self.mean.shape[0])

    @property
    def k(self) -> int:
        return self.p - 1

    def between_cp(self) -> np.ndarray:
        """Cross-products of unit means about the global mean, weighted by ``T_i``."""
        d = self.unit_mean - self.mean
        return (d * self.unit_count[:, None]).T @ d

    def to_dict(self) -> dict:
        """Arrays and sizes, for saving (NetCDF attributes or JSON)."""
        out = {k: getattr(self, k) for k in ("n", "n_units", "mean", "total", "within",
                                             "lengths", "group_count", "group_mean", "group_cp")}
        return {k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in out.items()}


def _group_sums(codes: np.ndarray, Z: np.ndarray, n_groups: int) -> np.ndarray:
    out = np.empty((n_groups, Z.shape[1]))
    for j in range(Z.shape[1]):
        out[:, j] = np.bincount(codes, weights=Z[:, j], minlength=n_groups)
    return out


def partial(Z: np.ndarray, keys: np.ndarray) -> Partial:
    """Summarise one block of rows. ``keys`` gives each row's unit (any sortable type)."""
    Z = np.asarray(Z, dtype=float)
    if Z.ndim != 2:
        raise ValueError("Z must be a 2-d array (rows x columns)")
    n, p = Z.shape
    keys = np.asarray(keys)
    if n == 0:
        return Partial(0, np.zeros(p), np.zeros(p), np.zeros((p, p)), np.zeros((p, p)),
                       keys[:0], np.zeros(0, dtype=np.int64), np.zeros((0, p)))
    ukeys, codes = np.unique(keys, return_inverse=True)
    codes = codes.ravel()
    ref = Z.mean(axis=0)
    Zc = Z - ref  # centre first so that large offsets do not eat precision
    shift = Zc.mean(axis=0)
    counts = np.bincount(codes, minlength=len(ukeys)).astype(np.int64)
    offsets = _group_sums(codes, Zc, len(ukeys)) / counts[:, None]
    D = Zc - offsets[codes]
    within_m2 = D.T @ D
    D = Zc - shift
    m2 = D.T @ D
    del D, Zc
    return Partial(int(n), ref, shift, m2, within_m2, ukeys, counts, offsets)


def merge(a: Partial, b: Partial) -> Partial:
    """Combine two blocks (pairwise update of Chan, Golub and LeVeque 1979).

    Units present in both blocks are merged too: their within cross-products gain the
    between-fragment part, ``sum_f n_f (mean_f - mean_unit)(mean_f - mean_unit)'``.
    """
    if a.n == 0:
        return b
    if b.n == 0:
        return a
    n = a.n + b.n
    d = b.ref - a.ref  # b re-expressed about a's reference point
    delta = (b.shift + d) - a.shift
    shift = a.shift + delta * (b.n / n)
    m2 = a.m2 + b.m2 + np.outer(delta, delta) * (a.n * b.n / n)
    keys = np.concatenate([a.keys, b.keys])
    counts = np.concatenate([a.counts, b.counts])
    offsets = np.concatenate([a.offsets, b.offsets + d])
    ukeys, inv = np.unique(keys, return_inverse=True)
    inv = inv.ravel()
    within = a.within_m2 + b.within_m2
    if len(ukeys) == len(keys):
        order = np.argsort(inv)
        return Partial(n, a.ref, shift, m2, within, ukeys, counts[order], offsets[order])
    # units split between the blocks: merge each set of fragments
    new_counts = np.bincount(inv, weights=counts, minlength=len(ukeys)).astype(np.int64)
    new_offsets = _group_sums(inv, offsets * counts[:, None], len(ukeys)) / new_counts[:, None]
    dev = offsets - new_offsets[inv]
    within = within + (dev * counts[:, None]).T @ dev
    return Partial(n, a.ref, shift, m2, within, ukeys, new_counts, new_offsets)


#: units per slice when unit-level arrays are swept (bounds the temporaries to
#: ``_UNIT_STEP x p`` whatever the number of units)
_UNIT_STEP = 1 << 13


def finalize(part: Partial, names=None) -> SuffStats:
    """Turn merged block moments into :class:`SuffStats` (groups by panel length).

    The group statistics are swept over slices of units, so the only ``N x p`` array
    made here is the result's ``unit_mean``.
    """
    counts = part.counts
    lengths, ginv = np.unique(counts, return_inverse=True)
    ginv = ginv.ravel()
    D, p, N = len(lengths), part.p, len(counts)
    gcount = np.bincount(ginv, minlength=D).astype(np.int64)
    # group means of the unit offsets, then cross-products of the offsets about them
    gmean_o = np.empty((D, p))
    for j in range(p):
        gmean_o[:, j] = np.bincount(ginv, weights=part.offsets[:, j], minlength=D)
    gmean_o /= gcount[:, None]
    gcp = np.zeros((D, p, p))
    for a in range(0, N, _UNIT_STEP):
        g = ginv[a:a + _UNIT_STEP]
        dev = part.offsets[a:a + _UNIT_STEP] - gmean_o[g]
        for d in np.unique(g):
            sel = dev[g == d]
            gcp[d] += sel.T @ sel
    return SuffStats(
        n=int(part.n), n_units=int(N), mean=part.mean, total=part.m2.copy(),
        within=part.within_m2.copy(), unit_count=counts.copy(), unit_mean=part.offsets + part.ref,
        lengths=lengths.astype(np.int64), group_count=gcount,
        group_mean=(gmean_o - part.shift) + part.mean,
        group_cp=gcp, unit_keys=part.keys.copy(), names=list(names) if names is not None else None,
    )


def compute(X, y, unit_codes, names=None) -> SuffStats:
    """Sufficient statistics of ``Z = [X, y]`` grouped by ``unit_codes`` (one pass)."""
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float).reshape(-1, 1)
    if X.ndim == 1:
        X = X[:, None]
    if X.shape[0] != y.shape[0] or len(unit_codes) != y.shape[0]:
        raise ValueError("X, y and unit_codes must have the same number of rows")
    return finalize(partial(np.hstack([X, y]), np.asarray(unit_codes)), names=names)


def from_design(design, kind: str = "random") -> SuffStats:
    """Sufficient statistics of ``[M, y]`` for ``M, _ = design.matrices(kind)``.

    Read from the statistics the :class:`~bayespanel.design.Design` computed once
    (``design.suffstats(kind)``); for ``"within"`` (demeaned time-varying columns) they
    are derived from those exactly, as for the Mundlak and within-between kinds. No
    ``n x k`` matrix is built.
    """
    if kind == "between":
        raise ValueError("the between kind has one row per unit; use kind='random'")
    if kind != "within":
        return design.suffstats(kind)
    from .engines._blocks import augment

    A, B, labels = design._transform(kind)
    return augment(design.suffstats("random"), A, B, names=list(labels) + [design.outcome])


def quad_terms(stats: SuffStats, b: np.ndarray):
    """Residual quadratic forms for coefficients ``b``: ``(sum_i W_i, S_d)`` where
    ``S_d = sum over units of length T_d of rbar_i^2``.

    ``b`` may have shape ``(k,)`` or ``(draws, k)``.
    """
    b = np.atleast_2d(np.asarray(b, dtype=float))
    v = np.hstack([-b, np.ones((b.shape[0], 1))])
    W = np.einsum("si,ij,sj->s", v, stats.within, v)
    S = (np.einsum("si,dij,sj->sd", v, stats.group_cp, v)
         + stats.group_count[None, :] * (v @ stats.group_mean.T) ** 2)
    return W, S


def _sorted_groups(keys):
    """``(ukeys, counts, starts)`` when ``keys`` are sorted, else ``None``."""
    if keys.dtype == object or not bool(np.all(keys[1:] >= keys[:-1])):
        return None
    starts = np.flatnonzero(np.concatenate([[True], keys[1:] != keys[:-1]]))
    counts = np.diff(np.append(starts, len(keys))).astype(np.int64)
    return keys[starts], counts, starts


def _finish(n, ref, counts, offsets, within_m2, ukeys) -> Partial:
    """Block moments from the unit offsets and the within cross-products, with the exact
    decomposition ``total = within + sum_i T_i (zbar_i - zbar)(zbar_i - zbar)'``."""
    shift = (counts @ offsets) / n
    m2 = within_m2.copy()
    for a in range(0, len(counts), _UNIT_STEP):  # unit slices: no N x p temporaries
        dev = offsets[a:a + _UNIT_STEP] - shift
        m2 += (dev * counts[a:a + _UNIT_STEP, None]).T @ dev
    return Partial(int(n), ref, shift, m2, within_m2, ukeys, counts, offsets)


def partial_inplace(Z: np.ndarray, keys: np.ndarray) -> Partial:
    """:func:`partial` computed in place: ``Z`` (float64, C-ordered) is overwritten.

    The same moments with no working copy of the block beyond ``Z`` itself (``partial``
    makes three), for passes that build ``Z`` themselves (the out-of-core engines). Rows
    sorted by unit (the common layout of panel files) skip the sort of the keys. The
    reference point is the mean of the first rows (any point near the data will do);
    rows are centred on it, then on their unit means, before any product is taken
    (Chan, Golub and LeVeque 1979).
    """
    if Z.dtype != np.float64 or Z.ndim != 2 or not Z.flags.c_contiguous:
        raise ValueError("partial_inplace needs a C-ordered 2-d float64 array")
    n, p = Z.shape
    keys = np.asarray(keys)
    if n == 0:
        return partial(Z, keys)
    groups = _sorted_groups(keys)
    if groups is not None:
        ukeys, counts, starts = groups
        codes = np.repeat(np.arange(len(starts)), counts)
    else:
        ukeys, codes = np.unique(keys, return_inverse=True)
        codes = codes.ravel()
        counts = np.bincount(codes, minlength=len(ukeys)).astype(np.int64)
    ref = Z[:4096].mean(axis=0)
    Z -= ref
    if groups is not None:
        offsets = np.add.reduceat(Z, starts, axis=0) / counts[:, None]
    else:
        offsets = _group_sums(codes, Z, len(ukeys)) / counts[:, None]
    step = 1 << 16  # subtract the unit means in cache-sized slices
    for a in range(0, n, step):
        Z[a:a + step] -= offsets[codes[a:a + step]]
    return _finish(n, ref, counts, offsets, Z.T @ Z, ukeys)


def compute_chunked(X, y, unit_codes, names=None, chunk_rows: int = 1 << 14) -> SuffStats:
    """:func:`compute` with bounded working memory: ``O(chunk_rows * p + N * p)``.

    Two sweeps over row slices of ``X`` and ``y`` (which are only read): the first sums
    the rows of each unit about a reference point, the second accumulates the
    cross-products of the rows about their unit means. :func:`compute` stacks ``[X, y]``
    and makes three working copies of it; this makes none, so the statistics stage adds
    almost nothing to the memory the design already holds. Same results to rounding.
    """
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    y = np.asarray(y, dtype=float).ravel()
    keys = np.asarray(unit_codes)
    n, k = X.shape
    if len(y) != n or len(keys) != n:
        raise ValueError("X, y and unit_codes must have the same number of rows")
    if n == 0:
        return finalize(partial(np.zeros((0, k + 1)), keys), names=names)
    groups = _sorted_groups(keys)
    if groups is not None:
        ukeys, counts, starts = groups

        def codes_of(a, b):  # unit of each row of a slice, from the run starts
            return np.searchsorted(starts, np.arange(a, b), side="right") - 1
    else:
        ukeys, codes = np.unique(keys, return_inverse=True)
        codes = codes.ravel()
        counts = np.bincount(codes, minlength=len(ukeys)).astype(np.int64)

        def codes_of(a, b):
            return codes[a:b]
    N, p = len(ukeys), k + 1

    def block(a, b):
        Z = np.empty((b - a, p))
        Z[:, :k] = X[a:b]
        Z[:, k] = y[a:b]
        return Z

    ref = block(0, min(n, 4096)).mean(axis=0)
    sums = np.zeros((N, p))
    for a in range(0, n, chunk_rows):
        b = min(a + chunk_rows, n)
        Z = block(a, b)
        Z -= ref
        c = codes_of(a, b)
        if groups is not None:
            local = np.flatnonzero(np.concatenate([[True], c[1:] != c[:-1]]))
            sums[c[local]] += np.add.reduceat(Z, local, axis=0)
        else:
            np.add.at(sums, c, Z)
    sums /= counts[:, None]
    offsets = sums
    within = np.zeros((p, p))
    for a in range(0, n, chunk_rows):
        b = min(a + chunk_rows, n)
        Z = block(a, b)
        Z -= ref
        Z -= offsets[codes_of(a, b)]
        within += Z.T @ Z
    return finalize(_finish(n, ref, counts, offsets, within, ukeys), names=names)
