"""The points sub-sampled LOO scores: from the rows, from per-unit statistics, or from one
more pass over a design's source.

:func:`bayespanel.analysis.loo.loo_subsample` is the one estimator (Magnusson et al. 2019): a seeded
simple random sample of the defined points, PSIS on their full per-draw terms, and the
difference estimator with the point-estimate approximation of every point. What differs
between fits is only where the terms come from, which the classes here answer:

* :class:`RowPoints`: the model's rows are at hand (:func:`plpd` for every point, the
  per-draw terms of the sampled units' rows);
* :class:`UnitStatPoints`: no rows, unit level. The term of a unit is the marginal density
  of its rows (:func:`bayespanel.core.gaussian.unit_loglik_stats`), which needs only
  ``T_i``, its unit means and its within cross-products, all from the design's statistics;
* :class:`OccasionPassPoints`: no rows, occasion level. The term of row ``(i, t)`` is the
  density of its residual given the unit's other rows (Bürkner, Gabry and Vehtari 2021),
  which needs the row itself: the sample is chosen before reading anything (the same
  positions as from rows), then one pass over the design's source
  (:meth:`~bayespanel.data.design.Design.run_rows`) scores every row at the posterior means
  (only the sum and sum of squares leave a block) and gathers the sampled rows, whose
  per-draw terms are computed afterwards in chunks of draws.

References
----------
.. [1] Magnusson, M., Andersen, M. R., Jonasson, J. and Vehtari, A. (2019). Bayesian
   leave-one-out cross-validation for large data. ICML, PMLR 97, 4244-4253.
.. [2] Bürkner, P.-C., Gabry, J. and Vehtari, A. (2021). Efficient leave-one-out
   cross-validation for Bayesian non-factorized normal and Student-t models.
   Computational Statistics 36, 1243-1261. doi:10.1007/s00180-020-01045-4
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ...core.ar1 import refuse_pending
from ...core.errors import EstimationError, SpecificationError
from ...core.mathcore import unit_sd_draws
from ...core import gaussian
from ...bayes.draws import FitDraws, pointwise_terms
from ._draws import from_posterior
from .pointwise import pointwise_loglik, undefined_reason

__all__ = ["plpd", "diff_estimator", "points_for", "RowPoints", "UnitStatPoints",
           "OccasionPassPoints"]


def plpd(fd, level):
    """Point log predictive density at the posterior means of ``(b, sigma, tau)``, every
    point (the cheap approximation of Magnusson et al. 2019)."""
    b, sigma, tau = fd.flat()
    bm, sm = b.mean(axis=0)[None], np.array([sigma.mean()])
    tm = None if tau is None else np.array([tau.mean()])
    rm = None if fd.rho is None else np.array([fd.flat_rho().mean()])  # AR(1) errors
    return pointwise_terms(fd.M, fd.y, fd.codes, bm, sm, tm, level, rho=rm,
                           time=fd.ar1_time)[0]


def diff_estimator(elpd_s, approx_s, approx_sum, approx_sq_sum, N):
    """Difference estimator of Magnusson et al. (2019) from the sums of the approximation.

    The same estimate and standard errors as ``arviz_stats``' ``diff_srs_estimator``
    (``elpd_loo_estimate, subsampling_se, total_se``), which takes the approximation of
    every point; the population enters only through ``sum approx`` and
    ``sum approx^2``, which a pass over a source accumulates without keeping the points.
    """
    ok = np.isfinite(elpd_s) & np.isfinite(approx_s)
    m = int(ok.sum())
    if m == 0:
        return np.nan, np.inf, np.inf
    e, a = np.asarray(elpd_s, float)[ok], np.asarray(approx_s, float)[ok]
    d = e - a
    scaled = N * d.mean()
    est = approx_sum + scaled
    if m < 2 or N <= 0:
        return est, np.inf, np.inf
    var = np.var(d, ddof=1)
    sub_var = N ** 2 * max(0.0, 1 - m / N) * var / m
    total_var = (approx_sq_sum + N * np.mean(e ** 2 - a ** 2)
                 - (scaled ** 2 - sub_var + 2 * approx_sum * est - approx_sum ** 2) / N)
    return est, float(np.sqrt(sub_var)), float(np.sqrt(max(0.0, total_var)))


def check_observations(observations, N):
    """Refuse a sample size that is not an integer in ``2..N``."""
    if not isinstance(observations, (int, np.integer)) or not 1 < observations <= N:
        raise SpecificationError(
            f"observations={observations!r} must be an integer between 2 and {N} points")


def draws_of(post, design) -> FitDraws:
    """The draws of ``post`` (a Posterior or :class:`FitDraws`) for scoring on ``design``
    without its rows (``M``, ``y`` and ``codes`` are left empty)."""
    if isinstance(post, FitDraws):
        return post
    spec, idata = getattr(post, "spec", None), getattr(post, "idata", None)
    if spec is None or idata is None or "posterior" not in idata.children:
        raise SpecificationError(
            f"expected a bayespanel Posterior with posterior draws, got {type(post).__name__}")
    refuse_pending(spec, "LOO (at either level) and K-fold")
    ds = idata["posterior"].to_dataset()
    if "coef" not in ds or "sigma_obs" not in ds:
        raise SpecificationError("sub-sampled LOO without rows needs a Gaussian panel "
                                 "model's posterior (coef and sigma_obs draws)")
    coef = np.asarray(ds["coef"].values, dtype=float)
    C, D, _ = coef.shape
    sigma = np.asarray(ds["sigma_obs"].values, dtype=float).reshape(C, D)
    tau = unit_sd_draws(spec.unit_effects, ds["sigma_unit"].values
                        if spec.unit_effects == "random" else None, (C, D))
    return FitDraws(kind=spec.kind, unit_effects=spec.unit_effects, labels=list(spec.labels),
                    M=None, y=None, codes=None, units=pd.Index(design.units), time=None,
                    rows=None, coef=coef, sigma=sigma, tau=tau, posterior=ds, design=design,
                    unit_name=design.spec.unit, time_name=design.spec.time)


def points_for(post, level, design=None):
    """What the sub-sampled LOO of ``post`` scores at ``level``: ``(draws, make)`` where
    ``make()`` gives :class:`RowPoints` when the rows are at hand, else
    :class:`UnitStatPoints` or :class:`OccasionPassPoints` on ``design`` (default the
    posterior's)."""
    if design is None:
        design = getattr(post, "design", None)
    if design is None or design.has_rows:
        fd = from_posterior(post)
        return fd, lambda: RowPoints(fd, level)
    fd = draws_of(post, design)
    cls = UnitStatPoints if level == "unit" else OccasionPassPoints
    return fd, lambda: cls(fd, design)


class RowPoints:
    """Points of a fit whose rows are at hand: the approximation of every point and the
    per-draw terms of the sampled ones, from the rows.

    Every points class offers ``N`` (the defined points), ``n_points`` (all points),
    ``noun`` and ``where`` (for the note), ``positions(choice)`` (the sorted positions of
    the sampled points among all points), ``score(idx)`` (per-draw terms ``(C, D, m)`` and
    the approximation of the sampled points), ``estimate(elpd_s, approx_s)`` (the
    difference estimator) and ``pointwise(idx, approx_s, elpd_s, k_s)`` with the
    labels of the sampled points, in sample order.
    """

    noun = "points"
    where = None

    def __init__(self, fd, level):
        reason = undefined_reason(fd.unit_effects, level, fd.T)
        if reason:
            raise EstimationError(reason)
        self.fd, self.level = fd, level
        self.labels = fd.point_index(level)
        self.approx = self._approx()
        self.valid = np.flatnonzero(np.isfinite(self.approx))
        self.N = len(self.valid)
        self.n_points = len(self.labels)

    def _approx(self):
        return plpd(self.fd, self.level)

    def positions(self, choice):
        return np.sort(self.valid[choice])

    def _loglik(self, idx):
        fd = self.fd
        need = np.unique(idx if self.level == "unit" else fd.codes[idx])
        ll = pointwise_loglik(fd, self.level, units=need)
        if self.level == "unit":
            return ll
        local = np.flatnonzero(np.isin(fd.codes, need))
        return ll[..., np.searchsorted(local, idx)]

    def score(self, idx):
        return self._loglik(idx), self.approx[idx]

    def estimate(self, elpd_s, approx_s):
        from arviz_stats.base import array_stats

        return array_stats.diff_srs_estimator(elpd_s, approx_s, self.approx[self.valid],
                                              self.N)

    def pointwise(self, idx, approx_s, elpd_s, k_s):
        pw = self.labels.copy()
        pw["approx"] = self.approx
        pw["elpd"] = np.nan
        pw["pareto_k"] = np.nan
        pw.loc[idx, "elpd"] = elpd_s
        pw.loc[idx, "pareto_k"] = k_s
        sampled = self.labels.iloc[idx].reset_index(drop=True)
        return pw.loc[self.valid].reset_index(drop=True), sampled


def _model_stats(fd, design):
    """The design's statistics for the posterior's kind, after checking the terms agree."""
    ss = design.model_suffstats(fd.kind)
    if list(ss.names[:-1]) != list(fd.labels):
        raise SpecificationError("the posterior's terms do not match the design's columns "
                                 f"({list(fd.labels)} vs {list(ss.names[:-1])})")
    return ss


class UnitStatPoints(RowPoints):
    """Unit-level points of a fit on a design without rows: every term from the design's
    per-unit statistics (:func:`bayespanel.core.gaussian.unit_loglik_stats`), no pass
    over the rows. Same sample and numbers as :class:`RowPoints` on the rows."""

    noun = "units"
    where = "terms from per-unit statistics (out of core)"

    def __init__(self, fd, design):
        reason = undefined_reason(fd.unit_effects, "unit")
        if reason:
            raise EstimationError(reason)
        self.fd, self.level = fd, "unit"
        ss = _model_stats(fd, design)
        self._args = (design.unit_cross_products(fd.kind), ss.unit_mean, ss.unit_count)
        self.labels = pd.DataFrame({"position": np.arange(ss.n_units),
                                    "unit": np.asarray(design.units),
                                    "occasions": ss.unit_count})
        self.approx = self._approx()
        self.valid = np.arange(ss.n_units)
        self.N = self.n_points = int(ss.n_units)

    def _approx(self):
        b, sigma, tau = self.fd.flat()
        return gaussian.unit_loglik_stats(*self._args, b.mean(axis=0)[None], [sigma.mean()],
                                          [tau.mean()])[0]

    def _loglik(self, idx):
        b, sigma, tau = self.fd.flat()
        C, D = self.fd.coef.shape[:2]
        return gaussian.unit_loglik_stats(*self._args, b, sigma, tau,
                                          units=idx).reshape(C, D, -1)


# ---------------------------------------------------------------------------- occasion pass
@dataclass(frozen=True)
class RowLookup:
    """What every block needs to score its rows at the posterior means and to pick the
    sampled rows (built once, shared by all blocks).

    A row ``z = [x, y]`` of the design has residual ``r = z'u + const_i`` under the
    model's columns ``A z + B zbar_i`` at the posterior means (``u = A'v``,
    ``const_i = zbar_i'B'v``, ``v = [-b, 1]``); its unit's residuals sum to ``total_i``
    over ``others_i + 1`` rows.
    """

    keys: np.ndarray
    const: np.ndarray
    total: np.ndarray
    others: np.ndarray
    u: np.ndarray
    sigma: float
    tau: float | None
    take_units: np.ndarray      # sorted codes of the units whose rows are gathered
    take_rows: np.ndarray | None = None  # sorted codes * n_occ + occasion position, or all
    occasions: np.ndarray | None = None  # sorted occasions of the sampled rows (take_rows)


@dataclass
class OccasionPiece:
    """Sum and sum of squares of the approximation over the defined rows of some blocks,
    their number, and the gathered rows (unit code, time, ``z``, approx)."""

    total: float
    total_sq: float
    count: int
    codes: np.ndarray
    times: np.ndarray
    Z: np.ndarray
    approx: np.ndarray


def occasion_block(rows, look: RowLookup) -> OccasionPiece:
    """The approximation of every row of one block (a
    :class:`~bayespanel.data.sources.RowBlock`), and its sampled rows."""
    Z, times = rows.Z, rows.time
    codes = np.searchsorted(look.keys, rows.units)
    r = Z @ look.u + look.const[codes]
    t = gaussian.occasion_logpdf(r, look.total[codes] - r, look.others[codes], look.sigma,
                                 look.tau)
    ok = np.isfinite(t)
    sel = np.flatnonzero(np.isin(codes, look.take_units))
    if look.take_rows is not None and len(sel):
        occ = look.occasions
        at = np.minimum(np.searchsorted(occ, times[sel]), len(occ) - 1)
        pair = codes[sel] * len(occ) + at
        sel = sel[(occ[at] == times[sel]) & np.isin(pair, look.take_rows)]
    tk = t[ok]
    return OccasionPiece(float(tk.sum()), float((tk * tk).sum()), int(ok.sum()), codes[sel],
                         times[sel], Z[sel], t[sel])


def merge_occasion(pieces) -> OccasionPiece:
    return OccasionPiece(
        sum(p.total for p in pieces), sum(p.total_sq for p in pieces),
        sum(p.count for p in pieces), np.concatenate([p.codes for p in pieces]),
        np.concatenate([p.times for p in pieces]), np.concatenate([p.Z for p in pieces]),
        np.concatenate([p.approx for p in pieces]))


class OccasionPassPoints:
    """Occasion-level points of a fit on a design without rows: the sample is chosen from
    the per-unit row counts (the positions :class:`RowPoints` would choose: rows in
    unit-time order, for fixed effects without the rows of single-row units), then one
    pass over the design's source scores every row at the posterior means and gathers the
    sampled rows, whose per-draw terms follow in chunks of ``budget // points`` draws.

    The sampled rows are picked by unit and occasion when the design knows each unit's
    occasions (:meth:`~bayespanel.data.design.Design.row_times`); otherwise all rows of the
    sampled units are gathered and ranked by time afterwards. ``pointwise`` lists the
    sampled rows only; the population's approximation enters through its sum and sum of
    squares.
    """

    noun = "rows"
    where = "one pass over the partitions (out of core); pointwise lists the sampled rows"

    def __init__(self, fd, design, budget: int = 1 << 22):
        stats = design.design_suffstats()
        T = stats.unit_count
        reason = undefined_reason(fd.unit_effects, "occasion", T)
        if reason:
            raise EstimationError(reason)
        _model_stats(fd, design)
        self.fd, self.design, self.stats, self.budget = fd, design, stats, budget
        self.T = T
        valid = T >= 2 if fd.unit_effects == "fixed" else np.ones(len(T), bool)
        self._Tv = np.where(valid, T, 0)
        self.N = int(self._Tv.sum())
        self.n_points = int(T.sum())

    def positions(self, choice):
        """Positions (rows in unit-time order) of the sampled defined rows, sorted."""
        T, Tv = self.T, self._Tv
        cum_v = np.cumsum(Tv)
        g = np.searchsorted(cum_v, choice, side="right")
        starts = np.cumsum(T) - T
        idx = np.sort(starts[g] + (choice - (cum_v[g] - Tv[g])))
        self._g = np.searchsorted(np.cumsum(T), idx, side="right")
        self._rank = idx - starts[self._g]
        return idx

    def score(self, idx):
        fd, design, g, rank = self.fd, self.design, self._g, self._rank
        zbar, T = self.stats.unit_mean, self.T
        A, B = design.row_map(fd.kind)
        b, sigma, tau = fd.flat()
        v = gaussian.residual_vector(b.mean(axis=0))
        u, w = A.T @ v, B.T @ v
        times = design.row_times(g, rank)
        take_rows = occ = None
        if times is not None:
            occ = np.unique(times)
            take_rows = np.unique(g * len(occ) + np.searchsorted(occ, times))
        look = RowLookup(
            keys=self.stats.unit_keys, const=zbar @ w, total=T * (zbar @ (u + w)),
            others=(T - 1).astype(float), u=u, sigma=float(sigma.mean()),
            tau=None if tau is None else float(tau.mean()), take_units=np.unique(g),
            take_rows=take_rows, occasions=occ)
        piece = design.run_rows(occasion_block, merge_occasion, look)
        if piece.count != self.N:
            raise EstimationError(f"the occasion-level pass scored {piece.count} rows, the "
                                  f"design has {self.N}; the table changed since the design "
                                  "pass?")
        self._sums = (piece.total, piece.total_sq)
        zs, self._times, approx_s = _gathered(piece, g, rank, exact=take_rows is not None)
        # full terms: the model's columns of the sampled rows and of their units' means
        Ms = zs @ A.T + zbar[g] @ B.T
        Mbar = zbar[g] @ (A + B).T
        Tg = T[g].astype(float)
        S = b.shape[0]
        ll = np.empty((S, len(idx)))
        step = max(1, self.budget // max(len(idx), 1))
        for a in range(0, S, step):
            V = gaussian.residual_vector(b[a:a + step])
            r = V @ Ms.T
            R = Tg * (V @ Mbar.T) - r
            ta = None if tau is None else tau[a:a + step, None]
            ll[a:a + step] = gaussian.occasion_logpdf(r, R, (Tg - 1)[None, :],
                                                      sigma[a:a + step, None], ta)
        C, D = fd.coef.shape[:2]
        return ll.reshape(C, D, -1), approx_s

    def estimate(self, elpd_s, approx_s):
        return diff_estimator(elpd_s, approx_s, *self._sums, self.N)

    def pointwise(self, idx, approx_s, elpd_s, k_s):
        g = self._g
        pw = pd.DataFrame({"position": idx, "unit": np.asarray(self.design.units)[g],
                           "occasion": self._rank + 1, "time": self._times,
                           "approx": approx_s, "elpd": elpd_s, "pareto_k": k_s})
        return pw, pw


def _gathered(piece: OccasionPiece, g, rank, exact: bool):
    """``(z, time, approx)`` of the sampled rows ``(unit g, rank within unit)`` in sample
    order, from the gathered rows: exactly the sampled ones (``exact``), or every row of
    the sampled units, ranked here by time."""
    order = np.lexsort((piece.times, piece.codes))
    codes = piece.codes[order]
    if exact:
        take = order
        ok = np.array_equal(codes, g)
    else:
        at = np.searchsorted(codes, g, side="left") + rank
        last = np.minimum(at, len(codes) - 1)
        ok = bool(np.all(at < len(codes))) and np.array_equal(codes[last], g)
        take = order[last] if len(codes) else order
    if not ok:
        raise EstimationError("the occasion-level pass did not find every sampled row; has "
                              "the table changed since the design pass?")
    return piece.Z[take], piece.times[take], piece.approx[take]
