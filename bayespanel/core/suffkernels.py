"""The compiled kernels of the in-memory pass of :mod:`bayespanel.core.suffstats` (numba).

The pass computes, for the columns ``z = [x, y]`` of each row about a reference point
``ref``, each unit's offset (the unit mean of ``z - ref``) and the within cross-products
``sum_it d_it d_it'`` with ``d_it = (z_it - ref) - offset_i``. It exists twice, with the
same floating-point operations in the same order, so the two give bit-identical results:
compiled by numba here, and in numpy in :mod:`bayespanel.core.suffstats` (the fallback
when numba is missing, and for small inputs); the rules that fix the order are below.
Which version runs is decided there (``suffstats.USE_NUMBA``).

References
----------
.. [1] Chan, T. F., Golub, G. H. and LeVeque, R. J. (1979). Updating formulae and a pairwise
   algorithm for computing sample variances. Technical report STAN-CS-79-773, Stanford.
"""

from __future__ import annotations

import os
import threading

import numpy as np

__all__ = ["numba_kernels", "ROW_BLOCK", "LANES", "SLACK"]

# The pass computes, for the columns ``z = [x, y]`` of each row about a reference point
# ``ref``, each unit's offset (the unit mean of ``z - ref``) and the within cross-products
# ``sum_it d_it d_it'`` with ``d_it = (z_it - ref) - offset_i``; the same code then takes
# the unit offsets as rows and the panel lengths as units, which gives the group means
# and cross-products. It exists twice, with the same floating-point operations in the
# same order, so the two give bit-identical results: compiled by numba (rows sorted by
# unit are read once from memory) and in numpy (the fallback when numba is missing, and
# for small inputs). The order is fixed by these rules:
#
# * a unit's sum adds its rows ``z - ref`` one at a time, in row order, from zero; the
#   offset is that sum divided by the unit's row count;
# * rows are taken in blocks of :data:`ROW_BLOCK` consecutive rows (from row 0; the last
#   block padded with zero rows to a multiple of :data:`LANES`). In a block, the product
#   ``d_j d_l`` (``j <= l``) of the row at position ``t`` is added to lane ``t mod
#   LANES``, rows in order, each lane from zero; the lanes are then added in order
#   (lane 0 first) and that sum is added to the result, block after block;
# * for the groups by panel length, the rows are the unit offsets of the units of one
#   length, in unit order, the units are those groups, and the same two rules apply.
#
# The lanes let the compiled loop use the processor's vector units without reassociating
# any sum (numba compiles without ``fastmath``), so nothing depends on the machine. The
# sums are short (at most ``ROW_BLOCK / LANES`` products per lane, ``LANES`` lanes per
# block), and the rows are centred on the reference point and on their unit means before
# any product is taken (Chan, Golub and LeVeque 1979), which keeps the accuracy of the
# two-pass algorithm with large common offsets in the data.


#: rows per block of the within cross-products
ROW_BLOCK = 4096
#: independent partial sums per block (a multiple of the vector width of any machine)
LANES = 64
#: units of at most this many rows are read once into the block buffer (longer ones twice)
SLACK = 1024

#: the compiled kernels once loaded; False when numba is unavailable
_kernels = None
_kernels_lock = threading.Lock()


# The kernels read the columns of a row from two arrays, X (n x k) and Y (n x m), so
# that ``[X, y]`` is never stacked (Y is ``y[:, None]``; for the unit offsets m = 0).

def _nb_flush(D, m, lanes, upper):  # pragma: no cover (compiled)
    """Add the products of the first ``m`` rows of the block ``D`` (p x ROW_BLOCK,
    one column per row) to ``upper`` (rules above)."""
    p = D.shape[0]
    L = lanes.shape[0]
    nb = (m + L - 1) // L
    for t in range(m, nb * L):
        for j in range(p):
            D[j, t] = 0.0
    q = 0
    for j in range(p):
        for l in range(j, p):
            for t in range(L):
                lanes[t] = 0.0
            for c in range(nb):
                u = D[j, c * L:(c + 1) * L]
                v = D[l, c * L:(c + 1) * L]
                for t in range(L):
                    lanes[t] += u[t] * v[t]
            s = lanes[0]
            for t in range(1, L):
                s += lanes[t]
            upper[q] += s
            q += 1


def _nb_sorted_pass(X, Y, starts, counts, ref, offsets, upper, D, lanes, S):  # pragma: no cover
    """Rows sorted by unit, read once (compiled by numba). A unit of at most the buffer's
    slack (``D.shape[1] - S``) rows is copied into the block buffer as ``z - ref`` and
    summed on the way, column by column, then its offset is taken off in the buffer;
    full blocks of ``S`` rows go to :func:`_nb_flush` and the rows past them move to the
    front. A longer unit is summed first and then copied in pieces. Either way each
    row's deviation is ``(z - ref) - offset`` and each sum runs in row order."""
    k = X.shape[1]
    p = k + Y.shape[1]
    slack = D.shape[1] - S
    m = 0
    for i in range(starts.shape[0]):
        a = starts[i]
        T = counts[i]
        if T <= slack:
            for j in range(p):
                rj = ref[j]
                acc = 0.0
                if j < k:
                    for t in range(T):
                        v = X[a + t, j] - rj
                        D[j, m + t] = v
                        acc += v
                else:
                    for t in range(T):
                        v = Y[a + t, j - k] - rj
                        D[j, m + t] = v
                        acc += v
                o = acc / T
                offsets[i, j] = o
                for t in range(m, m + T):
                    D[j, t] -= o
            m += T
            if m >= S:
                _nb_flush(D, S, lanes, upper)
                m -= S
                for j in range(p):
                    for t in range(m):
                        D[j, t] = D[j, S + t]
            continue
        for j in range(p):
            rj = ref[j]
            acc = 0.0
            if j < k:
                for r in range(a, a + T):
                    acc += X[r, j] - rj
            else:
                for r in range(a, a + T):
                    acc += Y[r, j - k] - rj
            offsets[i, j] = acc / T
        r0 = a
        while r0 < a + T:  # the unit's rows, in pieces that fit the block
            if m == S:
                _nb_flush(D, m, lanes, upper)
                m = 0
            r1 = min(a + T, r0 + (S - m))
            for j in range(p):
                rj = ref[j]
                o = offsets[i, j]
                if j < k:
                    for r in range(r0, r1):
                        D[j, m + r - r0] = (X[r, j] - rj) - o
                else:
                    for r in range(r0, r1):
                        D[j, m + r - r0] = (Y[r, j - k] - rj) - o
            m += r1 - r0
            r0 = r1
    _nb_flush(D, m, lanes, upper)


def _nb_unit_sums(X, Y, codes, ref, sums):  # pragma: no cover (compiled)
    """Sum of ``z - ref`` per unit, rows in any order (compiled by numba)."""
    k = X.shape[1]
    p = k + Y.shape[1]
    for r in range(X.shape[0]):
        c = codes[r]
        for j in range(k):
            sums[c, j] += X[r, j] - ref[j]
        for j in range(k, p):
            sums[c, j] += Y[r, j - k] - ref[j]


def _nb_within(X, Y, codes, ref, offsets, upper, D, lanes):  # pragma: no cover (compiled)
    """The within products of rows in any order, given the unit offsets (numba)."""
    k = X.shape[1]
    p = k + Y.shape[1]
    n = X.shape[0]
    S = D.shape[1]
    for a in range(0, n, S):
        m = 0
        for r in range(a, min(a + S, n)):
            c = codes[r]
            for j in range(k):
                D[j, m] = (X[r, j] - ref[j]) - offsets[c, j]
            for j in range(k, p):
                D[j, m] = (Y[r, j - k] - ref[j]) - offsets[c, j]
            m += 1
        _nb_flush(D, m, lanes, upper)


def _nb_runs(keys, starts):  # pragma: no cover (compiled)
    """Number of runs of equal keys written to ``starts``, or -1 if ``keys`` decrease."""
    prev = keys[0]
    starts[0] = 0
    m = 1
    for r in range(1, keys.shape[0]):
        kr = keys[r]
        if kr != prev:
            if kr < prev:
                return -1
            starts[m] = r
            m += 1
            prev = kr
    return m


def _nb_range(X, Y, lo, hi, finite):  # pragma: no cover (compiled)
    """Smallest and largest value of each column of ``[X, Y]`` and whether all its values
    are finite, in one sweep over the rows (compiled by numba). A NaN is not compared,
    an infinity is; either clears ``finite``."""
    k = X.shape[1]
    for r in range(X.shape[0]):
        for j in range(k):
            v = X[r, j]
            if v < lo[j]:
                lo[j] = v
            if v > hi[j]:
                hi[j] = v
            if v - v != 0.0:  # NaN for NaN and for an infinity
                finite[j] = False
        for j in range(Y.shape[1]):
            v = Y[r, j]
            if v < lo[k + j]:
                lo[k + j] = v
            if v > hi[k + j]:
                hi[k + j] = v
            if v - v != 0.0:
                finite[k + j] = False


def _nb_unit_scores(X, Y, codes, centre, A, v, out):  # pragma: no cover (compiled)
    """``out[c] += (A d) (v' d)`` over the rows, ``d = [x, y] - centre[c]`` of each row's
    unit ``c`` (compiled by numba)."""
    k = X.shape[1]
    p = k + Y.shape[1]
    q = A.shape[0]
    d = np.empty(p)
    for r in range(X.shape[0]):
        c = codes[r]
        s = 0.0
        for j in range(k):
            d[j] = X[r, j] - centre[c, j]
        for j in range(k, p):
            d[j] = Y[r, j - k] - centre[c, j]
        for j in range(p):
            s += v[j] * d[j]
        for i in range(q):
            a = 0.0
            for j in range(p):
                a += A[i, j] * d[j]
            out[c, i] += a * s


def numba_kernels():
    """The compiled kernels (numba caches them on disk: compiled once per machine), or
    None when numba is not installed or the environment sets ``BAYESPANEL_NUMBA=0``."""
    global _kernels, _nb_flush
    with _kernels_lock:
        if _kernels is None:
            try:
                if os.environ.get("BAYESPANEL_NUMBA", "1") == "0":
                    raise ImportError
                import numba
            except ImportError:
                _kernels = False
            else:
                jit = numba.njit(cache=True, nogil=True)
                _nb_flush = jit(_nb_flush)  # the kernels below call the compiled version
                _kernels = {"sorted": jit(_nb_sorted_pass), "sums": jit(_nb_unit_sums),
                            "within": jit(_nb_within), "runs": jit(_nb_runs),
                            "range": jit(_nb_range), "scores": jit(_nb_unit_scores)}
    return _kernels or None

