"""One results class for every reference fit (labelled skin over the array cores)."""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

__all__ = ["ReferenceResult"]

_TITLES = {
    "pooled": "Pooled least squares",
    "within": "Fixed effects (within)",
    "between": "Between (unit means)",
    "random": "Random intercept",
    "mundlak": "Random intercept with unit means (Mundlak)",
    "within_between": "Within-between (hybrid) random intercept",
}
_COV_TITLES = {
    "classical": "classical",
    "cluster": "cluster-robust by unit (CR1)",
    "cr2": "cluster-robust by unit, bias-reduced (CR2, Satterthwaite df)",
}


class ReferenceResult:
    """A frequentist reference fit: estimates, covariance and variance components.

    Built by :func:`bayespanel.reference.pooled`, :func:`within`, :func:`between`,
    :func:`random`, :func:`mundlak` and :func:`within_between`; all share this class and
    answer with the names a :class:`~bayespanel.posterior.Posterior` uses (``coef``,
    ``se``, ``interval``, ``table``, ``sigma_unit``, ``sigma_obs``).

    Attributes
    ----------
    estimator : str
        ``"pooled"``, ``"within"``, ``"between"``, ``"random"``, ``"mundlak"`` or
        ``"within_between"``.
    method : str or None
        Variance-component method of the random-intercept fits (``"swamy-arora"``,
        ``"ml"``, ``"reml"``).
    cov_type : str
        ``"classical"``, ``"cluster"`` (CR1) or ``"cr2"``.
    coef, se, tvalues, pvalues : pandas.Series
        Labelled by term.
    vcov : pandas.DataFrame
        Covariance of the estimates, labelled by term on both axes.
    df_resid : pandas.Series
        Degrees of freedom of the t reference distribution of each term (``inf`` means
        the normal distribution). Classical fits use the residual degrees of freedom
        (:attr:`residual_df`), CR1 ``G - 1`` and CR2 the Satterthwaite value per term.
    residual_df : float
        Residual degrees of freedom of the regression that was solved.
    sigma_unit, sigma_obs, icc : float
        Unit-level and occasion-level standard deviations and the intraclass
        correlation ``sigma_unit^2 / (sigma_unit^2 + sigma_obs^2)``. For fixed effects
        ``sigma_unit`` is the spread of the estimated unit intercepts (descriptive); for
        pooled and between fits the parts that are not defined are ``nan``.
    n_obs, n_units : int
        Rows and units the estimates use.
    dropped : dict
        Terms that were not estimated, with the reason.
    assumptions : list of str
        What the estimator assumes, in plain language.
    design : bayespanel.design.Design or None
        The design the fit was computed on (``None`` for :func:`fit_arrays`).
    """

    def __init__(self, *, estimator, method, cov_type, labels, coef, vcov, df, residual_df,
                 sigma2_unit, sigma2_obs, n_obs, n_units, design=None, dropped=None,
                 assumptions=(), lengths=None, theta=None, group_count=None,
                 loglik=float("nan"), outcome=None, extra=None, refit_info=None):
        labels = list(labels)
        self.estimator = estimator
        self.method = method
        self.cov_type = cov_type
        self.labels = labels
        self._coef = np.asarray(coef, dtype=float)
        self._vcov = np.asarray(vcov, dtype=float)
        self._df = np.broadcast_to(np.asarray(df, dtype=float), self._coef.shape).copy()
        self.residual_df = float(residual_df)
        self._s2u = float(sigma2_unit)
        self._s2e = float(sigma2_obs)
        self.n_obs = int(n_obs)
        self.n_units = int(n_units)
        self.design = design
        self.dropped = dict(dropped or {})
        self.assumptions = list(assumptions)
        self.lengths = None if lengths is None else np.asarray(lengths)
        self.theta_by_length = None if theta is None else np.asarray(theta, dtype=float)
        self.group_count = None if group_count is None else np.asarray(group_count)
        self.loglik = float(loglik)
        self.outcome = outcome
        self.extra = dict(extra or {})
        self._refit = refit_info or {}

    # ------------------------------------------------------------------ estimates
    @property
    def coef(self) -> pd.Series:
        return pd.Series(self._coef, index=self.labels, name="estimate")

    @property
    def vcov(self) -> pd.DataFrame:
        return pd.DataFrame(self._vcov, index=self.labels, columns=self.labels)

    @property
    def se(self) -> pd.Series:
        return pd.Series(np.sqrt(np.clip(np.diag(self._vcov), 0, None)), index=self.labels,
                         name="se")

    sd = se  # the name a Posterior uses

    @property
    def df_resid(self) -> pd.Series:
        return pd.Series(self._df, index=self.labels, name="df")

    @property
    def tvalues(self) -> pd.Series:
        with np.errstate(divide="ignore", invalid="ignore"):
            return pd.Series(self._coef / self.se.to_numpy(), index=self.labels, name="t")

    @property
    def pvalues(self) -> pd.Series:
        t = np.abs(self.tvalues.to_numpy())
        p = np.where(np.isfinite(self._df), 2 * stats.t.sf(t, np.where(
            np.isfinite(self._df), self._df, 1.0)), 2 * stats.norm.sf(t))
        return pd.Series(p, index=self.labels, name="p")

    def _quantile(self, prob):
        q = 0.5 + prob / 2
        finite = np.isfinite(self._df)
        return np.where(finite, stats.t.ppf(q, np.where(finite, self._df, 1.0)),
                        stats.norm.ppf(q))

    def interval(self, prob: float = 0.95) -> pd.DataFrame:
        """Confidence intervals from each term's reference distribution.

        Returns a DataFrame with columns ``lower`` and ``upper``, indexed by term.
        """
        if not 0 < prob < 1:
            from ..errors import SpecificationError
            raise SpecificationError(f"prob={prob!r} is not valid; choose a number in (0, 1)")
        half = self._quantile(prob) * self.se.to_numpy()
        return pd.DataFrame({"lower": self._coef - half, "upper": self._coef + half},
                            index=self.labels)

    def table(self, prob: float = 0.95) -> pd.DataFrame:
        """Estimates, standard errors, t, reference df, p-values and intervals."""
        ci = self.interval(prob)
        out = pd.DataFrame({
            "estimate": self._coef, "se": self.se.to_numpy(), "t": self.tvalues.to_numpy(),
            "df": self._df, "p": self.pvalues.to_numpy(),
            "lower": ci["lower"].to_numpy(), "upper": ci["upper"].to_numpy(),
        }, index=pd.Index(self.labels, name="term"))
        out.attrs.update(prob=prob, estimator=self.estimator, cov_type=self.cov_type,
                         method=self.method)
        return out

    # ------------------------------------------------------------------ variance parts
    @property
    def sigma_unit(self) -> float:
        return float(np.sqrt(self._s2u)) if np.isfinite(self._s2u) else float("nan")

    @property
    def sigma_obs(self) -> float:
        return float(np.sqrt(self._s2e)) if np.isfinite(self._s2e) else float("nan")

    @property
    def icc(self) -> float:
        tot = self._s2u + self._s2e
        return float(self._s2u / tot) if np.isfinite(tot) and tot > 0 else float("nan")

    def variance_partition(self) -> pd.DataFrame:
        """Unit SD, occasion SD, ICC and the GLS quasi-demeaning share per panel length.

        Returns a DataFrame indexed by quantity (``"unit SD"``, ``"occasion SD"``,
        ``"ICC"``, then ``"theta (T=...)"`` for each distinct panel length of a
        random-intercept fit) with columns ``estimate`` and ``units`` (the number of
        units with that panel length, for the theta rows).
        """
        rows = [("unit SD", self.sigma_unit, np.nan), ("occasion SD", self.sigma_obs, np.nan),
                ("ICC", self.icc, np.nan)]
        if self.theta_by_length is not None:
            for T, th, c in zip(self.lengths, self.theta_by_length, self.group_count):
                rows.append((f"theta (T={int(T)})", float(th), float(c)))
        out = pd.DataFrame(rows, columns=["quantity", "estimate", "units"]).set_index("quantity")
        out.attrs.update(estimator=self.estimator, method=self.method)
        return out

    # ------------------------------------------------------------------ refits
    def refit(self, rows, cov: str | None = None) -> "ReferenceResult":
        """Refit the same specification, in closed form, on a subset of the design rows.

        Parameters
        ----------
        rows : array of bool (length ``design.n``) or of row positions
            The rows to keep (the training rows of a cross-validation fold). Unit means
            are recomputed on them, as for any estimation sample.
        cov : str, optional
            Covariance of the refit; defaults to this fit's. ``"classical"`` is cheapest
            when only point estimates and variance components are needed.
        """
        if self.design is None:
            from ..errors import SpecificationError
            raise SpecificationError("this result has no design (it came from fit_arrays); "
                                     "call fit_arrays on the subset of rows instead")
        from .estimators import fit_design

        mask = np.asarray(rows)
        if mask.dtype != bool:
            m = np.zeros(self.design.n, dtype=bool)
            m[mask] = True
            mask = m
        sub = self.design.subset_rows(mask)
        return fit_design(sub, self.estimator, method=self._refit.get("method"),
                          cov=cov or self.cov_type)

    def log_predictive(self, X, y, units, level: str = "occasion", unit_means: str = "fit"):
        """Plug-in log predictive densities of new rows (see
        :func:`bayespanel.reference.predictive.log_predictive`)."""
        from .predictive import log_predictive

        return log_predictive(self, X, y, units, level=level, unit_means=unit_means)

    # ------------------------------------------------------------------ display
    def summary(self) -> str:
        head = _TITLES.get(self.estimator, self.estimator)
        if self.method:
            head += f", variance components by {self.method}"
        lines = [head, f"covariance: {_COV_TITLES.get(self.cov_type, self.cov_type)}",
                 f"rows: {self.n_obs}, units: {self.n_units}"]
        if self.dropped:
            lines.append("not estimated: " + "; ".join(f"{k} ({v})" for k, v in
                                                       self.dropped.items()))
        lines.append(self.table().to_string(float_format=lambda v: f"{v:.4g}"))
        lines.append(f"unit SD {self.sigma_unit:.4g}, occasion SD {self.sigma_obs:.4g}, "
                     f"ICC {self.icc:.3g}")
        return "\n".join(lines)

    def __repr__(self) -> str:
        return (f"<ReferenceResult {self.estimator}"
                + (f" ({self.method})" if self.method else "")
                + f", cov={self.cov_type}, {len(self.labels)} terms, {self.n_obs} rows, "
                  f"{self.n_units} units>")

    def __str__(self) -> str:
        return self.summary()
