"""One result shape for every LOO estimate (PSIS, exact refits, K-fold, sub-sampling,
exact cross-validation of reference fits)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...core.jsonsafe import json_record

__all__ = ["LOOResult"]


class LOOResult:
    """Expected log predictive density of one fit at one level.

    Attributes
    ----------
    level : {"unit", "occasion"}
    method : str
        ``"PSIS-LOO"``, ``"PSIS-LOO + exact refits"``, ``"grouped K-fold (K=..)"``,
        ``"PSIS-LOO, sub-sampled (m of n)"`` or ``"exact CV"`` / ``"exact K-fold CV"``.
    elpd, se : float
        ELPD and its standard error ``sqrt(n var(elpd_i))`` (Vehtari, Gelman and Gabry 2017).
    p_loo : float
        Effective number of parameters, ``lpd - elpd`` (``nan`` where undefined).
    pointwise : pandas.DataFrame
        One row per point (unit or estimation row) with the labels (``position``,
        ``unit``; at the occasion level ``occasion``, the row's number 1..T_i within its
        unit, ``row``, the Panel's index label, and ``time``, the occasion's time label,
        whenever the design is known, also after save/load), ``elpd`` and, for PSIS, ``pareto_k``
        and ``refit`` (whether the point was replaced by an exact refit). Points of a
        sub-sampled estimate that were not evaluated hold ``nan``.
    good_k : float or None
        Pareto-k threshold ``min(1 - 1/log10(S), 0.7)`` (Vehtari et al. 2024).
    notes : list of str
        Anything the reader must know (points left out, high k, refits, approximations).
    family : str or None
        The outcome family whose terms were scored (``"gaussian"`` for the marginal and
        reference models, ``"poisson"``, ``"bernoulli"``, ... for latent-effect models);
        :func:`bayespanel.compare` refuses to rank log probabilities of a discrete
        outcome against log densities of a continuous one. ``None`` when unknown.
    n_points : int, optional
        Number of points the estimate is about, when ``pointwise`` holds only some of them
        (the out-of-core occasion-level sub-sample keeps the sampled rows only); by
        default ``len(pointwise)``.
    """

    def __init__(self, *, level, method, elpd, se, p_loo, pointwise, good_k=None, notes=(),
                 n_draws=None, elpd_data=None, subsampling_se=None, family=None,
                 n_points=None):
        self._n_points = None if n_points is None else int(n_points)
        self.level = level
        self.method = method
        self.elpd = float(elpd)
        self.se = float(se)
        self.p_loo = float(p_loo) if p_loo is not None else float("nan")
        self.pointwise = pointwise
        self.good_k = None if good_k is None else float(good_k)
        self.notes = list(notes)
        self.n_draws = n_draws
        self.elpd_data = elpd_data
        self.subsampling_se = subsampling_se
        self.family = family

    @property
    def elpd_i(self) -> np.ndarray:
        return self.pointwise["elpd"].to_numpy(dtype=float)

    @property
    def n_points(self) -> int:
        return self._n_points if self._n_points is not None else int(len(self.pointwise))

    @property
    def pareto_k(self):
        return self.pointwise["pareto_k"].to_numpy() if "pareto_k" in self.pointwise else None

    @property
    def high_k(self) -> pd.DataFrame:
        """Points whose Pareto k exceeds ``good_k`` (and were not replaced by refits)."""
        if self.good_k is None or "pareto_k" not in self.pointwise:
            return self.pointwise.iloc[:0]
        pw = self.pointwise
        bad = pw["pareto_k"] > self.good_k
        if "refit" in pw:
            bad &= ~pw["refit"].astype(bool)
        return pw[bad]

    @property
    def n_high_pareto_k(self) -> int:
        return int(len(self.high_k))

    def to_record(self) -> dict:
        """The ``loo`` record of a model in ``results.json`` (docs/results-schema.md):
        level, ELPD, SE, p_loo, method, points, the notes as ``warning``; with Pareto k the
        threshold ``good_k``, ``max_k``, ``n_high_pareto_k`` (points above the threshold not
        replaced by refits) and, after refits, ``n_refits``; sub-sampled, its
        ``subsampling_se``. Non-finite numbers are ``None``."""
        pw = self.pointwise
        rec = {"level": self.level, "elpd": self.elpd, "se": self.se, "p_loo": self.p_loo,
               "n_high_pareto_k": None, "max_k": None, "warning": "; ".join(self.notes) or None,
               "method": self.method, "n_points": self.n_points}
        if self.subsampling_se is not None:
            rec["subsampling_se"] = self.subsampling_se
        if "pareto_k" in pw:
            k = pw["pareto_k"].to_numpy(dtype=float)
            good = self.good_k if self.good_k is not None else 0.7
            high = self.high_k
            rec["max_k"] = float(np.nanmax(k)) if np.isfinite(k).any() else None
            rec["good_k"] = good
            rec["n_high_pareto_k"] = int(len(high))
            if "refit" in pw:
                rec["n_refits"] = int(pw["refit"].sum())
            if len(high) and not rec["warning"]:
                who = ", ".join(map(str, high["unit"].astype(str).unique()[:10]))
                rec["warning"] = (f"{len(high)} point(s) with Pareto k above {good:.2f} "
                                  f"(units {who}); their LOO values are unreliable")
        return json_record(rec)

    def __repr__(self) -> str:
        lines = [f"{self.method} at the {self.level} level ({self.n_points} points"
                 + (f", {self.n_draws} draws)" if self.n_draws else ")"),
                 f"  elpd {self.elpd:.2f} (se {self.se:.2f}), p_loo {self.p_loo:.2f}"]
        if self.good_k is not None:
            lines.append(f"  Pareto k > {self.good_k:.2f}: {self.n_high_pareto_k} point(s)")
        lines += [f"  note: {n}" for n in self.notes]
        return "\n".join(lines)
