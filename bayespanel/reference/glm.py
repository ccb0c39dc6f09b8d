"""Pooled generalised linear models with cluster-robust errors: the reference fits of the
binary, binomial and count outcomes.

For a logit or log link there is no closed-form random-intercept fit; the frequentist fit
that matches the Bayesian latent-effect models' questions is the *population-averaged*
GLM on the same columns (``Design.matrices(kind)``: pooled, Mundlak or within-between),
estimated by maximum likelihood (Newton's method, the canonical link's Fisher scoring)
with the sandwich covariance clustered by unit, so the rows of one unit may be
correlated in any way (Liang and Zeger 1986; the estimating equations are those of GEE
with an independence working correlation). Count families (Poisson and negative
binomial) get the Poisson quasi-likelihood fit, consistent for the mean under any
dispersion once the errors are clustered (Gourieroux, Monfort and Trognon 1984).

What the coefficients estimate: for the log link the slopes of the population-averaged
and the unit-specific (random-intercept) model are the same quantities when the unit
effects are normal and independent of the covariates (the marginal mean is
``exp(x'b + sigma_unit^2/2)``), and the intercepts differ by ``sigma_unit^2/2``. For the
logit link they are not: population-averaged log-odds ratios are smaller in magnitude,
by roughly ``1/sqrt(1 + 0.346 sigma_unit^2)`` (Zeger, Liang and Albert 1988, eq. 2.4).
The average marginal effects on the outcome scale answer the same question in both
(``d E[y] / d x`` averaged over the rows and the unit effects), which is why the report
sets them side by side.

Average marginal effects: ``AME_e = (w_e'b) mean_i g'(eta_i)`` with ``g'`` the derivative
of the mean (successes for the binomial, counts at the row's exposure), and their standard
errors by the delta method on the fit's covariance.

References
----------
.. [1] Liang, K.-Y. and Zeger, S. L. (1986). Longitudinal data analysis using generalized
   linear models. Biometrika 73, 13-22. doi:10.1093/biomet/73.1.13
.. [2] Zeger, S. L., Liang, K.-Y. and Albert, P. S. (1988). Models for longitudinal data:
   a generalized estimating equation approach. Biometrics 44, 1049-1060.
   doi:10.2307/2531734
.. [3] Gourieroux, C., Monfort, A. and Trognon, A. (1984). Pseudo maximum likelihood
   methods: applications to Poisson models. Econometrica 52, 701-720.
   doi:10.2307/1911491
.. [4] Cameron, A. C. and Miller, D. L. (2015). A practitioner's guide to cluster-robust
   inference. J. Human Resources 50, 317-372 (the CR1 small-sample factor).
   doi:10.3368/jhr.50.2.317
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import special, stats

from .. import kinds
from ..core.errors import EstimationError, SpecificationError, choices_error
from ..core.jsonsafe import jsonable
from ..core.linalg import group_scores
from ..data.resultshape import check_prob, term_records
from .covariance import cr1

__all__ = ["GLMResult", "fit_glm", "glm_design", "GLM_COVS", "glm_family"]

GLM_COVS = ("cluster", "classical")


def glm_family(family: str) -> str:
    """The GLM fitted for an outcome family: ``"logit"`` (Bernoulli, binomial) or
    ``"poisson"`` (Poisson, negative binomial: Poisson quasi-likelihood)."""
    if family in ("bernoulli", "binomial"):
        return "logit"
    if family in ("poisson", "negative_binomial"):
        return "poisson"
    raise SpecificationError(f"family={family!r} has no reference GLM; the linear reference "
                             "fits apply to the identity-link families")


@dataclass
class GLMResult:
    """A pooled GLM fit: coefficients, covariance, tests and average marginal effects."""

    estimator: str            # reference name: pooled, mundlak, within_between
    kind: str                 # design kind
    link: str                 # "logit" or "log"
    family: str               # outcome family the fit stands beside
    labels: list
    coef: pd.Series
    vcov: pd.DataFrame
    cov_type: str
    n_obs: int
    n_units: int
    iterations: int
    loglik: float
    dropped: dict = field(default_factory=dict)
    _eta: np.ndarray | None = field(default=None, repr=False)
    _M: np.ndarray | None = field(default=None, repr=False)
    _trials: np.ndarray | None = field(default=None, repr=False)

    @property
    def se(self) -> pd.Series:
        return pd.Series(np.sqrt(np.clip(np.diag(self.vcov.to_numpy()), 0, None)),
                         index=self.coef.index)

    @property
    def df(self) -> float:
        """Reference distribution of the tests: t(G - 1) for a cluster covariance, the
        normal otherwise (``inf``)."""
        return float(self.n_units - 1) if self.cov_type == "cluster" else float("inf")

    @property
    def distribution(self) -> str:
        return (f"t with G - 1 = {self.n_units - 1} degrees of freedom"
                if self.cov_type == "cluster" else "the normal distribution")

    def _crit(self, prob):
        q = 1 - (1 - prob) / 2
        return stats.t.ppf(q, self.df) if np.isfinite(self.df) else stats.norm.ppf(q)

    def _p(self, z):
        z = np.abs(np.asarray(z, dtype=float))
        return 2 * (stats.t.sf(z, self.df) if np.isfinite(self.df) else stats.norm.sf(z))

    #: name of the error column of :meth:`table` (:mod:`bayespanel.data.resultshape`)
    error_name = "se"

    @property
    def error(self) -> pd.Series:
        return self.se.rename("se")

    @property
    def icc(self) -> float:
        """``nan``: a pooled GLM has no unit variance (population-averaged)."""
        return float("nan")

    def interval(self, prob: float | None = None) -> pd.DataFrame:
        """Confidence intervals of the coefficients (columns ``lower``, ``upper``)."""
        prob = check_prob(prob)  # None: the interval option
        t = self.table(prob)
        return t[["lower", "upper"]].rename_axis(None)

    def table(self, prob: float | None = None) -> pd.DataFrame:
        """Estimates, standard errors and intervals (the leading columns every fit's
        table shares), then the statistic, reference df and p-values."""
        prob = check_prob(prob)  # None: the interval option
        se = self.se.to_numpy()
        b = self.coef.to_numpy()
        c = self._crit(check_prob(prob))
        with np.errstate(divide="ignore", invalid="ignore"):
            z = b / se
        out = pd.DataFrame({"estimate": b, "se": se, "lower": b - c * se, "upper": b + c * se,
                            "t": z, "df": self.df, "p": self._p(z)},
                           index=pd.Index(self.labels, name="term"))
        out.attrs.update(prob=prob, error="se")
        return out

    def to_record(self, prob: float | None = None) -> dict:
        """This fit's entry of ``results.json`` (``reference[]``, without the run's name,
        title, assumptions and family texts): covariance, one record per term of
        :meth:`table`, no variance components (population-averaged), rows, units and the
        terms not estimated. Non-finite numbers are ``None``."""
        prob = check_prob(prob)  # None: the interval option
        tab = self.table(prob)
        return jsonable({
            "cov": self.cov_type,
            "coefficients": term_records(
                tab, ("estimate", "se", "df", "p", "lower", "upper")),
            "sigma_unit": None, "sigma_obs": None, "icc": None,
            "n_obs": self.n_obs, "n_units": self.n_units,
            "not_estimated": {str(k): str(v) for k, v in self.dropped.items()}})

    def average_marginal_effects(self, names, weights,
                                 prob: float | None = None) -> pd.DataFrame:
        """``d E[y] / d x`` averaged over the rows, with delta-method standard errors.

        ``names``/``weights`` as :func:`bayespanel.bayes.families.effect_weights`
        (each effect a combination of coefficients, e.g. ``b_x + b_{x (unit mean)}``).
        """
        prob = check_prob(prob)  # None: the interval option
        W = np.asarray(weights, dtype=float).reshape(len(names), -1)
        b = self.coef.to_numpy()
        d1, d2 = _mean_derivatives(self.link, self._eta, self._trials)
        m = d1.mean()
        dm = (d2[:, None] * self._M).mean(axis=0)
        slope = W @ b
        est = slope * m
        G = W * m + slope[:, None] * dm[None, :]
        V = self.vcov.to_numpy()
        se = np.sqrt(np.clip(np.einsum("ek,kl,el->e", G, V, G), 0, None))
        c = self._crit(prob)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = est / se
        return pd.DataFrame({"estimate": est, "se": se, "p": self._p(z), "lower": est - c * se,
                             "upper": est + c * se}, index=pd.Index(list(names), name="effect"))

    def wald(self, terms) -> dict:
        """Joint Wald test that ``terms`` are zero: ``W`` on ``q`` df and, for cluster
        covariances, ``F = W / q`` on ``(q, G - 1)`` df."""
        idx = [self.labels.index(t) for t in terms]
        b = self.coef.to_numpy()[idx]
        V = self.vcov.to_numpy()[np.ix_(idx, idx)]
        W = float(b @ np.linalg.solve(V, b))
        q = len(idx)
        if self.cov_type == "cluster":
            return {"statistic": W / q, "df": float(q), "df2": float(self.n_units - 1),
                    "p_value": float(stats.f.sf(W / q, q, self.n_units - 1)), "kind": "F"}
        return {"statistic": W, "df": float(q), "df2": None,
                "p_value": float(stats.chi2.sf(W, q)), "kind": "chi2"}


def _mean_derivatives(link, eta, trials):
    """First and second derivatives of the mean with respect to ``eta`` per row."""
    if link == "logit":
        p = special.expit(eta)
        n = 1.0 if trials is None else trials
        d1 = n * p * (1 - p)
        return d1, d1 * (1 - 2 * p)
    mu = np.exp(eta)
    return mu, mu


def glm_design(design, kind):
    """The GLM's columns and labels: ``Design.matrices(kind)`` without columns that are
    constant (other than the intercept) or linearly dependent on earlier ones (e.g. the
    between parts of occasion indicators in a balanced panel). Returns ``(M, labels,
    dropped)``, ``dropped`` mapping each left-out label to the reason."""
    M, labels = design.matrices(kind)
    M = np.asarray(M, dtype=float)
    labels = list(labels)
    keep, dropped = [], {}
    for j, lab in enumerate(labels):
        col = M[:, j]
        if lab != "Intercept" and np.ptp(col) <= 1e-12 * max(1.0, np.abs(col).max()):
            dropped[lab] = "constant on the estimation rows"
            continue
        trial = keep + [j]
        A = M[:, trial]
        A = A / np.maximum(np.sqrt((A ** 2).mean(axis=0)), 1e-300)
        s = np.linalg.svd(A, compute_uv=False)
        if s[-1] <= 1e-9 * s[0]:
            dropped[lab] = "a linear combination of the other columns"
            continue
        keep.append(j)
    return M[:, keep], [labels[j] for j in keep], dropped


def fit_glm(design, name, family, *, trials=None, log_exposure=None, cov="cluster",
            max_iter=100, tol=1e-10) -> GLMResult:
    """Fit the pooled GLM of ``family`` on the columns of reference ``name``.

    Parameters
    ----------
    design : Design
    name : {"pooled", "mundlak", "within_between"}
        Which columns (as the linear reference fits of the same name).
    family : str
        The outcome family of the Bayesian models: Bernoulli and binomial get the logit
        GLM, Poisson and negative binomial the Poisson quasi-likelihood GLM.
    trials, log_exposure : arrays (n,) or None
        Binomial trials; log exposure (an offset) for counts.
    cov : {"cluster", "classical"}
        CR1 clustered by unit (``G/(G-1) (n-1)/(n-k)``, as statsmodels' default) or the
        inverse Fisher information.
    """
    if name not in kinds.glm_reference_names():
        raise choices_error("reference", name, kinds.glm_reference_names())
    if cov not in GLM_COVS:
        raise SpecificationError(
            f"cov={cov!r} is for the linear reference fits; the reference GLMs of "
            f"family={family!r} take {' or '.join(GLM_COVS)}")
    glm = glm_family(family)
    link = "logit" if glm == "logit" else "log"
    kind = name  # a reference kind's name is the Design.matrices kind of its columns
    M, labels, dropped = glm_design(design, kind)
    y = np.asarray(design.y, dtype=float)
    n, k = M.shape
    off = np.zeros(n) if log_exposure is None else np.asarray(log_exposure, dtype=float)
    nt = None if trials is None else np.asarray(trials, dtype=float)
    b, it, ll = _newton(M, y, off, nt, link, max_iter, tol, name)
    eta = M @ b + off
    d1, _ = _mean_derivatives(link, eta, nt)   # = variance function at the canonical link
    mu = (nt if nt is not None else 1.0) * special.expit(eta) if link == "logit" else np.exp(eta)
    H = (M * d1[:, None]).T @ M
    Hinv = np.linalg.inv(H)
    if cov == "cluster":
        codes = np.asarray(design.unit_codes)
        G = int(codes.max()) + 1
        V = cr1(Hinv, group_scores(M, y - mu, codes, G), n, k)
    else:
        V = Hinv
    return GLMResult(estimator=name, kind=kind, link=link, family=family, labels=labels,
                     coef=pd.Series(b, index=labels), vcov=pd.DataFrame(V, labels, labels),
                     cov_type=cov, n_obs=n, n_units=int(design.n_units), iterations=it,
                     loglik=ll, dropped=dropped, _eta=eta, _M=M, _trials=nt)


def _loglik(y, eta, nt, link):
    if link == "logit":
        n = 1.0 if nt is None else nt
        return float(np.sum(y * eta - n * np.logaddexp(0.0, eta)))
    return float(np.sum(y * eta - np.exp(eta)))


def _newton(M, y, off, nt, link, max_iter, tol, name):
    """Newton's method (= Fisher scoring at the canonical link) with step halving."""
    n, k = M.shape
    b = np.zeros(k)
    if link == "log":  # start at the overall rate so exp() stays finite
        j = next((j for j in range(k) if np.allclose(M[:, j], 1.0)), None)
        if j is not None:
            b[j] = np.log(max(y.sum(), 0.5) / np.exp(off).sum())
    eta = M @ b + off
    ll = _loglik(y, eta, nt, link)
    for it in range(1, max_iter + 1):
        d1, _ = _mean_derivatives(link, eta, nt)
        mu = (1.0 if nt is None else nt) * special.expit(eta) if link == "logit" else np.exp(eta)
        grad = M.T @ (y - mu)
        H = (M * d1[:, None]).T @ M
        try:
            step = np.linalg.solve(H, grad)
        except np.linalg.LinAlgError:
            raise EstimationError(f"reference GLM {name!r}: the information matrix is "
                                  "singular (collinear columns or separation)") from None
        t = 1.0
        for _ in range(40):
            b_new = b + t * step
            eta_new = M @ b_new + off
            ll_new = _loglik(y, eta_new, nt, link)
            if np.isfinite(ll_new) and ll_new >= ll - 1e-12 * abs(ll):
                break
            t /= 2
        b, eta, ll_old, ll = b_new, eta_new, ll, ll_new
        if np.max(np.abs(t * step)) < tol * (1 + np.max(np.abs(b))) or abs(ll - ll_old) < 1e-14 * (1 + abs(ll)):
            break
    else:
        raise EstimationError(f"reference GLM {name!r} did not converge in {max_iter} Newton "
                              "steps")
    if link == "logit" and np.max(np.abs(b)) > 30:
        raise EstimationError(
            f"reference GLM {name!r}: coefficients diverge (|b| > 30 on the log-odds scale), "
            "a sign of (quasi-)complete separation; a covariate predicts the outcome exactly")
    return b, it, ll
