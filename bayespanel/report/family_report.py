"""Report parts for outcome families other than the Gaussian and for random slopes.

The HTML report (:mod:`bayespanel.report.html`) asks these functions for the section on
average marginal effects and for the sentences that say on which scale the coefficients,
the variance partition and the contrasts are. For a Gaussian run without random slopes
they return nothing and the report is as before.
"""

from __future__ import annotations

from ..core.terms import BETWEEN, WITHIN, parse
from .markup import Safe, esc, join, note, tag, table

__all__ = ["family_of", "effects", "overview_text", "coefficient_note", "partition_lead",
           "contrast_scale", "AME_SCALE"]

_NAMES = {"gaussian": "Gaussian", "student_t": "Student-t", "bernoulli": "binary (Bernoulli)",
          "binomial": "binomial", "poisson": "Poisson count",
          "negative_binomial": "negative binomial count"}
#: what an average marginal effect measures, by family
AME_SCALE = {
    "bernoulli": "the change in the probability that the outcome is 1",
    "binomial": "the change in the expected number of successes of a row (of its trials)",
    "poisson": "the change in the expected count of a row",
    "negative_binomial": "the change in the expected count of a row",
}
_LINK_WORD = {"logit": "log-odds", "log": "log rate", "identity": "outcome"}


def family_of(r) -> dict:
    """The run's family settings (``gaussian`` and no slopes for older results files)."""
    st = r.get("settings", {})
    return {"name": st.get("family", "gaussian"), "trials": st.get("trials"),
            "exposure": st.get("exposure"), "random_slopes": st.get("random_slopes") or []}


def _link(r):
    for m in r.get("models", []):
        if m.get("family"):
            return m["family"]["link"]
    name = family_of(r)["name"]
    return {"bernoulli": "logit", "binomial": "logit", "poisson": "log",
            "negative_binomial": "log"}.get(name, "identity")


def overview_text(r):
    """One sentence on the family and random slopes, or ''."""
    f = family_of(r)
    if f["name"] == "gaussian" and not f["random_slopes"]:
        return ""
    bits = [f" Outcome family: {_NAMES[f['name']]} ({_link(r)} link)"]
    if f["trials"]:
        bits.append(f", trials in {f['trials']}")
    if f["exposure"]:
        bits.append(f", exposure {f['exposure']} (as log offset)")
    if f["random_slopes"]:
        bits.append(f"; random slopes for {', '.join(f['random_slopes'])}")
    return Safe(esc("".join(bits) + "."))


def coefficient_note(r):
    """What the coefficients measure for a non-identity link, and how the reference GLMs
    relate to them; '' for identity links."""
    link = _link(r)
    if link == "identity":
        if family_of(r)["random_slopes"] and r.get("reference"):
            return note("info", "The reference fits have a random intercept only; their "
                        "coefficients estimate the same average slopes.", "Random slopes.")
        return Safe("")
    word = _LINK_WORD[link]
    text = (f"Bayesian coefficients are on the {word} scale and conditional on the unit's "
            "effect (unit-specific). ")
    if any(f.get("estimator") == "glm" for f in r.get("reference", [])):
        text += ("The reference fits are pooled GLMs with errors clustered by unit: their "
                 "coefficients are population-averaged. "
                 + ("For the logit link these are smaller in magnitude than the unit-specific "
                    "ones (Zeger, Liang and Albert 1988), so the two are not the same "
                    "estimand; compare the effects on the outcome scale in the next section."
                    if link == "logit" else
                    "For the log link the slopes estimate the same log rate ratios (the "
                    "intercepts differ by half the unit variance, unit SD^2/2)."))
    else:
        text += "No reference fit was computed."
    return note("info", text, "Scale.")


def _cells(est, u, lo, hi):
    """Estimate, SD/SE and interval cells by the report's digits rule
    (bayespanel.report.numbers)."""
    from . import numbers as num

    return [esc(num.estimate(est, u)), esc(num.uncertainty(u)), esc(num.interval(lo, hi, u))]


def effects(r):
    """The section on average marginal effects (a note when the link is the identity)."""
    models = [m for m in r.get("models", []) if m.get("average_marginal_effects")]
    refs = [f for f in r.get("reference", []) if f.get("average_marginal_effects")]
    if not models and not refs:
        if _link(r) == "identity":
            return note("info", "The outcome's model has an identity link: each coefficient "
                        "above is already the change in the expected outcome per unit of its "
                        "covariate, so the effects on the outcome scale are the coefficients.",
                        "Identity link.")
        return note("info", "No model or reference fit with average marginal effects was "
                    "computed.", "None.")
    fam = family_of(r)["name"]
    pct = f"{100 * float(r['settings']['interval']):g}%"
    refs_by = {f["name"]: f for f in refs}
    rows_by, used = {}, set()

    def add(effect, line):
        rows_by.setdefault(effect, []).append(line)

    def ref_rows(f):
        used.add(f["name"])
        for a in f["average_marginal_effects"]:
            add(a["effect"], [Safe(tag("span", "R", cls="bp-tag ref") + esc(f["title"] + " (ref.)")),
                              *_cells(a["estimate"], a["se"], a["lower"], a["upper"])])

    for m in models:  # each model, then its reference counterpart (as the coefficient table)
        for a in m["average_marginal_effects"]:
            add(a["effect"], [Safe(tag("span", "B", cls="bp-tag bayes") + esc(m["title"])),
                              *_cells(a["estimate"], a["sd"], a["lower"], a["upper"])])
        cp = refs_by.get(m.get("reference_counterpart"))
        if cp is not None and cp["name"] not in used:
            ref_rows(cp)
    for f in refs:
        if f["name"] not in used:
            ref_rows(f)
    bases = list(dict.fromkeys(parse(e).column for e in rows_by))
    rank = {WITHIN: 1, BETWEEN: 2}
    order = sorted(rows_by, key=lambda e: (bases.index(parse(e).column),
                                           rank.get(parse(e).part, 0)))
    heads = ["effect · model", "estimate", "SD / SE", f"{pct} interval"]
    body = []
    for e in order:
        body.append(Safe(tag("tr", tag("td", e, colspan=str(len(heads))), cls="bp-group")))
        body += rows_by[e]
    lead = tag("p", "Average marginal effect: ", AME_SCALE.get(fam, "the change in the "
               "expected outcome"), " per unit of the covariate, averaged over the "
               "estimation rows. The Bayesian models average over the distribution of the "
               "unit effects too (population-averaged), so they and the pooled GLMs answer "
               "the same question. A within effect is the change when a unit's own value "
               "moves; a between effect compares units whose means differ.", cls="bp-lead")
    out = [lead, table(heads, body)]
    if not refs:
        out.append(note("info", "No reference fit with average marginal effects was "
                        "computed for this run.", "Reference."))
    return join(out)


def partition_lead(r):
    """The partition section's opening for latent-effect runs (None: the Gaussian text)."""
    f = family_of(r)
    if f["name"] == "gaussian" and not f["random_slopes"]:
        return None
    text = ("How much of the variance lies between units, on the scale named above each "
            "table. The ICC is unit SD^2 / (unit SD^2 + s^2), with s^2 the "
            "occasion-level variance on that scale. Reference GLMs have no unit variance.")
    return tag("p", text, cls="bp-lead")


def contrast_scale(r) -> str:
    """A sentence naming the scale of the contrasts for non-identity links, or ''."""
    link = _link(r)
    if link == "identity":
        return ""
    return (f" For this family the contrasts are on the {_LINK_WORD[link]} scale (differences "
            "of coefficients), and the ROPE half-width is read on that scale.")
