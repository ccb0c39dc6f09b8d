"""``report.html``: one self-contained page built from the contents of ``results.json``.

The page is a pure function of the results dictionary (figures included), so
``bayespanel report DIR`` rebuilds exactly the file that ``bayespanel fit`` wrote.
Every string that can come from a user (column names, labels, file names, the title)
passes through :func:`esc`; markup we build ourselves is marked :class:`Safe`, so nothing
is escaped twice and nothing is forgotten. Figures are ``<img>`` elements with ``data:``
URIs, which browsers never run scripts from.
"""

from __future__ import annotations

from importlib import resources

from .. import kinds
from ..data.resultshape import LAG_ONE
from . import family_report, figures, tables
from . import numbers as num
from .markup import Safe, esc, figure, fmt, join, note, pairs, table, tag
from .problems import stored as stored_problems
from .text import CAUTION, LEVEL_TEXT, label

__all__ = ["Safe", "esc", "fmt", "render", "SECTIONS"]

SECTIONS = [
    ("overview", "At a glance"),
    ("data", "The data"),
    ("models", "The models and what they assume"),
    ("coefficients", "Coefficients side by side"),
    ("serial", "Correlation over time within units"),
    ("effects", "Effects on the outcome scale"),
    ("partition", "Variance between and within units"),
    ("contrasts", "Within versus between"),
    ("comparison", "Predictive comparison"),
    ("diagnostics", "Sampling diagnostics"),
    ("checks", "Posterior predictive checks"),
    ("caution", "Reading the results"),
    ("rerun", "Rerunning this analysis"),
]


def _interval(lo, hi, u=None) -> str:
    """``[lo, hi]`` to the decimals of the uncertainty ``u`` (plain digits without one)."""
    return num.interval(lo, hi, u) if u is not None else f"[{fmt(lo)}, {fmt(hi)}]"


#: "p-value" with a non-breaking hyphen, so a narrow heading does not break it in two
_P_VALUE = "p\u2011value"


def _est(x, u) -> Safe:
    """An estimate to the decimals of its uncertainty, as a table cell."""
    return esc(num.estimate(x, u))


def _nums(*texts) -> list:
    return [esc(t) for t in texts]


def _pct(prob) -> str:
    return f"{100 * float(prob):g}%"


# ---------------------------------------------------------------------- sections
def _overview(r) -> Safe:
    d = r["data"]
    s = d["structure"]
    # the estimation sample, which every fit uses (the table may hold more units, e.g.
    # 157 firms of which 54 have complete rows; "The data" gives both)
    facts = [
        (d["sample"]["n_units"], f"units used ({d['unit']})"),
        (s["n_occasions"], f"occasions ({d['time']})"),
        (d["sample"]["n_rows"], "rows used"),
        (len(r["models"]), "Bayesian models"),
        (len(r["reference"]), "reference fits"),
    ]
    box = tag("div", *[tag("div", tag("b", fmt(v)), tag("small", k), cls="bp-fact")
                       for v, k in facts], cls="bp-keyfacts")
    ar1 = (r["settings"].get("errors") == "ar1")
    parts = [box, tag("p", "Outcome ", tag("code", d["outcome"]), ", formula ",
                      tag("code", d["formula"]), ".", family_report.overview_text(r),
                      " The Bayesian models allow AR(1) errors within units." if ar1 else "")]
    parts += _interval_note(r)
    items = stored_problems(r)
    comp = r.get("comparison") or {}
    best = [row for row in comp.get("rows", []) if row.get("elpd_diff") == 0]
    if best:
        parts.append(_best_note(comp, best[0], items))
    parts += _problem_notes(r, items)
    zero = [f["title"] for f in r["reference"] if f.get("unit_variance_at_zero")]
    if zero:  # the variance section says what it means
        parts.append(note("info", f"{', '.join(zero)} estimate{'s' if len(zero) == 1 else ''} "
                          "the unit variance at zero; the variance section says what that "
                          "means" + (" beside the Bayesian posterior of the unit SD"
                                     if any(m.get("variance_partition") for m in r["models"])
                                     else "") + ".", "Unit variance."))
    for f in r.get("failed") or []:
        parts.append(_failed_note(f))
    for w in r.get("warnings", []):
        parts.append(note("caution", w, "Note."))
    ooc = r.get("out_of_core")
    if ooc:  # the one place the report says what the out-of-core route left out
        parts.append(note("info", join([
            f"Read in {ooc['partitions']} partitions ({ooc['rows_read']} rows, scheduler "
            f"{ooc['scheduler']}); every number here comes from one-pass statistics. "
            "Left out: ",
            join([join([tag("b", x["item"]), f" ({x['reason']})"]) for x in ooc["left_out"]],
                 "; "), "."]), "Out of core."))
    return join(parts)


def _interval_note(r) -> list:
    """The first screen's word on the width of the intervals (results.json
    ``interval_check``): a caution naming the causes and remedies when a posterior SD is
    well below the cluster-robust SE, else one line that none is."""
    check = r.get("interval_check") or {}
    if not check.get("rows"):
        return []
    more = join([" Each coefficient's ratio, the serial-correlation test and the lag-one "
                 "check are under ", tag("a", "Correlation over time within units",
                                         href="#serial"), "."])
    if check.get("message"):
        return [note("caution", join([_warning_body(r, check), more]), "Intervals.")]
    return [note("fine", join([
        f"Every posterior SD is at least {check['threshold']:g} times the cluster-robust SE "
        "of the matching reference fit, so the intervals are not narrower than the data "
        "support by that rule of thumb.", more]), "Intervals.")]


def _warning_body(r, check) -> Safe:
    """The narrow-interval warning laid out: what is too narrow, the causes and remedies
    as a list, what to bear in mind (the same words as ``interval_check.message``)."""
    from ..analysis.narrowcheck import message_parts, serial_reading

    parts = message_parts(check["rows"], threshold=check["threshold"],
                          errors=r["settings"].get("errors", "iid"),
                          n_units=r["data"]["sample"]["n_units"],
                          serial=serial_reading(r.get("tests")))
    if parts is None:  # a results file written otherwise: its message as it is
        return esc(check["message"])
    return join([parts["lead"],
                 tag("ol", *[tag("li", c) for c in parts["causes"]], cls="bp-problems"),
                 " ".join(parts["notes"])])


def _failed_note(f) -> Safe:
    """One fit or stage that failed while the run went on (results.json ``failed``)."""
    return note("problem", f"{f['stage']} of {f['title']} failed: {f['error']}. It is "
                "missing from the tables; everything else on this page is complete.",
                "Failed.")


def _best_note(comp, best, items) -> Safe:
    """The first screen's LOO sentence: the best model, the models not told apart from it,
    and, when its own LOO estimate is in doubt, that the ranking is too."""
    close = [row["title"] for row in comp["rows"] if row.get("elpd_diff") not in (None, 0)
             and row.get("se_diff") and -row["elpd_diff"] < 2 * row["se_diff"]]
    tie = f" Within two SEs of it, so not told apart: {', '.join(close)}." if close else ""
    text = f"Best predictive accuracy ({comp['level']} level): {best['title']}.{tie}"
    if best.get("equivalent_to"):
        text += (" It is a reparametrisation of "
                 + ", ".join(_title_of(comp, n) for n in best["equivalent_to"].split(", "))
                 + ", which predicts alike.")
    flagged = [p for p in items if p["kind"] == "comparison" and p["model"] == best["model"]]
    if flagged or best.get("n_high_pareto_k"):
        n = best.get("n_high_pareto_k") or 0
        text += (f" But its own LOO estimate is unreliable ({n} point{'s' if n != 1 else ''} "
                 "with high Pareto k), so this ranking is uncertain; see the problems below.")
    if comp.get("methods_note"):
        text += " Rows are scored by different methods (see the comparison section)."
    return note("caution" if flagged else "info", text, "LOO.")


def _title_of(comp, name) -> str:
    for row in comp.get("rows", []):
        if row["model"] == name:
            return row["title"]
    return name


def _problem_notes(r, items) -> list:
    """One note per kind of problem, listing them, or one note that there are none: the
    same list the console prints and results.json holds."""
    out = []
    heads = {"sampling": ("Sampling.", "the estimates of these models may be unreliable; "
                          "see the diagnostics section before relying on them"),
             "comparison": ("Comparison.", "the LOO estimates of these models are "
                            "unreliable, and so is their place in the comparison")}
    for kind, (lead, what) in heads.items():
        mine = [p for p in items if p["kind"] == kind]
        if mine:
            out.append(note("caution", join([
                f"{len(mine)} {kind} problem(s): {what}.",
                tag("ul", *[tag("li", tag("b", f"{p['title']}:"), f" {p['text']}") for p in mine],
                    cls="bp-problems")]), lead))
    if not items and r["models"]:
        out.append(note("fine", "No sampling or comparison problems: R-hat, ESS, "
                        "divergences, energy and Pareto k are within the usual thresholds.",
                        "Checks."))
    return out


def _data(r) -> Safe:
    d = r["data"]
    s = d["structure"]
    smp = d["sample"]
    src = d.get("source") or {}
    items = [("source", src.get("file") or "in-memory table"),
             ("unit / occasion", f"{d['unit']} / {d['time']}"),
             ("rows in the table", fmt(s["n_rows"])),
             ("balance", "balanced" if s["balanced"] else
              f"unbalanced: {s['occasions_min']} to {s['occasions_max']} occasions per unit "
              f"(median {fmt(s['occasions_median'], 1)})"),
             ("units with gaps", fmt(s["n_units_with_gaps"])),
             ("units seen once", fmt(s["n_singleton_units"])),
             ("estimation sample", f"{fmt(smp['n_rows'])} rows of {fmt(smp['n_units'])} units")]
    out = [pairs(items)]
    if smp.get("n_dropped"):
        det = ", ".join(f"{k}: {v}" for k, v in smp.get("dropped_by_column", {}).items())
        out.append(note("caution", f"{smp['n_dropped']} rows with missing values were left "
                        f"out of every model ({det}); unit means use the remaining rows.",
                        "Missing values."))
    rows = [[v["variable"], *_nums(num.count(v["n"]), *[num.plain(v[k], scale=v["sd_overall"])
                                                         for k in ("mean", "sd_overall",
                                                                   "sd_between", "sd_within")],
                                   num.share(v["share_within"])),
             Safe(esc("yes" if v["varies_within"] else "no"))]
            for v in d["variables"]]
    out.append(table(["variable", "n", "mean", "SD overall", "SD between", "SD within",
                      "share within", "varies within"], rows,
                     caption="Each variable's spread split into differences between units "
                             "(SD of the unit means) and changes within units.",
                     foot=tables.footer(r, icc=False)))
    return join(out)


def _prior_key(key: str) -> str:
    """A prior's key with the display label of its quantity (``unit SD (sigma_unit)``):
    the key is what --prior takes."""
    return f"{label(key)} ({key})" if label(key) != key else key


def _models(r) -> Safe:
    cards = [tag("div", tag("h3", tag("span", "Bayesian", cls="bp-tag bayes"), m["title"]),
                 tag("p", m["assumptions"]), cls="bp-card") for m in r["models"]]
    glm = any(f.get("estimator") == "glm" for f in r["reference"])
    out = [tag("p", "Bayesian models are sampled with the priors listed below; reference "
               "fits are " + ("maximum-likelihood" if glm else "closed-form") + " frequentist "
               "estimates on exactly the same rows.", cls="bp-lead")]
    if cards:
        out.append(tag("div", *cards, cls="bp-models"))
    out += [_failed_note(f) for f in r.get("failed") or []
            if f["stage"] in ("Bayesian fit", "reference fit")]
    if r["reference"]:
        rows = [[f["title"], Safe(esc(f["assumptions"])), Safe(esc(
            f["cov"] + (f", {f['method']}" if f.get("method") else ""))),
            Safe(esc(f.get("test_distribution") or num.MISSING)),
            f["n_obs"], f["n_units"]] for f in r["reference"]]
        out.append(tag("h3", "Reference fits"))
        out.append(table(["fit", "what it assumes", "covariance, variance components",
                          "tests use", "rows", "units"], rows, numeric=[4, 5]))
    pri = [[m["title"], Safe(esc("; ".join(f"{_prior_key(k)}: {v}"
                                           for k, v in m["priors"].items())))]
           for m in r["models"] if m.get("priors")]
    if pri:
        out.append(tag("h3", "Priors (on the scale of the data)"))
        out.append(table(["model", "priors"], pri, numeric=[]))
    return join(out)


def _coefficients(r) -> Safe:
    prob = r["settings"]["interval"]
    cols, terms = tables.coefficient_grid(r)
    truth = (r.get("truth") or {}).get("by_model", {})
    heads = ["term · model", "estimate", "SD / SE", f"{_pct(prob)} interval", _P_VALUE]
    if truth:
        heads.append("true value")
    body = []
    for term in terms:
        present = [c for c in cols if term in c["cells"]]
        if not present:
            continue
        body.append(Safe(tag("tr", tag("td", term, colspan=str(len(heads))), cls="bp-group")))
        for c in present:
            cell = c["cells"][term]
            kind = tag("span", "B" if c["kind"] == "bayesian" else "R",
                       cls=f"bp-tag {'bayes' if c['kind'] == 'bayesian' else 'ref'}")
            u = cell.get("sd", cell.get("se"))
            line = [Safe(kind + esc(c["title"])), _est(cell["estimate"], u),
                    esc(num.uncertainty(u)), esc(_interval(cell["lower"], cell["upper"], u)),
                    esc(num.p_value(cell.get("p_value")) if c["kind"] == "reference"
                        else "")]
            if truth:
                line.append(truth.get(c["key"], {}).get(term))
            body.append(line)
    out = [tag("p", f"Posterior means and SDs with {_pct(prob)} equal-tailed intervals "
               f"(B, Bayesian) beside estimates and standard errors with {_pct(prob)} "
               "confidence intervals and the p-value of a zero coefficient (R, reference), "
               "grouped by term. Each term is one estimand: a within part is not comparable "
               "with a pooled coefficient. Digits follow the uncertainty: two significant "
               "digits of the SD or SE, and the estimate to the same decimal place."
               + (" The simulated demo's true values are in the last column, where the "
                  "model's parametrisation has one." if truth else ""), cls="bp-lead"),
           family_report.coefficient_note(r),
           table(heads, body, foot=join([tables.distribution_text(r), " ",
                                         tables.footer(r)]))]
    out.append(figure(figures.coefficient_figure(r), "coefficient intervals by model",
                      f"Estimates and {_pct(prob)} intervals; Bayesian models in lagoon "
                      "(circles), reference fits in clay (squares)"
                      + ("; true values as black diamonds." if truth else "."),
                      "fig-coefficients"))
    return join(out)


def _partition(r) -> Safe:
    prob = r["settings"]["interval"]
    u_sd, o_sd, icc = label("sigma_unit"), label("sigma_obs"), label("icc")
    out = [family_report.partition_lead(r) or tag(
        "p", f"How much of the outcome's variance lies between units. The {icc} is "
        f"{u_sd}^2 / ({u_sd}^2 + {o_sd}^2): the share of residual variance "
        "due to stable unit differences.", cls="bp-lead")]
    any_vp = False
    for m in r["models"]:
        vp = m.get("variance_partition")
        if not vp:
            continue
        any_vp = True
        rows = [[label(q["quantity"]), _est(q["estimate"], q["sd"]), _est(q["median"], q["sd"]),
                 esc(num.uncertainty(q["sd"])), esc(_interval(q["lower"], q["upper"], q["sd"]))]
                for q in vp["summary"]]
        out.append(tag("h3", m["title"]))
        if vp.get("scale"):
            out.append(tag("p", "Scale: ", vp["scale"], ".", cls="bp-lead"))
        out.append(table(["quantity", "mean", "median", "SD", f"{_pct(prob)} interval"], rows))
        if vp.get("theta"):
            trs = [[f"T = {t['length']}", esc(num.share(t["estimate"])),
                    esc(f"[{num.share(t['lower'])}, {num.share(t['upper'])}]")]
                   for t in vp["theta"]]
            out.append(table(["panel length", label("theta"), f"{_pct(prob)} interval"],
                             trs, caption="Share of each unit's mean removed by the random-"
                             "intercept fit (0: pooled, 1: fixed effects)."))
        if vp.get("explained"):
            ers = [[e["part"], *_nums(num.share(e.get("total")), num.share(e.get("within")),
                                      num.share(e.get("between")))]
                   for e in vp["explained"]]
            out.append(table(["source", "share of total", "share within", "share between"], ers,
                             caption="Variance explained at each level (Rights and Sterba 2019), "
                                     "posterior means."))
    refs = [f for f in r["reference"] if f.get("icc") is not None
            or f.get("unit_variance_at_zero")]
    if refs:
        def zero(f, v):
            return esc("0 (at zero)" if f.get("unit_variance_at_zero") else num.plain(v))

        out.append(tag("h3", "Reference fits"))
        out.append(table(["fit", u_sd, o_sd, icc, "variance components"],
                         [[f["title"], zero(f, f.get("sigma_unit")), esc(num.plain(f.get("sigma_obs"))),
                           zero(f, f.get("icc")), esc(f.get("method") or num.MISSING)]
                          for f in refs], numeric=[1, 2, 3], foot=tables.footer(r)))
        for titles, text in tables.grouped_notes(refs, "boundary_note"):
            out.append(note("caution", text, f"{titles}:"))
    for f in r["reference"]:
        if f.get("unit_intercept_share") is not None:
            out.append(note("info", tables.intercept_share_text(f), f"{f['title']}:"))
    if not any_vp and not refs:
        out.append(note("info", "No model with a unit variance component was fitted."))
    out.append(figure(figures.icc_figure(r), "posterior of the ICC",
                      "Posterior density of the ICC per Bayesian model; dashed lines mark "
                      "the reference fits' point estimates" +
                      ("; the solid black line marks the true value." if r.get("truth") else "."),
                      "fig-icc"))
    return join(out)


def _contrasts(r) -> Safe:
    prob = r["settings"]["interval"]
    out = [tag("p", "The contextual effect, between minus within, for each time-varying "
               "covariate, with the probability of each sign and of a practically null "
               "difference (inside the ROPE, when one is set). The random-intercept model "
               "assumes it is zero; the reference tests below ask the same question.",
               family_report.contrast_scale(r), cls="bp-lead")]
    rows = []
    pairs_ = [(m, c) for m in r["models"] for c in m.get("contrasts") or []]
    has_rope = any(c.get("rope") is not None for _, c in pairs_)
    for m, c in pairs_:
        ref_u = c.get("reference_se")
        if ref_u is None and c.get("reference_lower") is not None:
            ref_u = (c["reference_upper"] - c["reference_lower"]) / 4  # about one SE
        refc = (esc(num.MISSING) if c.get("reference_estimate") is None else
                join([num.estimate(c["reference_estimate"], ref_u), Safe("<br>"),
                      tag("small", num.interval(c.get("reference_lower"),
                                                c.get("reference_upper"), ref_u))]))
        line = [f"{c['covariate']} · {m['title']}", _est(c["estimate"], c["sd"]),
                esc(num.uncertainty(c["sd"])), esc(_interval(c["lower"], c["upper"], c["sd"])),
                *_nums(num.probability(c["p_positive"]), num.probability(c["p_negative"]))]
        if has_rope:
            line += _nums(num.probability(c.get("p_rope")), num.plain(c.get("rope")))
        rows.append(line + [refc])
    if rows:
        heads = ["covariate · model", "mean", "SD", f"{_pct(prob)} interval", "P(> 0)",
                 "P(< 0)"] + (["P(in ROPE)", "ROPE half-width"] if has_rope else []) + [
                 "reference fit (estimate, interval)"]
        out.append(table(heads, rows, foot=tables.footer(r)))
    tests = r.get("tests") or []
    if tests:
        trs = [[t["title"], esc(num.plain(t.get("reported_statistic", t.get("statistic")))),
                tag("span", t.get("distribution") or (f"chi-squared({num.dof(t['df'])})"
                                                       if t.get("df") is not None
                                                       else num.MISSING), cls="bp-nowrap"),
                esc(num.p_value(t.get("reported_p_value", t.get("p_value")))),
                t.get("conclusion", "")] for t in tests]
        out.append(table(["reference test", "statistic", "distribution", _P_VALUE, "reading"],
                         trs, numeric=[1, 3], foot=tables.footer(r)))
    if not rows and not tests:
        out.append(note("info", "No model with separate within and between effects was "
                        "fitted (add "
                        + " or ".join(k.name for k in kinds.models() if k.contrasts)
                        + ")."))
    return join(out)


def _comparison(r) -> Safe:
    comp = r.get("comparison")
    if not comp or not comp.get("rows"):
        return note("info", "No LOO comparison was run.")
    level = comp["level"]
    out = [note("info", f"Level: {LEVEL_TEXT.get(level, level)}.", "What is compared."),
           tag("p", "ELPD is the expected log predictive density (higher is better); "
               "differences are to the best model with the SE of the paired difference. "
               "Bayesian models use PSIS-LOO"
               + ("." if comp.get("note") else "; reference fits enter through "
                  + ("exact leave-one-out refits" if comp.get("reference_folds") is None else
                     f"grouped {comp['reference_folds']}-fold cross-validation")
                  + " with plug-in predictive densities, scored on the same points."),
               cls="bp-lead")]
    if comp.get("note"):
        out.append(note("info", comp["note"] + ".", "Reference fits."))
    def _note(text):  # the method column says how reference rows were scored
        return "; ".join(p for p in (text or "").split("; ")
                         if p and not p.startswith("exact CV with closed-form refits")
                         and not p.startswith("exact K-fold CV (K="))

    def _k(row):
        n = row.get("n_high_pareto_k")
        return tag("span", num.count(n), cls="bp-status warn") if n else esc(num.count(n))

    rows = [[row["title"], tag("span", row.get("method") or "", cls="bp-nowrap"),
             _est(row.get("elpd"), row.get("se")), esc(num.uncertainty(row.get("se"))),
             _est(row.get("elpd_diff"), row.get("se_diff")),
             esc(num.uncertainty(row.get("se_diff"))), esc(num.plain(row.get("p_loo"))),
             esc(num.share(row.get("weight"))), _k(row),
             tag("small", _note(row.get("note")))]
            for row in comp["rows"]]
    out.append(table(["model", "method", "ELPD", "SE", "difference", "SE of difference",
                      "p_loo", "weight", "high Pareto k", "note"], rows, numeric=range(2, 9),
                     foot=tables.footer(r)))
    if comp.get("methods_note"):
        out.append(note("caution", comp["methods_note"], "Methods differ."))
    flagged = [row["title"] for row in comp["rows"] if row.get("n_high_pareto_k")]
    if flagged:
        out.append(note("caution", f"{', '.join(flagged)}: points with Pareto k above the "
                        "threshold make these ELPDs unreliable, and differences involving "
                        "them too. Refit those points exactly (--refit-high-k, or "
                        "refit_high_k = true in the analysis file) before ranking.",
                        "High Pareto k."))
    if comp.get("equivalent"):
        groups = "; ".join(" = ".join(_title_of(comp, n) for n in c) for c in comp["equivalent"])
        out.append(note("info", f"{groups}. Same likelihood on the same column space: the "
                        "models are reparametrisations of each other and predict alike (for "
                        "Bayesian models, up to their priors). Stacking cannot tell how to "
                        "split weight between them, so each class is stacked as one (the "
                        "equal mixture of its members) and its weight is shared equally.",
                        "Equivalent models."))
    out.append(figure(figures.loo_figure(r), "ELPD difference by model",
                      "ELPD difference to the best model with two SEs of the difference.",
                      "fig-loo"))
    return join(out)


def _serial(r) -> Safe:
    """Correlation over time within units: the errors the models assume, the
    serial-correlation test, the lag-one predictive check and the interval check."""
    from ..analysis.serialcheck import STATISTIC

    ar1 = r["settings"].get("errors") == "ar1"
    out = [tag("p", "A unit's errors are often correlated over time: a good year is "
               "followed by another. Models that take a unit's occasions as independent "
               "then report intervals that are too narrow, because the data hold less "
               "independent information than their number of rows suggests. "
               + ("The Bayesian models here allow for it (AR(1) errors: errors one time unit "
                  "apart correlate rho, d units apart rho^d)." if ar1 else
                  "The Bayesian models here assume independent occasions (--errors ar1 "
                  "allows AR(1) errors)."), cls="bp-lead")]
    if ar1:
        rows = []
        for m in r["models"]:
            rho = next((q for q in m.get("scale") or [] if q["name"] == "rho"), None)
            lag = next((q for q in (m.get("variance_partition") or {}).get("summary") or []
                        if q["quantity"] == LAG_ONE), None)
            if rho is None:
                continue
            rows.append([m["title"], _est(rho["estimate"], rho["sd"]),
                         esc(_interval(rho["lower"], rho["upper"], rho["sd"])),
                         _est(lag["estimate"], lag["sd"]) if lag else esc(num.MISSING)])
        if rows:
            out.append(table(["model", "rho", f"{_pct(r['settings']['interval'])} interval",
                              "outcomes one step apart: correlation"], rows,
                             caption="rho: the correlation of a unit's errors one time unit "
                             "apart. The last column adds the unit intercept: the correlation "
                             "of a unit's outcomes on two occasions one time unit apart, "
                             "given the covariates (models with a unit variance)."))
    test = next((t for t in r.get("tests") or [] if t["name"] == "serial_correlation"), None)
    if test is not None:
        p = test.get("reported_p_value")
        kind = "info" if test.get("skipped") else ("caution" if p is not None and p < 0.05
                                                   else "fine")
        out.append(note(kind, join([
            test["conclusion"][0].upper() + test["conclusion"][1:] + ". ",
            "" if test.get("skipped") else
            f"Wooldridge's test (2002, section 10.5.4): residuals of the first-differenced "
            f"equation regressed on their own lag, with an SE clustered by unit; "
            f"{test.get('distribution')}, p {num.p_value(p)}. With independent errors the "
            "coefficient is -0.5; towards 0 and above, errors persist over time."]),
            "Serial-correlation test."))
    checks = [(m, s) for m in r["models"] for s in m.get("ppc") or []
              if s["statistic"] == STATISTIC]
    if checks:
        rows = [[m["title"], *_nums(num.plain(s["observed"]), num.plain(s["replicated_mean"]),
                                    num.probability(s["p_value"]))] for m, s in checks]
        out.append(table(["model", "observed", "replicated (mean)",
                          "P(replicated ≥ observed)"], rows,
                         caption="Lag-one autocorrelation of within residuals (each unit's "
                         "residuals minus their mean; pairs of occasions one time unit apart), "
                         "observed against replicated errors drawn from each posterior. "
                         "Removing unit means makes it slightly negative even for "
                         "independent errors, so read the observed value against the "
                         "replicated ones, not against 0. A tail probability near 0: the "
                         "residuals persist more than the model's errors can. The statistic "
                         "does not depend on the scale of the errors, so with independent "
                         "errors every model's replicated values are alike."))
        out.append(figure(figures.serial_figure(r), "lag-one autocorrelation check",
                          "Replicated lag-one autocorrelations (histogram) and the observed "
                          "one (clay line), per model.", "fig-serial"))
        low = [m["title"] for m, s in checks if s["p_value"] < 0.025]
        if low:
            out.append(note("caution", f"{', '.join(low)}: the within residuals are more "
                            "correlated over time than these models' errors allow"
                            + ("." if ar1 else "; refit with --errors ar1."),
                            "Lag-one check."))
        high = [m["title"] for m, s in checks if s["p_value"] > 0.975]
        if high:
            out.append(note("caution", f"{', '.join(high)}: the within residuals are less "
                            "correlated over time than these models' errors make them"
                            + (" (the AR(1) errors overstate their persistence)." if ar1
                               else "."), "Lag-one check."))
    check = r.get("interval_check") or {}
    if check.get("rows"):
        rows = [[f"{label(x['term'])} · {x['title']}",
                 *_nums(num.plain(x["posterior_sd"]), num.plain(x["reference_se"]),
                        num.plain(x["ratio"])),
                 _status(not x["narrow"], "too narrow")] for x in check["rows"]]
        cov = "CR2" if check.get("cov") == "cr2" else "CR1"
        out.append(table(["coefficient · model", "posterior SD",
                          f"cluster-robust SE ({cov})", "ratio", "status"], rows,
                         numeric=[1, 2, 3],
                         caption="Each Bayesian model's posterior SD beside the SE of its "
                         "matching reference fit clustered by unit, which allows any "
                         "correlation within a unit. A ratio below "
                         f"{check['threshold']:g} (a rule of thumb: the robust variance more "
                         f"than {1 / check['threshold'] ** 2:.0f} times the model's) is "
                         "flagged."))
        if check.get("message"):
            out.append(note("caution", _warning_body(r, check), "Intervals."))
    if len(out) == 1:
        out.append(note("info", "No check of correlation over time was run (it needs the "
                        "rows and a numeric time column)."))
    return join(out)


def _status(ok: bool, warn_text="check") -> Safe:
    return tag("span", "fine" if ok else warn_text, cls=f"bp-status {'ok' if ok else 'warn'}")


#: how the report names each sampler (results.json ``models[].sampling.sampler``)
SAMPLER_NAMES = {"bayespanel": "bayespanel's own sampler", "pymc": "PyMC's sampler",
                 "nutpie": "nutpie"}


def _sampler_sentence(models) -> str:
    """Which NUTS implementation drew each model's posterior, and how long the chains ran
    (for a methods section)."""
    by, runs = {}, set()
    for m in models:
        s = m.get("sampling") or {}
        by.setdefault(SAMPLER_NAMES.get(s.get("sampler"), str(s.get("sampler"))),
                      []).append(m["title"])
        runs.add((s.get("chains"), s.get("draws"), s.get("tune"), s.get("seed")))
    which = "; ".join(f"{name} for {', '.join(titles)}" if len(by) > 1
                      else f"{name} for every model" for name, titles in by.items())
    text = f"Drawn with the No-U-Turn sampler (Hoffman and Gelman 2014): {which}."
    if len(runs) == 1:
        chains, draws, tune, seed = runs.pop()
        text += (f" {num.count(chains)} chains of {num.count(draws)} draws after "
                 f"{num.count(tune)} warm-up iterations, seed {seed}.")
    return text


def _diagnostics(r) -> Safe:
    if not r["models"]:
        return note("info", "No Bayesian model was fitted.")
    rows = []
    for m in r["models"]:
        d = m["diagnostics"]
        loo = m.get("loo") or {}
        rows.append([m["title"], *_nums(
            num.count(d.get("divergences")), num.rhat(d.get("max_rhat")),
            num.count(d.get("min_ess_bulk")), num.count(d.get("min_ess_tail")),
            num.bfmi(d.get("min_bfmi")), num.pareto_k(loo.get("max_k")),
            num.count(loo.get("n_high_pareto_k"))),
            _status(not d.get("warnings") and not loo.get("n_high_pareto_k"))])
    out = [tag("p", _sampler_sentence(r["models"]) + " Thresholds (common practice): R-hat at "
               "most 1.01, bulk and tail ESS at least 100 per chain, no divergent transitions, "
               "energy BFMI at least 0.3, Pareto k at most 0.7.", cls="bp-lead"),
           table(["model", "divergences", "max R-hat", "min bulk ESS", "min tail ESS",
                  "min BFMI", "max Pareto k", "high Pareto k", "status"], rows,
                 foot=tables.footer(r, icc=False))]
    for p in stored_problems(r):
        out.append(note("problem" if p["kind"] == "sampling" else "caution", p["text"],
                        f"{p['title']} ({p['kind']}):"))
    for m in r["models"]:
        loo = m.get("loo") or {}
        if loo.get("warning") and not loo.get("n_high_pareto_k"):
            out.append(note("info", loo["warning"], f"{m['title']} (LOO):"))
    return join(out)


def _checks(r) -> Safe:
    uri = figures.ppc_figure(r)
    if not any(m.get("ppc") for m in r["models"]):
        return note("info", "No posterior predictive draws were made.")
    rows = []
    for m in r["models"]:
        for s in m.get("ppc") or []:
            rows.append([f"{s['label']} · {m['title']}", *_nums(
                num.plain(s["observed"]), num.plain(s["replicated_mean"]),
                num.probability(s["p_value"]))])
    out = [tag("p", "Replicated panels drawn from each posterior (same units, new "
               "occasion noise) against the observed one, on statistics a panel model must "
               "get right. A tail probability near 0 or 1 marks a feature the model misses.",
               cls="bp-lead"),
           table(["statistic · model", "observed", "replicated (mean)", "P(replicated ≥ observed)"],
                 rows),
           figure(uri, "posterior predictive checks",
                  "Histograms of replicated statistics; the clay line is the observed value.",
                  "fig-ppc")]
    for m in r["models"]:
        miss = [s["label"] for s in m.get("ppc") or [] if not 0.025 <= s["p_value"] <= 0.975]
        if miss:
            out.append(note("caution", f"the observed {', '.join(miss)} fall(s) in the tail of "
                            "the replicated values (tail probability below 0.025 or above "
                            "0.975): the model does not reproduce this feature of the data.",
                            f"{m['title']}:"))
    return join(out)


def _rerun(r) -> Safe:
    st = r["settings"]
    soft = r["software"]
    out = [tag("p", "The output folder holds analysis.toml with every setting used. To "
               "repeat the run exactly:", cls="bp-lead"),
           tag("pre", "bayespanel fit --config analysis.toml --out NEW_FOLDER", cls="bp-code"),
           tag("h3", "Settings"),
           tag("pre", st.get("toml", ""), cls="bp-code"),
           tag("h3", "Software"),
           pairs([(k, v) for k, v in [("python", soft.get("python")),
                                      ("platform", soft.get("platform"))]
                  + sorted(soft.get("packages", {}).items())])]
    src = r["data"].get("source") or {}
    if src.get("sha256"):
        out.append(tag("p", "Data file SHA-256: ", tag("code", src["sha256"])))
    return join(out)


_BUILDERS = {
    "overview": _overview, "data": _data, "models": _models, "coefficients": _coefficients,
    "serial": _serial,
    "effects": lambda r: family_report.effects(r),
    "partition": _partition, "contrasts": _contrasts, "comparison": _comparison,
    "diagnostics": _diagnostics, "checks": _checks,
    "caution": lambda r: note("caution", CAUTION, "Associations, not effects."),
    "rerun": _rerun,
}


def _css() -> str:
    return resources.files("bayespanel").joinpath("report/report.css").read_text("utf-8")


def render(results: dict) -> str:
    """The whole report page as a string (deterministic for given results)."""
    title = results.get("title") or "Panel analysis"
    rail = tag("nav", tag("div", "bayes", tag("span", "panel"), cls="bp-mark"),
               tag("ol", *[tag("li", tag("a", h, href=f"#{k}")) for k, h in SECTIONS]),
               cls="bp-rail")
    sections = [tag("section", tag("h2", h), _BUILDERS[k](results), cls="bp-part", id=k,
                    data_section=k) for k, h in SECTIONS]
    head = tag("header", tag("h1", title),
               tag("div", f"Written by bayespanel {results['software']['packages'].get('bayespanel', '')}"
                   f" on {results['created']} · results schema {results['schema_version']}",
                   cls="bp-sub"), cls="bp-masthead")
    foot = tag("footer", "Every number on this page is in results.json in the same folder; "
               "tables are also saved as Markdown, LaTeX and CSV.", cls="bp-foot")
    main = tag("main", head, *sections, foot, cls="bp-main")
    page = ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; "
            "img-src data:; style-src 'unsafe-inline'\">"
            f"<title>{esc(title)}</title><style>{_css()}</style></head>"
            f"<body>{tag('div', rail, main, cls='bp-shell')}</body></html>\n")
    return page
