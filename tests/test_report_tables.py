"""Tables a paper can use: digits that fit the uncertainty, one label set, footers, the
distribution each test uses, a unit variance at zero flagged, and tables that fit the page.

Outside checks, named beside each: the Grunfeld investment panel as statsmodels ships it
(10 firms) run through the command line; linearmodels' PanelOLS (entity effects,
clustered) for the within estimates, SEs and unit intercepts; scipy's t distribution for
the p-values; statsmodels' MixedLM (REML) and linearmodels' RandomEffects and BetweenOLS
for a unit variance at zero on four Grunfeld firms; statsmodels' GLS for the ML/REML
standard-error convention; Debian's headless Chromium for the page widths. Expected
strings of the digits rule are worked out by hand in the comments.
"""

import html
import json
import re
import shutil
import subprocess
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import bayespanel as bp
from bayespanel.report import numbers as num
from conftest import run_main

FORMULA = "invest ~ value + capital"
# Four Grunfeld firms whose unit variance REML, ML and Swamy-Arora all put at zero (found
# by searching the subsets of four to seven firms; no larger subset has a REML zero).
ZERO_FIRMS = ("Atlantic Refining", "Chrysler", "Goodyear", "US Steel")


def _cli(args, cwd):
    run = run_main(*args, cwd=cwd)  # the command line in this process (tests/conftest.py)
    assert run.returncode == 0, run.stderr[-3000:]
    return run.stdout


@pytest.fixture(scope="module")
def grunfeld_run(grunfeld, tmp_path_factory):
    """The command line as a researcher runs it: Grunfeld, three Bayesian models, a ROPE
    (the widest contrasts table), the default reference fits (CR1, Swamy-Arora)."""
    d = tmp_path_factory.mktemp("grunfeld_tables")
    grunfeld.to_csv(d / "grunfeld.csv", index=False)
    stdout = _cli(["fit", "grunfeld.csv", "--unit", "firm", "--time", "year", "--formula",
                   FORMULA, "--models", "random_intercept,within_between,fixed_effects",
                   "--draws", "150", "--tune", "150", "--chains", "2", "--seed", "4",
                   "--rope", "0.01", "--out", "run"], d)
    run = d / "run"
    return run, json.loads((run / "results.json").read_text("utf-8")), stdout


@pytest.fixture(scope="module")
def zero_run(grunfeld, tmp_path_factory):
    d = tmp_path_factory.mktemp("grunfeld_zero")
    grunfeld[grunfeld["firm"].isin(ZERO_FIRMS)].to_csv(d / "four.csv", index=False)
    _cli(["fit", "four.csv", "--unit", "firm", "--time", "year", "--formula", FORMULA,
          "--models", "none", "--method", "reml", "--out", "run", "--quiet"], d)
    return d / "run", json.loads((d / "run" / "results.json").read_text("utf-8"))


# ---------------------------------------------------------------------- the digits rule
def test_digits_rule_hand_computed():
    # two significant digits of the uncertainty, the estimate to the same decimal place:
    # 0.000692 -> 0.00069 (5 decimals), so -0.004123 -> -0.00412 (the example)
    assert num.estimate(-0.004123, 0.000692) == "-0.00412"
    assert num.uncertainty(0.000692) == "0.00069"
    # SD 29.73 -> 30 (no decimals): 98.04 -> 98; the interval ends alike
    assert (num.estimate(98.042, 29.731), num.uncertainty(29.731)) == ("98", "30")
    assert num.interval(58.29, 171.08, 29.731) == "[58, 171]"
    # 0.0996 rounds to 0.10 at two digits: two decimals, not three
    assert num.uncertainty(0.0996) == "0.10" and num.estimate(1.23456, 0.0996) == "1.23"
    assert num.estimate(0.1101238, 0.0151945) == "0.110"
    assert num.estimate(-0.0001, 0.05) == "0.000"  # no "-0.000"
    # no uncertainty: three significant digits, integer digits kept
    assert [num.plain(x) for x in (2.33037, 1234.5, 0.012345, 146.0)] == [
        "2.33", "1234", "0.0123", "146"]
    # probabilities: three decimals with bounds; p-values bounded below only
    assert [num.probability(p) for p in (0.00025, 0.0257, 0.9996, 0.5)] == [
        "< 0.001", "0.026", "> 0.999", "0.500"]
    assert (num.p_value(4.8e-05), num.p_value(1.0)) == ("< 0.001", "1.000")
    # counts are integers (ESS with four decimals was the complaint)
    assert (num.count(425.3122), num.count(12345.6), num.dof(9.0), num.dof(4.372)) == (
        "425", "12,346", "9", "4.4")


def _decimals(s):
    s = s.strip().lstrip("-")
    return len(s.split(".")[1]) if "." in s else 0


def _sig_digits(s):
    digits = s.strip().lstrip("-").replace(".", "").lstrip("0")
    return len(digits)


def _md_cells(line):
    """The cells of a Markdown table row as a reader sees them (Markdown's backslash
    escapes and HTML entities resolved)."""
    cells = re.split(r"(?<!\\)\|", line.strip().strip("|"))
    return [html.unescape(re.sub(r"\\(.)", r"\1", c)).strip() for c in cells]


def _md_rows(path):
    lines = [ln for ln in path.read_text("utf-8").splitlines() if ln.startswith("|")]
    head = _md_cells(lines[0])
    return head, [dict(zip(head, _md_cells(ln))) for ln in lines[2:]]


def _check_pair(est, unc, where):
    if unc in ("", "–", "0") or "e" in unc:
        return
    assert _sig_digits(unc) == 2, (where, unc)
    assert _decimals(est) == _decimals(unc), (where, est, unc)


def test_every_table_shows_estimates_to_their_uncertainty(grunfeld_run):
    """The rule read back from the written tables: in each row the SD/SE has two
    significant digits and the estimate and interval ends have its decimals."""
    run, res, _ = grunfeld_run
    head, rows = _md_rows(run / "tables" / "coefficients_long.md")
    assert rows
    for r in rows:
        _check_pair(r["estimate"], r["SD or SE"], r)
        for end in r["95% interval"].strip("[]").split(", "):
            _check_pair(end, r["SD or SE"], r)
    for stem, est, unc in (("variance_partition", "estimate or mean", "SD"),
                           ("contrasts", "mean", "SD")):
        for r in _md_rows(run / "tables" / f"{stem}.md")[1]:
            _check_pair(r[est], r[unc], (stem, r))
            if stem == "contrasts":  # the reference contrast to its own SE's digits
                _check_pair(r["reference estimate"], r["reference SE"], (stem, r))
    # the HTML coefficient table: estimate, SD/SE, interval per row
    page = (run / "report.html").read_text("utf-8")
    sec = page.split('id="coefficients"')[1].split("</table>")[0]
    n = 0
    for tr in re.findall(r"<tr>(.*?)</tr>", sec, re.S):
        cells = [html.unescape(re.sub("<.*?>", "", c)) for c in
                 re.findall(r'<td class="num">(.*?)</td>', tr, re.S)]
        if len(cells) >= 3:
            _check_pair(cells[0], cells[1], cells)
            n += 1
    assert n >= 10
    # diagnostics: ESS as integers; probabilities in the contrasts with three decimals
    _, diag = _md_rows(run / "tables" / "diagnostics.md")
    assert all(re.fullmatch(r"[\d,]+", r["min bulk ESS"]) for r in diag)
    _, ct = _md_rows(run / "tables" / "contrasts.md")
    assert all(re.fullmatch(r"(< |> )?[01]\.\d{3}", r["P(> 0)"]) for r in ct)


def test_reference_rows_against_linearmodels(grunfeld_run, grunfeld):
    """The within fit's row, worked out by hand from linearmodels PanelOLS (entity effects
    and a constant, clustered by firm with the CR1 factor: debiased, group_debias): value
    0.110124 with SE 0.015194 -> '0.110' and '0.015' (two significant digits of the SE,
    three decimals); the p-value on t(G - 1) = t(9) from scipy is about 5e-5 ->
    '< 0.001'. CSV keeps full precision."""
    from linearmodels.panel import PanelOLS

    run, res, _ = grunfeld_run
    d = grunfeld.set_index(["firm", "year"])
    fe = PanelOLS(d["invest"], d[["value", "capital"]].assign(const=1.0),
                  entity_effects=True).fit(cov_type="clustered", cluster_entity=True,
                                           debiased=True, group_debias=True)
    b, se = fe.params["value"], fe.std_errors["value"]
    assert (f"{b:.6f}", f"{se:.6f}") == ("0.110124", "0.015194")  # the hand-worked inputs
    p = 2 * stats.t.sf(abs(b / se), 9)
    assert p < 0.001
    wide = (run / "tables" / "coefficients.md").read_text("utf-8")
    head, rows = _md_rows(run / "tables" / "coefficients.md")
    value = next(r for r in rows if r["term"] == "value")
    assert value["Within (fixed effects) (ref.)"] == "0.110 (0.015)"
    assert value["Within (fixed effects) (ref.): p"] == "< 0.001"
    from bayespanel.report.tables import distribution_text

    said = distribution_text(res)
    assert said == "Reference p-values and intervals use t(9) for every fit (cluster covariance)."
    assert said in wide and said in (run / "report.html").read_text("utf-8")
    csv = pd.read_csv(run / "tables" / "coefficients.csv", index_col="term")
    assert csv.loc["value", "Within (fixed effects) (ref.): estimate"] == pytest.approx(b, rel=1e-10)
    assert csv.loc["value", "Within (fixed effects) (ref.): SE"] == pytest.approx(se, rel=1e-8)
    assert csv.loc["value", "Within (fixed effects) (ref.): p-value"] == pytest.approx(p, rel=1e-6)
    # the HTML row carries the same three strings
    page = (run / "report.html").read_text("utf-8")
    sec = page.split('id="coefficients"')[1].split("</table>")[0]
    block = sec.split(">value</td>")[1].split("bp-group")[0]
    row = next(tr for tr in re.findall(r"<tr>(.*?)</tr>", block, re.S)
               if "Within (fixed effects) (ref.)" in tr)
    cells = [html.unescape(re.sub("<.*?>", "", c)) for c in re.findall(r"<td[^>]*>(.*?)</td>", row)]
    assert cells[1:3] == ["0.110", "0.015"] and cells[4] == "< 0.001"


# ---------------------------------------------------------------------- labels and footers
_RAW = re.compile(r"(?<![\w(])(sigma_unit|sigma_obs|icc)(?![\w)])")


def _table_text(page):
    return [html.unescape(re.sub(r"<[^>]+>", " ", t)) for t in
            re.findall(r"<table.*?</table>", page, re.S)]


def test_one_label_set_everywhere(grunfeld_run):
    """The variance quantities carry one set of display labels (unit SD, occasion SD, ICC)
    in every table of the page, the Markdown and LaTeX files and the console; the prior keys
    users type (sigma_unit) appear only in brackets beside them."""
    run, res, stdout = grunfeld_run
    page = (run / "report.html").read_text("utf-8")
    for text in _table_text(page):
        assert not _RAW.search(text), _RAW.search(text).group()
    tables_text = "\n".join(p.read_text("utf-8") for p in (run / "tables").glob("*.md"))
    tables_text += "\n".join(p.read_text("utf-8") for p in (run / "tables").glob("*.tex"))
    assert not _RAW.search(tables_text.replace(r"\_", "_"))
    assert "unit SD" in page and "occasion SD" in page
    _, vp = _md_rows(run / "tables" / "variance_partition.md")
    labels = {r["quantity"] for r in vp}
    assert labels == {"unit SD", "occasion SD", "ICC"}  # Bayesian and reference rows alike
    # the estimate lines (warnings quote the sampler's parameter names)
    estimates = "\n".join(ln for ln in stdout.split("\nsampling problems")[0].splitlines()
                          if not ln.strip().startswith("warning:"))
    assert "unit SD" in estimates and not _RAW.search(estimates)
    # no internal function names in the page's text
    visible = html.unescape(re.sub(r"<pre.*?</pre>|<[^>]+>", " ", page, flags=re.S))
    for name in ("mundlak_test", "hausman(", "refit_high_k=True", "fit_design", "within_core"):
        assert name not in visible


def test_every_table_has_a_footer_with_rows_units_and_icc(grunfeld_run):
    run, res, _ = grunfeld_run
    foot = "N = 200 rows of 10 units (firm), 20 occasions (year)."
    for p in (run / "tables").glob("*.md"):
        text = p.read_text("utf-8")
        assert foot in text, p.name
        if p.stem not in ("data_description", "diagnostics"):
            assert "ICC (posterior means): Random intercept" in text, p.name
            assert "ICC of the reference fits (swamy-arora): Random effects (GLS)" in text
    assert foot in (run / "tables" / "tests.tex").read_text("utf-8")
    page = (run / "report.html").read_text("utf-8")
    notes = re.findall(r'<p class="bp-tablenote">(.*?)</p>', page, re.S)
    for key in ("coefficients", "partition", "contrasts", "comparison"):
        sec = page.split(f'id="{key}"')[1].split("</section>")[0]
        assert "bp-tablenote" in sec and "N = 200 rows" in sec, key
    assert sum("ICC (posterior means)" in n for n in notes) >= 4


# ---------------------------------------------------------------------- what tests use
def test_each_fit_states_the_distribution_of_its_tests(grunfeld_run, grunfeld):
    """CR1 (the command line's default): every reference fit's p-values use t(G - 1) and
    its text says so; ML/REML with classical errors use the normal distribution. The
    p-values are scipy's t(9) and normal tail areas of estimate / SE."""
    run, res, _ = grunfeld_run
    for f in res["reference"]:
        assert f["test_distribution"] == "t(9)"
        assert "G - 1 = 9 degrees of freedom" in f["assumptions"]
        assert "normal distribution" not in f["assumptions"]
        for c in f["coefficients"]:
            assert c["p_value"] == pytest.approx(
                2 * stats.t.sf(abs(c["estimate"] / c["se"]), 9), rel=1e-9)
    panel = bp.Panel(grunfeld, unit="firm", time="year")
    reml = bp.reference.random(panel, FORMULA, method="reml", cov="classical")
    assert reml.test_distribution == "normal"
    assert reml.assumptions[-1].startswith("Tests and intervals use the normal distribution")
    np.testing.assert_allclose(reml.pvalues, 2 * stats.norm.sf(np.abs(reml.coef / reml.se)))
    reml_cl = bp.reference.random(panel, FORMULA, method="reml", cov="cluster")
    assert "G - 1 = 9" in reml_cl.assumptions[-1]
    assert "normal distribution" not in " ".join(reml_cl.assumptions)
    # the Mundlak test is read on F(q, G - 1), like the coefficients on t(G - 1)
    mt = next(t for t in res["tests"] if t["name"] == "mundlak")
    assert mt["distribution"] == "F(2, 9)"
    assert mt["reported_p_value"] == pytest.approx(
        stats.f.sf(mt["statistic"] / 2, 2, 9), rel=1e-9)
    assert ("differ (p < 0.05)" in mt["conclusion"]) == (mt["reported_p_value"] < 0.05)


def test_ml_reml_standard_errors_are_the_gls_covariance(grunfeld):
    """docs/reference-fits.md: ML/REML SEs are the GLS covariance at the estimates,
    (X' Omega^-1 X)^-1 with Omega from the fitted variance components (statsmodels GLS with
    that block covariance gives them to 1e-8). statsmodels MixedLM inverts the
    joint information of coefficients and variance parameters: on these data its SEs
    differ by under 1% (measured up to 2.5% on other panels; see the docs)."""
    import statsmodels.api as sm
    import statsmodels.formula.api as smf

    panel = bp.Panel(grunfeld, unit="firm", time="year")
    d = panel.design(FORMULA)
    for method in ("reml", "ml"):
        res = bp.reference.random(panel, FORMULA, method=method)
        block = res.sigma_unit ** 2 * np.ones((20, 20)) + res.sigma_obs ** 2 * np.eye(20)
        omega = np.kron(np.eye(10), block)  # Grunfeld is balanced: 10 firms x 20 years
        gls = sm.GLS(d.y, d.X, sigma=omega).fit()
        # (X' Omega^-1 X)^-1 with Omega known (statsmodels' bse would rescale it by the
        # whitened residual variance)
        np.testing.assert_allclose(res.se.to_numpy(), np.sqrt(np.diag(gls.normalized_cov_params)),
                                   rtol=1e-8)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            mm = smf.mixedlm(FORMULA, grunfeld, groups=grunfeld["firm"]).fit(
                reml=method == "reml", method=["lbfgs"])
        rel = np.abs(res.se.to_numpy() / mm.bse[res.labels].to_numpy() - 1)
        assert rel.max() < 0.01 and rel.max() > 1e-5  # close, and not the same convention


# ---------------------------------------------------------------------- boundary
def test_unit_variance_at_zero_is_flagged(zero_run, grunfeld):
    """Four Grunfeld firms (ZERO_FIRMS): statsmodels MixedLM (REML, Powell) puts the unit
    variance at about zero with the same occasion variance; linearmodels RandomEffects
    truncates its Swamy-Arora estimate at zero, and the untruncated value equals
    s_b^2 - s_w^2 / T from linearmodels' BetweenOLS and PanelOLS residual variances
    (Baltagi, Econometric Analysis of Panel Data, ch. 2, balanced form)."""
    import statsmodels.formula.api as smf
    from linearmodels.panel import BetweenOLS, PanelOLS, RandomEffects

    run, res = zero_run
    sub = grunfeld[grunfeld["firm"].isin(ZERO_FIRMS)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        mm = smf.mixedlm(FORMULA, sub, groups=sub["firm"]).fit(reml=True, method=["powell"])
    rnd = next(f for f in res["reference"] if f["name"] == "random")
    assert rnd["sigma_unit"] == 0.0 and rnd["icc"] == 0.0
    assert float(mm.cov_re.iloc[0, 0]) < 1e-6 * mm.scale
    assert rnd["sigma_obs"] ** 2 == pytest.approx(mm.scale, rel=1e-6)
    assert rnd["unit_variance_at_zero"] is True and "estimated at zero" in rnd["boundary_note"]
    assert all("unit_variance_at_zero" not in f for f in res["reference"]
               if f["name"] not in ("random", "mundlak", "within_between"))
    # the variance table and the page
    page = (run / "report.html").read_text("utf-8")
    part = page.split('id="partition"')[1].split("</section>")[0]
    assert "0 (at zero)" in part and "The unit variance is estimated at zero" in part
    glance = page.split('id="overview"')[1].split("</section>")[0]
    assert "Random effects (GLS), Mundlak (GLS), Within-between (GLS) estimate the unit " \
           "variance at zero" in glance
    _, vp = _md_rows(run / "tables" / "variance_partition.md")
    zero_rows = [r for r in vp if r["model"] == "Random effects (GLS) (ref.)"]
    assert {r["quantity"]: r["note"] for r in zero_rows} == {
        "unit SD": "estimated at zero", "occasion SD": "", "ICC": "estimated at zero"}
    assert "estimated at zero" in (run / "tables" / "coefficients.md").read_text("utf-8")
    # Swamy-Arora: truncated at zero and flagged, the raw value kept
    panel = bp.Panel(sub, unit="firm", time="year")
    sa = bp.reference.random(panel, FORMULA)
    assert sa.unit_variance_at_zero and sa.extra["boundary"]
    d = sub.set_index(["firm", "year"])
    lm_re = RandomEffects(d["invest"], d[["value", "capital"]].assign(const=1.0)).fit()
    assert lm_re.variance_decomposition["Effects"] == 0.0
    s_b2 = BetweenOLS(d["invest"], d[["value", "capital"]].assign(const=1.0)).fit().s2
    s_w2 = PanelOLS(d["invest"], d[["value", "capital"]], entity_effects=True).fit().s2
    assert sa.extra["sigma2_unit_raw"] == pytest.approx(s_b2 - s_w2 / 20, rel=1e-8)
    assert sa.extra["sigma2_unit_raw"] < 0
    # a fit away from the boundary says nothing of the kind
    full = bp.reference.random(bp.Panel(grunfeld, unit="firm", time="year"), FORMULA)
    assert not full.unit_variance_at_zero and full.boundary_note() == ""


def test_fixed_effects_describe_their_intercepts_by_a_share(grunfeld):
    """The within fit reports no unit SD and no ICC; the share of the outcome's variance
    its unit intercepts account for equals the one computed from linearmodels PanelOLS's
    estimated entity effects."""
    from linearmodels.panel import PanelOLS

    panel = bp.Panel(grunfeld, unit="firm", time="year")
    fe = bp.reference.within(panel, FORMULA, cov="cluster")
    d = grunfeld.set_index(["firm", "year"])
    lm = PanelOLS(d["invest"], d[["value", "capital"]].assign(const=1.0),
                  entity_effects=True).fit()
    eff = lm.estimated_effects["estimated_effects"]
    y = d["invest"]
    share = ((eff - eff.mean()) ** 2).sum() / ((y - y.mean()) ** 2).sum()
    assert fe.unit_intercept_share == pytest.approx(share, rel=1e-8)
    assert np.isnan(fe.sigma_unit) and np.isnan(fe.icc)
    text = fe.summary()
    assert "ICC" not in text and "unit SD" not in text
    assert "unit intercepts account for" in text
    assert list(fe.variance_partition().table().index) == [
        "occasion SD", "share of outcome variance in unit intercepts"]


# ---------------------------------------------------------------------- page width
def _chromium():
    return shutil.which("chromium") or shutil.which("chromium-browser")


_PROBE = """<script>
(function () {
  var out = [];
  document.querySelectorAll('table').forEach(function (t) {
    var box = t.closest('.bp-scroll') || t.parentElement;
    var sec = t.closest('section');
    out.push({section: sec ? sec.id : '', right: t.getBoundingClientRect().right,
              scroll: box.scrollWidth, client: box.clientWidth});
  });
  var pre = document.createElement('pre');
  pre.id = 'bp-probe';
  pre.textContent = JSON.stringify({view: document.documentElement.clientWidth,
                                    page: document.documentElement.scrollWidth, tables: out});
  document.body.appendChild(pre);
})();
</script>"""


def _measure(page_path, width, tmp_path):
    """Element widths of the report at a window width: a copy of the page with a probe
    script (the report itself forbids scripts) rendered by headless Chromium."""
    page = page_path.read_text("utf-8")
    page = re.sub(r'<meta http-equiv="Content-Security-Policy"[^>]*>', "", page)
    probe = tmp_path / f"probe_{width}.html"
    probe.write_text(page.replace("</body>", _PROBE + "</body>"), "utf-8")
    dom = subprocess.run(
        [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         f"--user-data-dir={tmp_path / f'profile_{width}'}", f"--window-size={width},1000",
         "--virtual-time-budget=3000", "--dump-dom", probe.as_uri()],
        capture_output=True, text=True, timeout=120).stdout
    m = re.search(r'<pre id="bp-probe">(.*?)</pre>', dom, re.S)
    assert m, "the probe did not run"
    return json.loads(html.unescape(m.group(1)))


@pytest.mark.skipif(_chromium() is None,
                    reason="Debian's chromium is not installed (.ci/run installs it when "
                           ".ci/needs-chromium exists)")
@pytest.mark.parametrize("width", [1280, 1920])
def test_no_table_is_cut_off(grunfeld_run, tmp_path, width):
    """At 1280 and 1920 px every table fits its column: nothing hidden behind a scroll bar
    (scrollWidth = clientWidth) and no right edge beyond the window."""
    run, res, _ = grunfeld_run
    m = _measure(run / "report.html", width, tmp_path)
    assert m["page"] <= m["view"] + 1
    sections = {t["section"] for t in m["tables"]}
    assert {"coefficients", "partition", "contrasts", "comparison", "diagnostics"} <= sections
    clipped = [t for t in m["tables"] if t["scroll"] > t["client"] + 1 or t["right"] > m["view"] + 1]
    assert not clipped, clipped
