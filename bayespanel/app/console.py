"""What the command line prints: the panel's description and, after a run, the reference
fits and tests, every Bayesian model's estimates (truth beside them for simulated data),
the notes, the LOO comparison and the run's problem list, with the report's digits rule."""

from __future__ import annotations

import pandas as pd

from .. import kinds
from ..core.terms import parse


def _print_describe(panel, desc=None) -> None:
    s = panel.structure()
    print(f"{s['n_units']} units ({panel.unit}) observed on {s['n_occasions']} occasions "
          f"({panel.time}); {s['n_rows']} rows; "
          f"{'balanced' if s['balanced'] else 'unbalanced'}: {s['occasions_min']} to "
          f"{s['occasions_max']} occasions per unit; {s['n_units_with_gaps']} units with gaps; "
          f"{s['n_singleton_units']} units seen once.")
    desc = panel.describe() if desc is None else desc
    from ..report.tables import describe_display

    with pd.option_context("display.width", 120, "display.max_columns", 20):
        print(describe_display(desc))  # the report's digits rule and headings
    left_out = desc.attrs.get("left_out") or {}
    if left_out:
        print(f"left out ({len(left_out)}): "
              + "; ".join(f"{c} ({why})" for c, why in left_out.items()))


def print_problems(results) -> list:
    """Print the run's problem list (``results["problems"]``, the list results.json and
    the report hold), grouped by kind; return it."""
    from ..report.problems import stored

    items = stored(results)
    heads = {"sampling": "the estimates of these models may be unreliable",
             "comparison": "the LOO estimates of these models are unreliable"}
    for kind, head in heads.items():
        mine = [p for p in items if p["kind"] == kind]
        if mine:
            print(f"\n{kind} problems ({len(mine)}): {head}")
            for p in mine:
                print(f"  {p['title']}: {p['text']}")
    return items


def _has_unit_level(name) -> bool:
    """Whether a model kind in a results file separates the unit and occasion levels."""
    return name not in kinds.model_names() or kinds.model(name).unit_effects != "none"


def _fmt(v, u=None):
    """A console number by the report's digits rule (bayespanel.report.numbers): to the
    decimals of its uncertainty ``u``, three significant digits without one."""
    from ..report import numbers

    return numbers.estimate(v, u)


def _sd(u):
    from ..report import numbers

    return f"({numbers.uncertainty(u)})"


#: occasion indicators are listed term by term up to this many; beyond, one line
_OCCASIONS_LISTED = 6


def _print_terms(rows):
    """``(term, centre, spread, lower, upper, extra)`` lines, the centre and interval to the
    decimals of ``spread`` (the SD or SE, shown in brackets), columns sized to the block;
    many occasion indicators are summarised in one line (every value is in results.json
    and the report)."""
    from ..report import numbers
    from ..report.text import label

    occ = [r for r in rows if parse(r[0]).is_occasion]
    many = len(occ) > _OCCASIONS_LISTED
    cells = [(_fmt(r[1], r[2]), f"({numbers.uncertainty(r[2])})") for r in rows]
    w1 = max([len(c) for c, _ in cells] + [9])
    w2 = max([len(d) for _, d in cells] + [0])
    for r, (c, d) in zip(rows, cells):
        if many and r in occ:
            if r is occ[0]:
                vals = [o[1] for o in occ if o[1] is not None]
                print(f"  {len(occ)} occasion terms, from {_fmt(min(vals))} to "
                      f"{_fmt(max(vals))} (each in the report and results.json)")
            continue
        print(f"  {label(r[0]):<28} {c:>{w1}}  {d:>{w2}}  "
              f"{numbers.interval(r[3], r[4], r[2])}{r[5]}")


def _not_estimated(items: dict) -> str:
    """``term (reason)`` pairs, occasion indicators with one reason counted in one item."""
    occ = {}
    out = []
    for k, v in items.items():
        if parse(k).is_occasion and len(items) > _OCCASIONS_LISTED:
            occ.setdefault(v, []).append(k)
        else:
            out.append(f"{k} ({v})")
    out += [f"{len(ks)} occasion terms ({v})" for v, ks in occ.items()]
    return "; ".join(out)


def _print_reference(results) -> None:
    """The reference fits' estimates, SEs and intervals, and the specification tests."""
    from ..report import numbers
    from ..report.text import label

    pct = f"{100 * results['settings']['interval']:g}%"
    for f in results["reference"]:
        dist = f", tests on {f['test_distribution']}" if f.get("test_distribution") else ""
        print(f"\n{f['title']} (reference, {f['cov']} covariance{dist}; estimate, SE and "
              f"{pct} interval)")
        _print_terms([(c["term"], c["estimate"], c["se"], c["lower"], c["upper"], "")
                      for c in f["coefficients"]])
        zero = f.get("unit_variance_at_zero")
        parts = [f"{label(k)} {'0 (estimated at zero)' if zero and k != 'sigma_obs' else numbers.plain(f.get(k))}"
                 for k in ("sigma_unit", "sigma_obs", "icc") if f.get(k) is not None]
        if parts:
            print(f"  {'; '.join(parts)}")
        if f.get("unit_intercept_share") is not None:
            print(f"  unit intercepts account for {numbers.share(f['unit_intercept_share'])} "
                  "of the outcome's variance")
        if f.get("not_estimated"):
            print(f"  not estimated: {_not_estimated(f['not_estimated'])}")
    tests = results.get("tests") or []
    if tests:
        print("\nSpecification tests (are within and between effects equal? are a unit's "
              "errors correlated over time?):")
    reasons = {t["skipped"] for t in tests if t.get("skipped")}
    if len(tests) > 1 and len(reasons) == 1 and all(t.get("skipped") for t in tests):
        print(f"  not run: {reasons.pop()}")  # one line for all
        tests = []
    skipped = {}  # tests skipped for one reason share a line
    for t in tests:
        if t.get("skipped"):
            skipped.setdefault(t["skipped"], []).append(t["title"])
    for why, titles in skipped.items():
        print(f"  {'; '.join(titles)}: not run: {why}")
    for t in tests:
        if t.get("skipped"):
            continue
        p = numbers.p_value(t.get("reported_p_value", t.get("p_value")))
        dist = t.get("distribution") or (
            f"chi-squared({numbers.dof(t.get('df'))})" if t.get("df") is not None else "")
        print(f"  {t['title']}: statistic "
              f"{numbers.plain(t.get('reported_statistic', t.get('statistic')))} on {dist}, "
              f"{'p ' + p if p.startswith('<') else 'p = ' + p}; {t['conclusion']}")


def _print_summary(results) -> None:
    """Reference fits and tests, estimates per Bayesian model (truth beside them for
    simulated data) and the comparison."""
    _print_reference(results)
    by = (results.get("truth") or {}).get("by_model", {})
    for m in results["models"]:
        print(f"\n{m['title']} (Bayesian; posterior mean, SD and "
              f"{100 * results['settings']['interval']:g}% interval)")
        known = by.get(m["name"], {})
        rows = []
        for c in m["coefficients"]:
            tv = known.get(c["term"])
            rows.append((c["term"], c["estimate"], c.get("sd"), c["lower"], c["upper"],
                         f"   true {_fmt(tv, c.get('sd'))}" if tv is not None else ""))
        for q in m.get("scale", []):
            # a model without unit effects has a residual SD that mixes both levels: no
            # true value to show
            tv = ((results.get("truth") or {}).get(q["name"])
                  if known and _has_unit_level(m["name"]) else None)
            rows.append((q["name"], q["estimate"], q.get("sd"), q["lower"], q["upper"],
                         f"   true {_fmt(tv, q.get('sd'))}" if tv is not None else ""))
        _print_terms(rows)
        ame = m.get("average_marginal_effects") or []
        if ame:
            print("  average marginal effects (outcome scale; reference GLM beside):")
            for a in ame:
                ref = ("" if a.get("reference_estimate") is None else
                       f"   ref. {_fmt(a['reference_estimate'])} (SE {_fmt(a['reference_se'])})")
                print(f"    {a['effect']:<26} {_fmt(a['estimate'])!s:>9}  [{_fmt(a['lower'])}, "
                      f"{_fmt(a['upper'])}]{ref}")
        _print_serial(m)
        for w in m["diagnostics"]["warnings"]:
            print(f"  warning: {w}")
    for w in results.get("warnings") or []:  # rows dropped, occasions read as dates, ...
        print(f"\nnote: {w}")
    comp = results.get("comparison")
    if comp and comp.get("rows"):
        print(f"\nLOO comparison ({comp['level']} level; ELPD difference to the best, its "
              "SE, stacking weight, method):")
        title = {r["model"]: r["title"] for r in comp["rows"]}
        for r in comp["rows"]:
            flags = []
            if r.get("elpd") is None and r.get("note"):
                flags.append(r["note"])  # why the level is undefined for this model
            if r.get("n_high_pareto_k"):
                flags.append(f"{r['n_high_pareto_k']} point(s) with high Pareto k")
            if r.get("equivalent_to"):
                flags.append("equivalent to " + ", ".join(
                    title.get(n, n) for n in r["equivalent_to"].split(", ")))
            flags += [p for p in (r.get("note") or "").split("; ") if p.startswith("scored on")]
            from ..report import numbers

            w = "" if r.get("weight") is None else numbers.share(r["weight"])
            print(f"  {r['title']:<40} {_fmt(r.get('elpd_diff'), r.get('se_diff')):>9}  "
                  f"{_sd(r.get('se_diff')):>8}  {w:>5}  "
                  f"{r.get('method') or ''}" + (f"  ({'; '.join(flags)})" if flags else ""))
        for text in (comp.get("note"), comp.get("methods_note")):
            if text:
                print(f"  note: {text}")
    check = results.get("interval_check") or {}
    if check.get("message"):  # last, where a reader looks when the run ends
        print(f"\nwarning: {check['message']}")


def _print_serial(m) -> None:
    """A model's correlation over time: the correlation of two occasions one time unit
    apart (AR(1) errors) and the lag-one predictive check of its within residuals."""
    from ..analysis.serialcheck import STATISTIC
    from ..data.resultshape import LAG_ONE
    from ..report import numbers

    vp = m.get("variance_partition") or {}
    for q in vp.get("summary") or []:
        if q["quantity"] == LAG_ONE:
            print(f"  {LAG_ONE}: {_fmt(q['estimate'], q['sd'])} "
                  f"{numbers.interval(q['lower'], q['upper'], q['sd'])}")
    for c in m.get("ppc") or []:
        if c["statistic"] == STATISTIC:
            p = c["p_value"]
            reading = ("" if 0.025 <= p <= 0.975 else
                       "; the residuals are more correlated over time than the model allows"
                       if p < 0.025 else
                       "; the residuals are less correlated over time than the model allows")
            print(f"  {c['label']}: observed {numbers.plain(c['observed'])}, replicated "
                  f"{numbers.plain(c['replicated_mean'])} on average, P(replicated >= "
                  f"observed) {numbers.probability(p)}{reading}")
