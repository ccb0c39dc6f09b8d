"""One results class for every reference fit (labelled skin over the array cores)."""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from .. import kinds
from ..core.mathcore import intraclass_correlation
from ..core.jsonsafe import jsonable
from ..data.resultshape import PartitionResult, check_prob, term_records

__all__ = ["ReferenceResult"]

_COV_TITLES = {
    "classical": "classical",
    "cluster": "cluster-robust by unit (CR1)",
    "cr2": "cluster-robust by unit, bias-reduced (CR2, Satterthwaite df)",
}


class ReferenceResult:
    """A frequentist reference fit: estimates, covariance and variance components.

    Built by :func:`bayespanel.reference.pooled`, :func:`within`, :func:`between`,
    :func:`random`, :func:`mundlak` and :func:`within_between`; all share this class and
    answer with the names a :class:`~bayespanel.bayes.posterior.Posterior` uses (``coef``,
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
        correlation ``sigma_unit^2 / (sigma_unit^2 + sigma_obs^2)``. Parts a fit does not
        define are ``nan``: ``sigma_unit`` and ``icc`` of fixed-effects fits (the unit
        intercepts are free parameters, not draws from a distribution; see
        :attr:`unit_intercept_share`), of pooled fits, and both SDs of between fits.
    unit_variance_at_zero : bool
        True when a random-intercept fit estimated the unit variance at exactly zero
        (ML/REML maximum on the boundary, Swamy-Arora estimate truncated at zero).
    unit_intercept_share : float
        Fixed effects only: the share of the outcome's variance that the estimated unit
        intercepts account for.
    test_distribution : str
        The distribution the p-values and intervals use, from :attr:`df_resid`.
    n_obs, n_units : int
        Rows and units the estimates use.
    dropped : dict
        Terms that were not estimated, with the reason.
    assumptions : list of str
        What the estimator assumes, in plain language.
    design : bayespanel.data.design.Design or None
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
        self._assumptions = list(assumptions)
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

    #: name of the error column of :meth:`table` (:mod:`bayespanel.data.resultshape`)
    error_name = "se"

    @property
    def error(self) -> pd.Series:
        """The error column of :meth:`table`: the standard errors (same as :attr:`se`)."""
        return self.se

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

    def interval(self, prob: float | None = None) -> pd.DataFrame:
        """Confidence intervals from each term's reference distribution.

        Returns a DataFrame with columns ``lower`` and ``upper``, indexed by term.
        """
        prob = check_prob(prob)
        half = self._quantile(prob) * self.se.to_numpy()
        return pd.DataFrame({"lower": self._coef - half, "upper": self._coef + half},
                            index=self.labels)

    def table(self, prob: float | None = None) -> pd.DataFrame:
        """Estimates, standard errors and intervals (the leading columns every fit's
        table shares, :mod:`bayespanel.data.resultshape`), then t, reference df and p-values."""
        prob = check_prob(prob)  # None: the interval option
        ci = self.interval(prob)
        out = pd.DataFrame({
            "estimate": self._coef, "se": self.se.to_numpy(),
            "lower": ci["lower"].to_numpy(), "upper": ci["upper"].to_numpy(),
            "t": self.tvalues.to_numpy(), "df": self._df, "p": self.pvalues.to_numpy(),
        }, index=pd.Index(self.labels, name="term"))
        out.attrs.update(prob=prob, error="se", estimator=self.estimator,
                         cov_type=self.cov_type, method=self.method)
        return out

    def to_record(self, prob: float | None = None) -> dict:
        """This fit's entry of ``results.json`` (``reference[]`` in docs/results-schema.md,
        without the run's ``name``, ``title`` and ``assumptions``): the estimator, its
        covariance, one record per term of :meth:`table` (``p`` as ``p_value``), the
        variance components (``icc`` only for random-intercept fits), rows, units, the
        terms not estimated and the tests' distribution; random-intercept fits add whether
        the unit variance sits at zero, fixed effects the unit-intercept share. Non-finite
        numbers are ``None``."""
        prob = check_prob(prob)  # None: the interval option
        tab = self.table(prob)
        random = (self.estimator in kinds.reference_names()
                  and kinds.reference(self.estimator).variance_components)
        rec = {
            "estimator": self.estimator, "method": self.method, "cov": self.cov_type,
            "coefficients": term_records(
                tab, ("estimate", "se", "df", "p", "lower", "upper")),
            "sigma_unit": self.sigma_unit, "sigma_obs": self.sigma_obs,
            "icc": self.icc if random else None,
            "n_obs": self.n_obs, "n_units": self.n_units,
            "not_estimated": {str(k): str(v) for k, v in self.dropped.items()},
            "test_distribution": self.test_distribution,
        }
        if random:
            rec["unit_variance_at_zero"] = self.unit_variance_at_zero
            rec["boundary_note"] = self.boundary_note() or None
        if self.estimator == "within":
            rec["unit_intercept_share"] = self.unit_intercept_share
        return jsonable(rec)

    @property
    def test_distribution(self) -> str:
        """The reference distribution of the tests and intervals, in words: ``"normal"``,
        ``"t(9)"``, or ``"t, Satterthwaite df 3.1 to 8.7 by term"`` (CR2)."""
        df = self._df[np.isfinite(self._df)] if len(self._df) else self._df
        if len(df) < len(self._df) or not len(self._df):
            return "normal" if not len(df) else "normal or t by term"
        lo, hi = float(df.min()), float(df.max())
        if hi - lo < 1e-9:
            return f"t({lo:.0f})" if abs(lo - round(lo)) < 1e-9 else f"t({lo:.1f})"
        return f"t, Satterthwaite df {lo:.1f} to {hi:.1f} by term"

    @property
    def assumptions(self) -> list:
        """What the estimator assumes, in plain language, ending with the distribution its
        tests use (read from the covariance actually computed)."""
        dist = self.test_distribution
        df = self._df[np.isfinite(self._df)]
        if dist == "normal":
            text = "the normal distribution (large-sample likelihood theory)"
        elif self.cov_type == "cluster":
            G = self.extra.get("n_clusters", self.n_units)
            text = (f"the t distribution with G - 1 = {df.min():.0f} degrees of freedom "
                    f"(G = {G} units as clusters)")
        elif self.cov_type == "cr2":
            text = (f"t distributions with each term's Satterthwaite degrees of freedom "
                    f"({dist.split('df ')[-1].replace(' by term', '')})"
                    if dist.startswith("t,") else
                    f"the t distribution with {dist[2:-1]} Satterthwaite degrees of freedom")
        else:
            text = (f"the t distribution with the residual degrees of freedom "
                    f"({dist[2:-1]})" if dist.startswith("t(") else dist)
        return self._assumptions + [f"Tests and intervals use {text}."]

    # ------------------------------------------------------------------ variance parts
    @property
    def unit_variance_at_zero(self) -> bool:
        return bool(self.estimator in ("random", "mundlak", "within_between")
                    and self._s2u == 0.0)

    @property
    def unit_intercept_share(self) -> float:
        return float(self.extra.get("unit_intercept_share", float("nan")))

    @property
    def sigma_unit(self) -> float:
        return float(np.sqrt(self._s2u)) if np.isfinite(self._s2u) else float("nan")

    @property
    def sigma_obs(self) -> float:
        return float(np.sqrt(self._s2e)) if np.isfinite(self._s2e) else float("nan")

    @property
    def icc(self) -> float:
        tot = self._s2u + self._s2e
        return float(intraclass_correlation(self._s2u, self._s2e)) \
            if np.isfinite(tot) and tot > 0 else float("nan")

    def variance_partition(self) -> PartitionResult:
        """Unit SD, occasion SD, ICC and the GLS quasi-demeaning share per panel length,
        as a :class:`~bayespanel.data.resultshape.PartitionResult` (the type a posterior's
        ``variance_partition()`` returns) holding this fit's estimates.

        Its ``table()`` is indexed by quantity (``"unit SD"``, ``"occasion SD"``,
        ``"ICC"``, then ``"theta (T=...)"`` for each distinct panel length of a
        random-intercept fit; fixed effects: the occasion SD and the share of outcome
        variance in the unit intercepts) with columns ``estimate`` and ``units`` (the
        number of units with that panel length, for the theta rows). The Rights-Sterba
        shares of a reference fit sit beside a posterior's, in
        ``post.variance_partition(reference=fit)``.
        """
        values = {"unit SD": self.sigma_unit, "occasion SD": self.sigma_obs, "ICC": self.icc}
        if self.estimator == "within":
            values = {"occasion SD": self.sigma_obs,
                      "share of outcome variance in unit intercepts":
                          self.unit_intercept_share}
        units = {}
        if self.theta_by_length is not None:
            for T, th, c in zip(self.lengths, self.theta_by_length, self.group_count):
                values[f"theta (T={int(T)})"] = float(th)
                units[f"theta (T={int(T)})"] = float(c)
        return PartitionResult.from_estimates(values, self.estimator, units)

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
            from ..core.errors import SpecificationError
            raise SpecificationError("this result has no design (it came from fit_arrays); "
                                     "call fit_arrays on the subset of rows instead")
        fit_design = self._refit["fit"]  # the estimator that made this result

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
        head = (kinds.reference(self.estimator).title
                if self.estimator in kinds.reference_names() else self.estimator)
        if self.method:
            head += f", variance components by {self.method}"
        lines = [head, f"covariance: {_COV_TITLES.get(self.cov_type, self.cov_type)}",
                 f"rows: {self.n_obs}, units: {self.n_units}"]
        if self.dropped:
            lines.append("not estimated: " + "; ".join(f"{k} ({v})" for k, v in
                                                       self.dropped.items()))
        lines.append(f"tests and intervals: {self.test_distribution}")
        lines.append(self.table().to_string(float_format=lambda v: f"{v:.4g}"))
        notes = self.notes()
        if notes:
            lines.append("notes: " + " ".join(notes))
        return "\n".join(lines)

    def notes(self) -> list:
        """Plain sentences on the variance parts of this fit (for tables and summaries)."""
        if self.estimator == "within":
            sh = self.unit_intercept_share
            return [f"The estimated unit intercepts account for {100 * sh:.0f}% of the "
                    f"outcome's variance; the occasion-level residual SD is "
                    f"{self.sigma_obs:.4g}."] if np.isfinite(sh) else []
        if self.estimator in ("random", "mundlak", "within_between"):
            out = [f"Unit SD {self.sigma_unit:.4g} and occasion SD {self.sigma_obs:.4g} "
                   f"(ICC {self.icc:.3g})."]
            if self.unit_variance_at_zero:
                out.append(self.boundary_note())
            return out
        return []

    def boundary_note(self) -> str:
        """What a unit variance estimated at zero means, in plain words ("" otherwise)."""
        if not self.unit_variance_at_zero:
            return ""
        how = {"swamy-arora": "the Swamy-Arora estimate came out negative and was set to "
                              "zero",
               "ml": "the likelihood is highest at zero",
               "reml": "the restricted likelihood is highest at zero"}.get(self.method,
                                                                           "it is zero")
        return (f"The unit variance is estimated at zero ({how}): the unit means of the "
                "residuals vary no more than occasion noise alone would make them vary. The "
                "fit then treats the units as alike, so its coefficients equal pooled least "
                "squares, and the ICC is 0. This does not show that units do not differ: "
                "with few units a real unit variance is often estimated at zero. The "
                "Bayesian models' posterior of the unit SD shows which values the data allow.")

    def __repr__(self) -> str:
        return (f"<ReferenceResult {self.estimator}"
                + (f" ({self.method})" if self.method else "")
                + f", cov={self.cov_type}, {len(self.labels)} terms, {self.n_obs} rows, "
                  f"{self.n_units} units>")

    def __str__(self) -> str:
        return self.summary()
