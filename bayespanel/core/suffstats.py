"""Sufficient statistics of the Gaussian panel likelihood, in one pass.

With ``Z = [X, y]`` (``p = k + 1`` columns, y last) the Gaussian random-intercept,
within-between, Mundlak, fixed-effects and pooled likelihoods depend on the data only
through

* ``within``: ``sum_i sum_t (z_it - zbar_i)(z_it - zbar_i)'`` (p x p),
* per distinct panel length ``T_d``: the number of units, the mean of their unit means and
  the centred cross-products of their unit means,
* ``n``, the global mean and the centred total cross-products.

Out of core the pass is a map-reduce. :func:`partial` summarises any block of rows (units
may be split across blocks) as a :class:`Partial`; :func:`merge` combines two blocks with
the pairwise update of Chan, Golub and LeVeque (1979), applied to the totals and to every
unit split between blocks; :func:`finalize` turns the merged result into
:class:`SuffStats`. In memory, :func:`compute` (= :func:`compute_chunked`) reads the rows
once, centred first on a reference point and then on their unit means, with a kernel
compiled by numba when it pays and bit-identical numpy otherwise (see "the in-memory
pass" below).

References
----------
.. [1] Chan, T. F., Golub, G. H. and LeVeque, R. J. (1979). Updating formulae and a pairwise
   algorithm for computing sample variances. Technical report STAN-CS-79-773, Stanford.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field

import numpy as np

from .linalg import group_scores
from .suffkernels import LANES as _LANES, ROW_BLOCK as _ROW_BLOCK, SLACK as _SLACK
from .suffkernels import numba_kernels as _numba_kernels

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

    The group statistics are one sweep over the unit offsets (``_group_pass``), so the
    only ``N x p`` array made here is the result's ``unit_mean``.
    """
    counts = part.counts
    lengths, gcount, gmean_o, gcp = _group_pass(part.offsets, counts)
    return SuffStats(
        n=int(part.n), n_units=int(len(counts)), mean=part.mean, total=part.m2.copy(),
        within=part.within_m2.copy(), unit_count=counts.copy(), unit_mean=part.offsets + part.ref,
        lengths=lengths.astype(np.int64), group_count=gcount,
        group_mean=(gmean_o - part.shift) + part.mean,
        group_cp=gcp, unit_keys=part.keys.copy(), names=list(names) if names is not None else None,
    )


def compute(X, y, unit_codes, names=None) -> SuffStats:
    """Sufficient statistics of ``Z = [X, y]`` grouped by ``unit_codes`` (one pass).

    The same as :func:`compute_chunked` (kept as the short name).
    """
    return compute_chunked(X, y, unit_codes, names=names)


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


def sorted_groups(keys):
    """``(ukeys, counts, starts)`` when ``keys`` are sorted, else ``None`` (integer keys:
    one compiled sweep when the kernels are in use for this many rows, see
    :data:`USE_NUMBA`; numba is not loaded for it)."""
    kern = _kernels_for(len(keys), cold=np.inf) if keys.dtype.kind in "iu" else None
    return _sorted_runs(keys, kern)


def _sorted_groups_np(keys):
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
    """:func:`partial` computed in place: ``Z`` (float64, C- or F-ordered) may be
    overwritten.

    The same moments with no working copy of the block beyond ``Z`` itself (``partial``
    makes three), for passes that build ``Z`` themselves (the out-of-core engines). From
    :data:`_NUMBA_MIN_ROWS` rows (numba installed, :data:`USE_NUMBA` not False) this is
    the compiled pass of :func:`compute_chunked` (one read of ``Z``, which it leaves as
    it is; numba is loaded for it); else numpy, in place. Rows
    sorted by unit (the common layout of panel files) skip the sort of the keys. The
    reference point is the mean of the first rows (any point near the data will do);
    rows are centred on it, then on their unit means, before any product is taken
    (Chan, Golub and LeVeque 1979).
    """
    if Z.dtype != np.float64 or Z.ndim != 2 or not (Z.flags.c_contiguous
                                                     or Z.flags.f_contiguous):
        raise ValueError("partial_inplace needs a C- or F-ordered 2-d float64 array")
    n, p = Z.shape
    keys = np.asarray(keys)
    if n == 0:
        return partial(Z, keys)
    ref = np.ascontiguousarray(Z[:4096]).mean(axis=0)  # the same in either order
    if _kernels_for(n, cold=_NUMBA_MIN_ROWS) is not None:
        # the compiled pass of compute_chunked reads the block once, in place, and leaves
        # Z as it is; an out-of-core pass reads many blocks, so numba's start-up pays.
        # Column order (F) suits it best: it reads a unit's rows column by column
        ukeys, counts, offsets, within = _pass(Z, Z[:, :0], keys, ref, cold=_NUMBA_MIN_ROWS)
        return _finish(n, ref, counts, offsets, within, ukeys)
    Z = np.ascontiguousarray(Z)  # the numpy version works in place on rows
    groups = sorted_groups(keys)
    if groups is not None:
        ukeys, counts, starts = groups
        codes = np.repeat(np.arange(len(starts)), counts)
    else:
        ukeys, codes = np.unique(keys, return_inverse=True)
        codes = codes.ravel()
        counts = np.bincount(codes, minlength=len(ukeys)).astype(np.int64)
    Z -= ref
    if groups is not None:
        offsets = np.add.reduceat(Z, starts, axis=0) / counts[:, None]
    else:
        offsets = _group_sums(codes, Z, len(ukeys)) / counts[:, None]
    step = 1 << 16  # subtract the unit means in cache-sized slices
    for a in range(0, n, step):
        Z[a:a + step] -= offsets[codes[a:a + step]]
    return _finish(n, ref, counts, offsets, Z.T @ Z, ukeys)


# ---------------------------------------------------------------------------- the in-memory pass
#
# The compiled kernels and the rules that fix the order of every sum (so that this
# module's numpy version gives bit-identical results) are in
# :mod:`bayespanel.core.suffkernels`.

#: when numba is already loaded in the process (PyTensor's default backend loads it for
#: any PyMC model), inputs from this many rows use the compiled kernels
_NUMBA_MIN_ROWS = 50_000
#: when it is not, only inputs from this many rows load it: numba's import and start-up
#: (about a second, once per process) cost more than the numpy version spends below
#: this size; from it, the first design pays that second and every later pass of the
#: process runs at the compiled speed (issue 18: reference fits from a Panel of 1,000,000
#: rows, where the numpy pass alone costs about as much as the whole compiled fit)
_NUMBA_COLD_ROWS = 1_000_000
#: None: choose as above; True: always the compiled kernels; False: always numpy
USE_NUMBA = None


def warm_kernels() -> bool:
    """Load the compiled kernels of a partitioned pass now: numba's import and the cached
    machine code of :func:`partial_inplace`'s kernels for its argument types (a few
    rows run through them), so that the first block of a pass does not wait for it
    while the other workers wait on the same lock. Returns whether the kernels are in
    use (False when numba is missing or :data:`USE_NUMBA` is False)."""
    kern = None if USE_NUMBA is False else _numba_kernels()
    if kern is None:
        return False
    Z = np.zeros((8, 2))
    _pass(Z, Z[:, :0], np.arange(8, dtype=np.int64), np.zeros(2), kern=kern)
    return True


def unit_scores(X, y, codes, centre, A, v, step: int = 1 << 12):
    """Per-unit sums ``sum_t (A d_t)(v' d_t)`` with ``d_t = [x_t, y_t] - centre[c_t]`` (the
    scores of a regression whose rows are linear in the deviations): one compiled sweep
    over the rows when the compiled kernels are used for this many rows
    (:data:`USE_NUMBA`), else numpy in slices of ``step`` rows, each summed by unit with
    :func:`bayespanel.core.linalg.group_scores` (no ``n x k`` temporaries)."""
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float).ravel()
    codes = np.asarray(codes, dtype=np.int64)
    A = np.ascontiguousarray(A, dtype=np.float64)
    v = np.ascontiguousarray(v, dtype=np.float64)
    out = np.zeros((len(centre), A.shape[0]))
    kern = _kernels_for(X.shape[0])
    if kern is not None:
        kern["scores"](np.ascontiguousarray(X), y.reshape(-1, 1), codes,
                       np.ascontiguousarray(centre, dtype=float), A, v, out)
        return out
    n, k = X.shape
    for a in range(0, n, step):
        b = min(a + step, n)
        c = codes[a:b]
        D = np.empty((b - a, k + 1))
        D[:, :k] = X[a:b]
        D[:, k] = y[a:b]
        D -= centre[c]
        lo, hi = int(c.min()), int(c.max()) + 1    # the slice's units (rows sorted by unit)
        out[lo:hi] += group_scores(D @ A.T, D @ v, c - lo, hi - lo)
    return out


def column_range(X, y):
    """``(lo, hi, finite)`` of each column of ``[X, y]``: the smallest and largest value
    and whether every value is finite, read once and never stacked (one compiled sweep
    over the rows when the kernels are used, see :data:`USE_NUMBA`; else numpy, column by
    column). Where a column is not finite, ``lo`` and ``hi`` are those of numpy's
    ``min`` and ``max`` only if it holds no NaN; callers look at ``finite`` first."""
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float).ravel()
    n, k = X.shape
    if n == 0:
        return np.zeros(k + 1), np.zeros(k + 1), np.ones(k + 1, dtype=bool)
    kern = _kernels_for(n)
    if kern is not None:
        lo, hi = np.full(k + 1, np.inf), np.full(k + 1, -np.inf)
        finite = np.ones(k + 1, dtype=bool)
        kern["range"](np.ascontiguousarray(X), y[:, None], lo, hi, finite)
        return lo, hi, finite
    cols = [X[:, j] for j in range(k)] + [y]
    lo = np.array([c.min() for c in cols])
    hi = np.array([c.max() for c in cols])
    return lo, hi, np.isfinite(lo) & np.isfinite(hi)  # min and max carry a NaN or an inf


def _kernels_for(n, cold=None):
    """The compiled kernels if they are to be used for ``n`` rows, else None (numpy).
    ``cold``: from how many rows numba is loaded when it is not yet (default
    :data:`_NUMBA_COLD_ROWS`)."""
    if USE_NUMBA is None:
        cold = _NUMBA_COLD_ROWS if cold is None else cold
        if n < _NUMBA_MIN_ROWS or (n < cold and "numba" not in sys.modules):
            return None
    elif not USE_NUMBA:
        return None
    kern = _numba_kernels()
    if USE_NUMBA and kern is None:
        raise RuntimeError("USE_NUMBA is True but numba is not available")
    return kern


#: rows per slice in the numpy version (bounds its temporaries)
_NP_STEP = 1 << 14


def _np_block(X, Y, ref, step):
    """``block(a, b)``: rows a..b of ``Z - ref``, transposed (p x rows), written into a
    buffer of ``step`` rows that is reused (fresh arrays of this size cost page faults)."""
    k, p = X.shape[1], X.shape[1] + Y.shape[1]
    buf = np.empty((p, step))
    ref = ref[:, None]

    def block(a, b):
        Z = buf[:, :b - a]
        Z[:k] = X[a:b].T
        Z[k:] = Y[a:b].T
        Z -= ref
        return Z
    return block


#: runs longer than this are summed by np.add.accumulate in the numpy version
_NP_LONG_RUN = 32


def _np_sums(block, runs_of, n, p, N):
    """The unit sums of :func:`_nb_sorted_pass` / :func:`_nb_unit_sums` in numpy: each
    unit's rows added one at a time, in row order, from zero. ``runs_of(a, b)`` gives
    the runs of rows of one unit in the slice (``units, first, size``; first relative to
    ``a``), or ``codes`` for rows in any order."""
    sums = np.zeros((p, N))
    for a in range(0, n, _NP_STEP):
        b = min(a + _NP_STEP, n)
        Z, runs = block(a, b), runs_of(a, b)
        if not isinstance(runs, tuple):  # rows in any order
            np.add.at(sums.T, runs, Z.T)  # one row at a time, in row order
            continue
        units, first, size = runs
        short = np.flatnonzero(size <= _NP_LONG_RUN)
        short = short[np.argsort(-size[short], kind="stable")]  # longest first
        neg = -size[short]
        su, sf = units[short], first[short]
        acc = sums[:, su]  # what the previous slice left for these units
        for t in range(int(-neg[0]) if len(short) else 0):
            m = int(np.searchsorted(neg, -t, side="left"))  # the runs longer than t
            acc[:, :m] += Z[:, sf[:m] + t]
        sums[:, su] = acc
        for r in np.flatnonzero(size > _NP_LONG_RUN):
            u, f = units[r], first[r]
            rows = np.concatenate([sums[:, u:u + 1], Z[:, f:f + size[r]]], axis=1)
            sums[:, u] = np.add.accumulate(rows, axis=1)[:, -1]  # one at a time, in order
    return np.ascontiguousarray(sums.T)  # the layout of the kernels' result


def _np_within(block, codes_of, offsets, n, p, upper):
    """:func:`_nb_flush` over every block, in numpy (same operations, same order),
    added to ``upper``. ``block`` must hold :data:`_ROW_BLOCK` rows."""
    npair, nc = p * (p + 1) // 2, _ROW_BLOCK // _LANES
    D = np.zeros((p, nc, _LANES))  # a block, its rows in chunks of _LANES
    P = np.empty((nc, npair, _LANES))  # the products of each chunk
    for a in range(0, n, _ROW_BLOCK):
        b = min(a + _ROW_BLOCK, n)
        m = b - a
        flat = D.reshape(p, -1)
        flat[:, :m] = block(a, b)
        flat[:, :m] -= offsets[codes_of(a, b)].T
        flat[:, m:] = 0.0  # as the kernel pads the last chunk
        used = -(-m // _LANES)
        q = 0
        for j in range(p):
            np.multiply(D[j, :used, None], D[j:, :used].transpose(1, 0, 2),
                        out=P[:used, q:q + p - j])
            q += p - j
        lanes = P[0].copy()
        for c in range(1, used):  # lane t gets the rows t, t + L, ... in order
            lanes += P[c]
        upper += np.add.accumulate(lanes, axis=1)[:, -1]  # the lanes in order
    return upper


def _sorted_slices(starts, counts):
    """``(runs_of, codes_of)`` for rows sorted by unit with run ``starts``."""
    ends = starts + counts

    def runs_of(a, b):  # units meeting rows a..b, their first row (from a), their size
        u0 = int(np.searchsorted(starts, a, side="right")) - 1
        u1 = int(np.searchsorted(starts, b, side="left"))
        first = np.maximum(starts[u0:u1], a)
        return np.arange(u0, u1), first - a, np.minimum(ends[u0:u1], b) - first

    def codes_of(a, b):
        units, _, size = runs_of(a, b)
        return np.repeat(units, size)
    return runs_of, codes_of


def _unpack(upper, p):
    """Symmetric ``p x p`` matrices from their upper triangles (last axis)."""
    J, L = np.triu_indices(p)
    W = np.empty(upper.shape[:-1] + (p, p))
    W[..., J, L] = upper
    W[..., L, J] = upper
    return W


def _sorted_runs(keys, kern):
    """``(ukeys, counts, starts)`` when ``keys`` are sorted, else ``None``."""
    if kern is None or keys.dtype.kind not in "iu" or len(keys) == 0:
        return _sorted_groups_np(keys)
    starts = np.empty(len(keys), dtype=np.int64)
    m = kern["runs"](keys, starts)
    if m < 0:
        return None
    starts = starts[:m].copy()
    counts = np.diff(np.append(starts, len(keys))).astype(np.int64)
    return keys[starts], counts, starts


def _pass(X, Y, keys, ref, cold=None, kern=False):
    """``(ukeys, counts, offsets, within)`` of the rows ``[X, Y]`` grouped by ``keys``,
    about ``ref`` (rules of :mod:`~bayespanel.core.suffkernels`; numba or numpy as
    :data:`USE_NUMBA` says, ``cold`` as in
    :func:`_kernels_for`)."""
    n, k = X.shape
    p = k + Y.shape[1]
    kern = _kernels_for(n, cold) if kern is False else kern
    groups = _sorted_runs(keys, kern)
    if groups is not None:
        ukeys, counts, starts = groups
        codes = None
    else:
        ukeys, codes = np.unique(keys, return_inverse=True)
        codes = codes.ravel().astype(np.int64)
        counts = np.bincount(codes, minlength=len(ukeys)).astype(np.int64)
    N = len(ukeys)
    if kern is not None:
        X = np.asarray(X, dtype=np.float64)
        if not (X.flags.c_contiguous or X.flags.f_contiguous):
            X = np.ascontiguousarray(X)  # the kernels are compiled for either order
        Y = np.ascontiguousarray(Y, dtype=np.float64)
        upper = np.zeros(p * (p + 1) // 2)
        lanes = np.empty(_LANES)
        if codes is None:
            offsets = np.empty((N, p))
            D = np.empty((p, _ROW_BLOCK + _SLACK))
            kern["sorted"](X, Y, starts, counts, ref, offsets, upper, D, lanes, _ROW_BLOCK)
        else:
            sums = np.zeros((N, p))
            kern["sums"](X, Y, codes, ref, sums)
            offsets = sums / counts[:, None]
            kern["within"](X, Y, codes, ref, offsets, upper, np.empty((p, _ROW_BLOCK)), lanes)
        return ukeys, counts, offsets, _unpack(upper, p)
    if codes is None:
        runs_of, codes_of = _sorted_slices(starts, counts)
    else:
        def codes_of(a, b):
            return codes[a:b]
        runs_of = codes_of
    offsets = _np_sums(_np_block(X, Y, ref, _NP_STEP), runs_of, n, p, N) / counts[:, None]
    upper = _np_within(_np_block(X, Y, ref, _ROW_BLOCK), codes_of, offsets, n, p,
                       np.zeros(p * (p + 1) // 2))
    return ukeys, counts, offsets, _unpack(upper, p)


def _length_groups(counts):
    """``(lengths, ginv)``: the distinct panel lengths and each unit's index among them."""
    top = int(counts.max()) if len(counts) else 0
    if top > 4 * len(counts) + 1024:  # few long units: sort instead of a long table
        lengths, ginv = np.unique(counts, return_inverse=True)
        return lengths, ginv.ravel().astype(np.int64)
    seen = np.bincount(counts, minlength=top + 1)
    lengths = np.flatnonzero(seen)
    where = np.zeros(top + 1, dtype=np.int64)
    where[lengths] = np.arange(len(lengths))
    return lengths, where[counts]


#: units per slice of a length group gathered for its cross-products (a multiple of
#: _ROW_BLOCK, so that the slices do not move the blocks)
_GROUP_STEP = 16 * _ROW_BLOCK


def _group_pass(offsets, counts):
    """``(lengths, gcount, gmean, gcp)`` of the unit offsets grouped by panel length:
    the mean of the offsets of the units of each length and their centred
    cross-products (rules of :mod:`~bayespanel.core.suffkernels`; numba or numpy,
    bit-identical)."""
    lengths, ginv = _length_groups(counts)
    D, (N, p) = len(lengths), offsets.shape
    gcount = np.bincount(ginv, minlength=D).astype(np.int64)
    kern = _kernels_for(N)
    Y, zero = np.empty((N, 0)), np.zeros(p)
    if kern is not None:
        offsets = np.ascontiguousarray(offsets, dtype=np.float64)
        sums = np.zeros((D, p))
        kern["sums"](offsets, Y, ginv, zero, sums)
    else:
        sums = _np_sums(_np_block(offsets, Y, zero, _NP_STEP), lambda a, b: ginv[a:b], N, p, D)
    gmean = sums / gcount[:, None]
    upper = np.zeros((D, p * (p + 1) // 2))
    if D == 1:
        slices = [(0, None)]
    else:  # the units of each length in unit order (stable sort), in slices
        order = np.argsort(ginv.astype(np.uint16 if D < 65536 else np.int64), kind="stable")
        bounds = np.concatenate([[0], np.cumsum(gcount)])
        slices = [(d, order[a:min(a + _GROUP_STEP, bounds[d + 1])])
                  for d in range(D) for a in range(bounds[d], bounds[d + 1], _GROUP_STEP)]
    buf = (np.empty((p, _ROW_BLOCK)), np.empty(_LANES)) if kern is not None else None
    for d, idx in slices:
        M = offsets if idx is None else offsets[idx]
        m = len(M)
        codes = np.zeros(m, dtype=np.int64)
        if kern is not None:
            kern["within"](M, Y[:m], codes, zero, gmean[d:d + 1], upper[d], *buf)
        else:
            _np_within(_np_block(M, Y[:m], zero, _ROW_BLOCK), lambda a, b: codes[a:b],
                       gmean[d:d + 1], m, p, upper[d])
    return lengths, gcount, gmean, _unpack(upper, p)


def compute_chunked(X, y, unit_codes, names=None) -> SuffStats:
    """:func:`compute` with bounded working memory: ``O(_ROW_BLOCK * p + N * p)``.

    ``X`` and ``y`` are only read, never stacked or copied. Rows sorted by unit (as a
    :class:`~bayespanel.data.design.Design` holds them) are read once by a kernel compiled
    with numba: each unit's rows are summed about a reference point, then their
    cross-products about the unit mean are accumulated while the rows are still in
    cache; rows in any other order take two sweeps (unit sums, then cross-products).
    The groups by panel length are the same computation on the unit means. Without
    numba (or under 50,000 rows) the same arithmetic runs in numpy, in the same order,
    with bit-identical results. The total cross-products follow exactly from the within
    ones and the group statistics (``total = within + sum_i T_i (zbar_i - zbar)
    (zbar_i - zbar)'``, summed by panel length), so nothing is accumulated about the
    global mean (Chan, Golub and LeVeque 1979). The block of rows is fixed, so the
    result does not depend on a block size.
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
    head = min(n, 4096)
    ref = np.append(X[:head].mean(axis=0), y[:head].mean())
    ukeys, counts, offsets, within = _pass(X, y[:, None], keys, ref)
    lengths, gcount, gmean, gcp = _group_pass(offsets, counts)
    # by panel length: sum_i T_i dev_i dev_i' = T_d [gcp_d + c_d (gmean_d - shift)(...)'],
    # in elementwise steps over the few lengths (a matrix product could round differently
    # for different memory layouts, and the result is to be the same on both paths)
    weight = (lengths * gcount).astype(float)
    shift = np.zeros(k + 1)
    for d in range(len(lengths)):
        shift += weight[d] * gmean[d]
    shift /= n
    total = within.copy()
    for d in range(len(lengths)):
        dev = gmean[d] - shift
        total += float(lengths[d]) * gcp[d] + weight[d] * (dev[:, None] * dev[None, :])
    mean = ref + shift
    return SuffStats(
        n=int(n), n_units=int(len(counts)), mean=mean, total=total, within=within,
        unit_count=counts, unit_mean=offsets + ref, lengths=lengths.astype(np.int64),
        group_count=gcount, group_mean=gmean + ref, group_cp=gcp, unit_keys=ukeys,
        names=list(names) if names is not None else None)
