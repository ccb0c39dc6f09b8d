"""Specification tests: classical Hausman and the cluster-robust Mundlak Wald test.

References
----------
.. [1] Hausman, J. A. (1978). Specification tests in econometrics. Econometrica 46(6),
   1251-1271. https://doi.org/10.2307/1913827
.. [2] Wooldridge, J. M. (2010). Econometric Analysis of Cross Section and Panel Data,
   2nd ed. MIT Press, section 10.7.3.
.. [3] Mundlak, Y. (1978). On the pooling of time series and cross section data.
   Econometrica 46(1), 69-85. https://doi.org/10.2307/1913646
"""

from __future__ import annotations

import warnings
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy import stats

from ..core.errors import SpecificationError, choices_error
from ..core.terms import UNIT_MEAN, parse
from ._results import ReferenceResult
from .estimators import _PKG_DIR

__all__ = ["SpecificationTest", "hausman", "mundlak_test"]


@dataclass
class SpecificationTest:
    """Result of a specification test (also readable as a dict: ``test["p_value"]``).

    ``statistic`` is chi-squared with ``df`` degrees of freedom under the null;
    ``f_statistic = statistic / df`` with ``(df, f_df_denom)`` degrees of freedom is given
    for cluster-robust Wald tests (``f_df_denom = G - 1``). ``message`` says what the
    outcome means and anything unusual met on the way.
    """

    name: str
    null: str
    statistic: float
    df: int
    p_value: float
    terms: list = field(default_factory=list)
    message: str = ""
    f_statistic: float = float("nan")
    f_df_denom: float = float("nan")
    f_p_value: float = float("nan")
    cov_type: str = "classical"

    def __getitem__(self, key):
        return getattr(self, key)

    def to_dict(self) -> dict:
        return asdict(self)

    def __str__(self) -> str:
        s = (f"{self.name}: statistic {self.statistic:.4g} on {self.df} df, "
             f"p = {self.p_value:.4g} (H0: {self.null})")
        if np.isfinite(self.f_statistic):
            s += (f"; F = {self.f_statistic:.4g} on ({self.df}, {self.f_df_denom:.0f}) df, "
                  f"p = {self.f_p_value:.4g}")
        return s + (f"\n{self.message}" if self.message else "")


def _wald(b, V, tol=1e-10):
    """``b' V^- b`` with the generalised inverse on the positive eigen-part of V."""
    lam, vec = np.linalg.eigh((V + V.T) / 2)
    top = max(np.max(np.abs(lam)), np.finfo(float).tiny)
    pos = lam > tol * top
    z = vec.T @ b
    stat = float(np.sum(z[pos] ** 2 / lam[pos]))
    return stat, int(pos.sum()), lam


def hausman(first, second=None, formula=None, *, occasion_effects=False, terms=None
            ) -> SpecificationTest:
    """Classical Hausman test of fixed against random effects.

    Parameters
    ----------
    first, second : ReferenceResult
        A ``within`` fit and a ``random`` fit (either order), both with classical
        covariance. Alternatively pass a Panel (or Design) as ``first`` and a formula as
        ``second`` (or ``formula``): both are then fitted here (Swamy-Arora random
        effects).
    terms : list of str, optional
        Coefficients to compare; default all that both fits estimate (the intercept
        excluded).

    Returns
    -------
    SpecificationTest
        ``statistic = d' (V_fe - V_re)^{-1} d`` with ``d = b_fe - b_re``, chi-squared with
        as many degrees of freedom as compared terms under the null that the unit
        effects are uncorrelated with the covariates. When ``V_fe - V_re`` is not positive
        definite the statistic uses a generalised inverse on its positive part, ``df`` is
        the number of positive eigenvalues, and ``message`` says so.

    Notes
    -----
    The test assumes the random-effects estimator is efficient under the null
    (homoskedastic, serially uncorrelated errors). Without that, or with cluster-robust
    covariances, use :func:`mundlak_test` (Wooldridge 2010, 10.7.3).
    """
    if not isinstance(first, ReferenceResult):
        from .estimators import random, within

        formula = second if isinstance(second, str) else formula
        fe = within(first, formula, occasion_effects=occasion_effects)
        re = random(first, formula, occasion_effects=occasion_effects)
    else:
        if not isinstance(second, ReferenceResult):
            raise SpecificationError("hausman needs two fits (within and random), or a "
                                     "panel and a formula")
        pair = {first.estimator: first, second.estimator: second}
        if set(pair) != {"within", "random"}:
            raise SpecificationError(
                f"hausman compares a 'within' and a 'random' fit; got "
                f"{first.estimator!r} and {second.estimator!r}")
        fe, re = pair["within"], pair["random"]
    notes = []
    if fe.cov_type != "classical" or re.cov_type != "classical":
        warnings.warn("the classical Hausman test needs classical covariances; with "
                      "cluster-robust ones use mundlak_test", UserWarning,
                      skip_file_prefixes=(_PKG_DIR,))
        notes.append("Covariances are not classical: the statistic is not the classical "
                     "Hausman test; the cluster-robust Mundlak test is the robust "
                     "alternative.")
    common = [t for t in fe.labels if t in re.labels and t != "Intercept"]
    if terms is not None:
        bad = [t for t in terms if t not in common]
        if bad:
            raise SpecificationError(f"terms {bad!r} are not estimated by both fits; "
                                     f"choose from {common!r}")
        common = list(terms)
    if not common:
        raise SpecificationError("the two fits share no coefficient to compare")
    d = fe.coef[common].to_numpy() - re.coef[common].to_numpy()
    V = fe.vcov.loc[common, common].to_numpy() - re.vcov.loc[common, common].to_numpy()
    stat, rank, lam = _wald(d, V)
    q = len(common)
    if rank < q:
        notes.append(
            f"The difference of the covariance matrices is not positive definite "
            f"(eigenvalues {np.array2string(lam, precision=3)}); the statistic uses a "
            f"generalised inverse on its positive part, with {rank} degree(s) of freedom "
            f"instead of {q}. This happens in small samples or when the random-effects "
            "assumptions fail; the cluster-robust Mundlak test does not have this problem.")
    p = float(stats.chi2.sf(stat, rank)) if rank > 0 else float("nan")
    verdict = ("Random effects look inconsistent at the 5% level: prefer fixed effects or "
               "a Mundlak / within-between model." if p < 0.05 else
               "No evidence at the 5% level against the random-effects assumption.")
    return SpecificationTest(
        name="Hausman test (fixed vs random effects)",
        null="unit effects are uncorrelated with the covariates",
        statistic=stat, df=rank, p_value=p, terms=common,
        message=" ".join(notes + [verdict]), cov_type="classical")


def mundlak_test(data, formula=None, *, cov="cluster", fit="random", method="swamy-arora",
                 occasion_effects=False) -> SpecificationTest:
    """Wald test that the coefficients of the unit means are zero (Wooldridge 2010, 10.7.3).

    The correlated-random-effects (Mundlak) model adds the unit means of the time-varying
    covariates; the random-effects assumption holds only if their coefficients are zero.
    With a cluster-robust covariance this is a fully robust version of the Hausman test.

    Parameters
    ----------
    data : Panel, Design or ReferenceResult
        A fitted ``mundlak`` result is used as it is.
    cov : {"cluster", "cr2", "classical"}
        Covariance of the Wald statistic (default CR1 by unit).
    fit : {"random", "pooled"}
        Estimate the Mundlak equation by random-intercept GLS or pooled least squares;
        Wooldridge shows both give the same unit-mean coefficients in balanced panels.
    method : str
        Variance components of the random-intercept fit.

    Returns
    -------
    SpecificationTest
        chi-squared statistic with ``q`` (number of unit-mean terms) degrees of freedom,
        and ``F = W / q`` on ``(q, G - 1)`` degrees of freedom for cluster-robust
        covariances.
    """
    if fit not in ("random", "pooled"):
        raise choices_error("fit", fit, ("random", "pooled"))
    if isinstance(data, ReferenceResult):
        res = data
    else:
        from .estimators import _design_of, fit_arrays

        design = _design_of(data, formula, occasion_effects)
        if fit == "random":
            from .estimators import fit_design

            res = fit_design(design, "mundlak", method=method, cov=cov)
        else:
            M, labels = design.matrices("mundlak")
            res = fit_arrays("pooled", M, design.y, design.unit_codes, labels, cov=cov,
                             outcome=design.outcome, units=design.units)
            res.design = design
    terms = [t for t in res.labels if parse(t).part == UNIT_MEAN]
    if not terms:
        raise SpecificationError("the fit has no unit-mean terms to test")
    b = res.coef[terms].to_numpy()
    V = res.vcov.loc[terms, terms].to_numpy()
    stat, rank, _ = _wald(b, V)
    q = len(terms)
    p = float(stats.chi2.sf(stat, rank))
    G = res.extra.get("n_clusters", res.n_units)
    f_stat = f_p = float("nan")
    f_den = float("nan")
    if res.cov_type != "classical":
        f_den = float(G - 1)
        f_stat = stat / rank
        f_p = float(stats.f.sf(f_stat, rank, f_den))
    notes = []
    if rank < q:
        notes.append(f"The covariance of the unit-mean terms has rank {rank} < {q}; a "
                     "generalised inverse was used.")
    if res.cov_type == "cr2":
        notes.append("With CR2 the statistic uses the CR2 covariance with chi-squared and "
                     "F(q, G-1) references (not the Hotelling-type small-sample test).")
    p_used = f_p if np.isfinite(f_p) else p
    verdict = ("The unit means matter at the 5% level: the random-effects assumption "
               "fails; report the within or Mundlak estimates." if p_used < 0.05 else
               "No evidence at the 5% level that the unit means matter: random effects "
               "are compatible with the data.")
    return SpecificationTest(
        name="Mundlak test (unit means)", null="the unit-mean coefficients are zero",
        statistic=stat, df=rank, p_value=p, terms=terms, message=" ".join(notes + [verdict]),
        f_statistic=f_stat, f_df_denom=f_den, f_p_value=f_p, cov_type=res.cov_type)
