"""One replicate of the design check: simulate, refit by each method, record intervals."""

from __future__ import annotations

import numpy as np
from scipy import stats as _st

from ...core import ar1
from ...core import suffstats as _ss
from ...core.errors import EstimationError
from .fits import BAYES, ORACLE, REFERENCE, _fit_reference, _oracle, _oracle_ar1
from .simulate import simulate_outcome


class _Skip(Exception):
    """Internal: the reference fit was not asked for."""


def _interval_rows(method, names, truth, est, lo, hi, r):
    """Long records ``(replicate, method, parameter, truth, estimate, prob, lower, upper)``."""
    rows = []
    for prob in lo:
        for j, name in enumerate(names):
            rows.append((r, method, name, truth[j], est[j], prob, lo[prob][j], hi[prob][j]))
    return rows


def _one(r, seq, ctx):
    M, codes, b, su, so = ctx["M"], ctx["codes"], ctx["b"], ctx["su"], ctx["so"]
    rho = ctx.get("rho")
    rng = np.random.default_rng(seq)
    y = simulate_outcome(M, codes, b, su, so, rng, rho, ctx.get("timeline"))
    stats = _ss.compute(M, y, codes)
    names, tvals = ctx["names"], ctx["tvals"]
    C = ctx["C"]  # (k + contrasts) x k map from coefficients to reported linear combinations
    probs = ctx["probs"]
    rec, extra = [], {"replicate": r}
    z = {p: _st.norm.ppf(0.5 + p / 2) for p in probs}
    # reference fit on the same rows
    try:
        if not ctx["reference"]:
            raise _Skip
        ref = _fit_reference(ctx["model"], M, y, codes, ctx["method"])
        bb = np.full(len(b), np.nan)
        V = np.full((len(b), len(b)), np.nan)
        idx = [ctx["labels"].index(t) for t in ref.coef.index]
        bb[idx] = ref.coef.to_numpy()
        V[np.ix_(idx, idx)] = ref.vcov.to_numpy()
        df = np.full(len(b), np.inf)
        df[idx] = ref.df_resid.to_numpy()
        est = C @ bb
        se = np.sqrt(np.einsum("ij,jk,ik->i", C, V, C))
        dfc = np.full(len(est), np.nan)
        for i in range(len(est)):
            used = np.flatnonzero(C[i])
            dfc[i] = np.min(df[used])
        lo, hi = {}, {}
        for p in probs:
            q = np.where(np.isfinite(dfc), _st.t.ppf(0.5 + p / 2, np.where(np.isfinite(dfc), dfc, 1)),
                         z[p])
            lo[p], hi[p] = est - q * se, est + q * se
        rec += _interval_rows(REFERENCE, names, tvals, est, lo, hi, r)
        extra["reference_sigma_unit"] = float(ref.sigma_unit)
        extra["reference_sigma_obs"] = float(ref.sigma_obs)
    except _Skip:
        pass
    except EstimationError as exc:
        extra["reference_error"] = str(exc)
    # GLS with the true variances (exact)
    if ctx["oracle"]:
        if rho is None:
            bo, Vo = _oracle(stats, su, so)
        else:
            bo, Vo = _oracle_ar1(ctx["model"], ar1.compute(M, y, codes, ctx["time"]), su, so,
                                 rho)
        est = C @ bo
        se = np.sqrt(np.einsum("ij,jk,ik->i", C, Vo, C))
        lo = {p: est - z[p] * se for p in probs}
        hi = {p: est + z[p] * se for p in probs}
        rec += _interval_rows(ORACLE, names, tvals, est, lo, hi, r)
    # Bayesian refit on swapped statistics
    if ctx["sampler"] is not None:
        try:
            out = ctx["sampler"].run(stats, (M, y, codes), ctx["seeds"][r])
        except Exception as exc:  # reported in the result, never hidden
            extra["bayes_error"] = f"{type(exc).__name__}: {exc}"
        else:
            draws = out["coef"] @ C.T
            cols = [draws]
            snames, struth = [], []
            for comp, tv in (("sigma_unit", su), ("sigma_obs", so), ("rho", rho)):
                if comp in out:
                    cols.append(out[comp][:, None])
                    snames.append(comp)
                    struth.append(tv)
            D = np.column_stack(cols)
            lo = {p: np.quantile(D, 0.5 - p / 2, axis=0) for p in probs}
            hi = {p: np.quantile(D, 0.5 + p / 2, axis=0) for p in probs}
            rec += _interval_rows(BAYES, names + snames, list(tvals) + struth, D.mean(axis=0),
                                  lo, hi, r)
            extra["divergences"] = out["divergences"]
            extra["rhat_max"] = out["rhat"]
    return rec, extra
