"""The frequentist side of a run: the reference fits, the Hausman and Mundlak
specification tests, the serial-correlation test and the narrow-interval check of the
posteriors against the reference fits' cluster-robust standard errors."""

from __future__ import annotations

import warnings

import numpy as np

from .. import kinds
from ..core.errors import BayespanelError, EstimationError
from ..core.jsonsafe import json_record
from .modelkit import tests_skip_reason
from .progress import isolated

__all__ = ["reference_stage", "tests_stage", "time_axis_reason", "serial_test",
           "interval_check_stage", "SERIAL_TITLE"]


def reference_stage(settings, design, say, failed):
    fits, out = {}, []
    for name in settings.reference:
        with isolated(failed, say, name, kinds.reference(name).title, "reference fit",
                       refuse=BayespanelError):
            res, entry = _reference_one(name, settings, design)
            fits[name] = res
            out.append(entry)
    say(f"reference fits ({settings.cov} covariance): {', '.join(fits) or 'none'}")
    return fits, out


def _reference_one(name, settings, design):
    from .. import reference as ref

    components = kinds.reference(name).variance_components
    kw = {"method": settings.re_method} if components else {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = ref.fit_design(design, name, cov=settings.cov, **kw)
    return res, {"name": name, "title": kinds.reference(name).title,
                 "assumptions": (_assumptions(res, settings.cov)
                                 or kinds.reference(name).assumptions),
                 **res.to_record(settings.interval)}


def _assumptions(res, cov) -> str:
    """The reference fit's assumptions, without the sentence on a covariance not used."""
    keep = [a for a in res.assumptions
            if not (cov != "classical" and a.startswith("Classical errors"))]
    return " ".join(keep)


_TESTS = (("hausman", "Hausman (classical), fixed vs random effects"),
          ("mundlak", "Mundlak unit-mean terms (cluster-robust Wald)"))


def tests_stage(design, say):
    """Classical Hausman and cluster-robust Mundlak tests, each when it applies; a test
    that does not apply is recorded with the reason (``skipped``)."""
    from .. import reference as ref

    why = tests_skip_reason(design)
    if why is not None:
        say(f"specification tests skipped: {why}")
        return [{"name": key, "title": title, "statistic": None, "df": None, "p_value": None,
                 "null": None, "conclusion": f"not run: {why}", "message": None,
                 "skipped": why} for key, title in _TESTS]
    tests = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fe = ref.fit_design(design, "within", cov="classical")
        re_ = ref.fit_design(design, "random", cov="classical", method="swamy-arora")
        found = (ref.hausman(fe, re_), ref.mundlak_test(ref.fit_design(
            design, "mundlak", method="swamy-arora", cov="cluster")))
        for (key, title), t in zip(_TESTS, found):
            # the cluster-robust Wald test is read on F(q, G - 1), as the coefficients'
            # tests use t(G - 1); the chi-squared form stays in statistic/df/p_value
            use_f = bool(np.isfinite(t.f_p_value))
            p_used = t.f_p_value if use_f else t.p_value
            reject = np.isfinite(p_used) and p_used < 0.05
            tests.append(json_record({
                "name": key, "title": title, "statistic": t.statistic, "df": t.df,
                "p_value": t.p_value, "null": t.null,
                "distribution": (f"F({t.df}, {t.f_df_denom:.0f})" if use_f
                                 else f"chi-squared({t.df})"),
                "reported_statistic": t.f_statistic if use_f else t.statistic,
                "reported_p_value": p_used,
                "conclusion": ("within and between effects differ (p < 0.05): the random-"
                               "intercept assumption is doubtful" if reject else
                               "no evidence at the 5% level that within and between "
                               "effects differ") + _rank_note(t),
                "message": t.message}))
    say("specification tests: Hausman, Mundlak")
    return tests


def _rank_note(t) -> str:
    """Said beside a test's reading when its df is below the number of terms compared (the
    Hausman covariance difference is often not positive definite; Hausman 1978)."""
    q = len(t.terms or [])
    if not q or t.df >= q:
        return ""
    return (f" (on {t.df} of {q} df: the difference of the covariance matrices is not "
            "positive definite, so its generalised inverse was used)")


def time_axis_reason(settings, design) -> str | None:
    """Why the time column cannot order a unit's occasions on a numeric scale (the
    serial-correlation test and the lag-one check then do not run), or None. With AR(1)
    errors the same fault is bad input, refused here before anything is sampled."""
    from ..core.ar1 import occasion_times
    from ..core.errors import PanelDataError

    try:
        occasion_times(design.time, design.spec.time)
    except PanelDataError as exc:
        if settings.errors == "ar1":
            raise
        return str(exc)
    return None


#: title of the serial-correlation test among the run's tests
SERIAL_TITLE = "Serial correlation of the errors (first differences, cluster-robust)"


def serial_test(design, time_reason, say, errors="iid") -> dict:
    """The serial-correlation test of Wooldridge (2002, 10.5.4) as a ``tests`` record,
    its reading in plain words; a test that cannot run is recorded with the reason."""
    from ..reference.serial import serial_correlation_arrays

    def skipped(why):
        say(f"serial-correlation test skipped: {why}")
        return {"name": "serial_correlation", "title": SERIAL_TITLE, "statistic": None,
                "df": None, "p_value": None, "null": None, "conclusion": f"not run: {why}",
                "message": None, "skipped": why}

    if time_reason is not None:
        return skipped(time_reason)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = serial_correlation_arrays(design.X, design.y, design.unit_codes, design.time,
                                          labels=design.terms, column=design.spec.time)
    except EstimationError as exc:
        return skipped(str(exc).removeprefix("serial-correlation test: "))
    reject = np.isfinite(t.f_p_value) and t.f_p_value < 0.05
    remedy = ("the Bayesian models here allow AR(1) errors for it" if errors == "ar1" else
              "refit with AR(1) errors (--errors ar1)")
    if not reject:
        reading = ("no evidence at the 5% level that a unit's errors are correlated over "
                   f"time (coefficient {t.coef:.3g}; -0.5 means uncorrelated)")
    elif t.coef > -0.5:
        reading = ("a unit's errors are positively correlated over time (p < 0.05; "
                   f"coefficient {t.coef:.3g}, where -0.5 means uncorrelated): intervals of "
                   f"models that assume independent occasions are too narrow; {remedy}")
    else:
        reading = ("a unit's errors are negatively correlated over time (p < 0.05; "
                   f"coefficient {t.coef:.3g}, where -0.5 means uncorrelated): models that "
                   f"assume independent occasions misstate their intervals; {remedy}")
    say("serial-correlation test: first-differenced residuals on their lag")
    return json_record({
        "name": "serial_correlation", "title": SERIAL_TITLE, "statistic": t.statistic,
        "df": t.df, "p_value": t.p_value, "null": t.null,
        "distribution": f"F(1, {t.f_df_denom:.0f})", "reported_statistic": t.f_statistic,
        "reported_p_value": t.f_p_value, "conclusion": reading, "message": t.message})


def interval_check_stage(settings, design, posts, ref_fits, tests, say):
    """Posterior SDs against the matching reference fits' cluster-robust SEs
    (:func:`bayespanel.analysis.narrowcheck.narrow_interval_check`); a reference fit the run did
    not make, or made with classical errors, is fitted here with CR1 by unit."""
    from .. import reference as ref
    from ..analysis.narrowcheck import narrow_interval_check, serial_reading

    cov = settings.cov if settings.cov in ("cluster", "cr2") else "cluster"
    fits = []
    for name, post in posts.items():
        rname = kinds.model(name).reference
        res = ref_fits.get(rname) if settings.cov == cov else None
        if res is None:
            kw = {"method": settings.re_method} if kinds.reference(rname).variance_components \
                else {}
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    res = ref.fit_design(design, rname, cov=cov, **kw)
            except BayespanelError:
                continue
        fits.append({"model": name, "title": kinds.model(name).title, "reference": rname,
                     "reference_title": kinds.reference(rname).title, "sd": post.error,
                     "se": res.error})
    out = narrow_interval_check(fits, errors=settings.errors, n_units=design.n_units, cov=cov,
                                serial=serial_reading(tests))
    flagged = sum(r["narrow"] for r in out["rows"])
    say(f"narrow-interval check: {flagged} of {len(out['rows'])} posterior SDs below "
        f"{out['threshold']:g} x the cluster-robust SE")
    return out
