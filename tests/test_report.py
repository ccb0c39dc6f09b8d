"""The whole run written to a folder, and the report built from it.

Outside checks, named beside each: the reference numbers in results.json and in the CSV
tables equal linearmodels' estimators on the same rows; results.json validates against
its JSON Schema with the jsonschema library; the report renders in Debian's headless
Chromium with every section and figure present and no script from a user string run.

One run (two Bayesian models, small draws) on the demo scenario with hostile column names
and title is shared by the module.
"""

import html
import json
import os
import re
import shutil
import subprocess
import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.report import html as rhtml
from bayespanel.report import load_results, validate
from bayespanel.app.runner import Settings, run

BAD_X = 'case<img src=x onerror="document.title=\'pwned\'">load'
BAD_UNIT = "clinic<script>document.title='pwned'</script>"
BAD_TITLE = "Clinics <script>document.title='pwned'</script> & co"


@pytest.fixture(scope="module")
def folder(tmp_path_factory, demo):
    df, truth = demo
    df = df.rename(columns={"caseload": BAD_X, "clinic": BAD_UNIT})
    truth = {**truth, "unit": BAD_UNIT, "within": {"staffing": 1.5, BAD_X: -0.8},
             "between": {"staffing": 4.0, BAD_X: -0.8}}
    out = tmp_path_factory.mktemp("report_run")
    path = out / "clinics.csv"
    df.to_csv(path, index=False)
    s = Settings(data=str(path), unit=BAD_UNIT, time="quarter",
                 formula=f"satisfaction ~ staffing + `{BAD_X}` + rural",
                 models=("within_between",), draws=200, tune=200, chains=2,
                 seed=3, title=BAD_TITLE, rope=0.5, ppc_draws=100)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        results = run(s, out=out / "run", truth=truth, quiet=True)
    return out / "run", results, df


def test_results_file_validates_against_its_schema(folder):
    import jsonschema  # outside check: the jsonschema library's Draft 2020-12 validator

    run_dir, results, _ = folder
    saved = json.loads((run_dir / "results.json").read_text("utf-8"))
    schema = bp.report.results_json.schema()
    jsonschema.Draft202012Validator(schema).validate(saved)
    assert saved["schema_version"] == bp.report.SCHEMA_VERSION
    assert [m["name"] for m in saved["models"]] == ["within_between"]
    # a file with a broken model entry is refused, naming where
    bad = json.loads(json.dumps(saved))
    del bad["models"][0]["diagnostics"]
    with pytest.raises(bp.SpecificationError, match="models/0"):
        validate(bad)


def test_reference_numbers_equal_linearmodels(folder):
    from linearmodels.panel import BetweenOLS, PanelOLS, PooledOLS

    run_dir, results, df = folder
    d = df.dropna().set_index([BAD_UNIT, "quarter"]).rename(columns={BAD_X: "caseload"})
    exog = d[["staffing", "caseload"]]
    # outside check: linearmodels PanelOLS with entity effects = our within fit
    fe = PanelOLS(d["satisfaction"], exog, entity_effects=True).fit(cov_type="clustered",
                                                                   cluster_entity=True)
    ref = {f["name"]: {c["term"]: c for c in f["coefficients"]} for f in results["reference"]}
    assert ref["within"]["staffing"]["estimate"] == pytest.approx(fe.params["staffing"], rel=1e-8)
    assert ref["within"][BAD_X]["estimate"] == pytest.approx(fe.params["caseload"], rel=1e-8)
    # outside check: linearmodels PooledOLS and BetweenOLS (exact least squares)
    X3 = d[["staffing", "caseload", "rural"]].assign(const=1.0)
    po = PooledOLS(d["satisfaction"], X3).fit()
    bo = BetweenOLS(d["satisfaction"], X3).fit()
    for name, lm in (("pooled", po), ("between", bo)):
        assert ref[name]["staffing"]["estimate"] == pytest.approx(lm.params["staffing"], rel=1e-8)
        assert ref[name]["rural"]["estimate"] == pytest.approx(lm.params["rural"], rel=1e-8)
    # the CSV table carries the same numbers
    long = pd.read_csv(run_dir / "tables" / "coefficients_long.csv")
    row = long[(long["term"] == "staffing") & (long["model"] == "Within (fixed effects) (ref.)")]
    assert float(row["estimate"].iloc[0]) == pytest.approx(fe.params["staffing"], rel=1e-8)


def test_bayesian_estimates_agree_with_linearmodels_within(folder):
    from linearmodels.panel import PanelOLS

    _, results, df = folder
    d = df.dropna().set_index([BAD_UNIT, "quarter"])
    fe = PanelOLS(d["satisfaction"], d[["staffing", BAD_X]], entity_effects=True).fit()
    wb = next(m for m in results["models"] if m["name"] == "within_between")
    c = {x["term"]: x for x in wb["coefficients"]}["staffing (within)"]
    # outside check: with weak priors the within part's posterior centres on the
    # fixed-effects estimate (linearmodels), within four posterior SDs
    assert abs(c["estimate"] - fe.params["staffing"]) < 4 * c["sd"]
    assert c["lower"] < c["estimate"] < c["upper"]
    vp = wb["variance_partition"]
    icc = {q["quantity"]: q for q in vp["summary"]}["ICC"]
    assert 0 < icc["lower"] < icc["median"] < icc["upper"] < 1
    assert len(vp["icc_draws"]) == 400
    assert wb["contrasts"] and wb["contrasts"][0]["covariate"] == "staffing"


def test_report_rebuilt_from_saved_results_is_identical(folder, tmp_path):
    from bayespanel.app.cli import main

    run_dir, results, _ = folder
    assert main(["report", str(run_dir), "--out", str(tmp_path)]) == 0
    assert (tmp_path / "report.html").read_bytes() == (run_dir / "report.html").read_bytes()
    assert load_results(run_dir) == json.loads((run_dir / "results.json").read_text("utf-8"))


def test_report_names_the_sampler_and_the_chains(folder):
    # a methods section needs the sampler and the run's length: both come from results.json
    run_dir, results, _ = folder
    text = html.unescape((run_dir / "report.html").read_text("utf-8"))
    sampling = results["models"][0]["sampling"]
    assert sampling["sampler"] == "bayespanel"
    assert ("Drawn with the No-U-Turn sampler (Hoffman and Gelman 2014): bayespanel's own "
            "sampler for every model. 2 chains of 200 draws after 200 warm-up iterations, "
            "seed 3.") in text


def test_every_user_string_is_escaped(folder):
    run_dir, _, _ = folder
    page = (run_dir / "report.html").read_text("utf-8")
    assert "<script" not in page.lower()
    assert "<img src=x" not in page and 'onerror="' not in page
    assert rhtml.esc(BAD_X) in page and rhtml.esc(BAD_UNIT) in page
    assert rhtml.esc(BAD_TITLE) in page
    assert "default-src 'none'" in page  # and a content policy forbids scripts outright


def test_tables_in_three_formats(folder):
    run_dir, results, _ = folder
    for stem in ("coefficients", "data_description", "variance_partition", "contrasts", "tests"):
        for ext in ("md", "tex", "csv"):
            assert (run_dir / "tables" / f"{stem}.{ext}").stat().st_size > 0
    tex = (run_dir / "tables" / "coefficients.tex").read_text()
    assert r"\begin{tabular}" in tex and r"case\textless{}img" in tex and "<img" not in tex
    md = (run_dir / "tables" / "data_description.md").read_text()
    assert md.splitlines()[1].startswith("|---")


def _chromium():
    return shutil.which("chromium") or shutil.which("chromium-browser")


def _chrome_args(tmp_path):
    return [_chromium(), "--headless", "--no-sandbox", "--disable-gpu",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--no-first-run", f"--user-data-dir={tmp_path / 'profile'}",
            "--virtual-time-budget=3000"]


@pytest.mark.skipif(_chromium() is None,
                    reason="Debian's chromium is not installed (.ci/run installs it when "
                           ".ci/needs-chromium exists)")
def test_report_renders_in_headless_chromium(folder, tmp_path):
    run_dir, results, _ = folder
    url = (run_dir / "report.html").resolve().as_uri()
    dom = subprocess.run(_chrome_args(tmp_path) + ["--dump-dom", url], capture_output=True,
                         text=True, timeout=120).stdout
    assert "</html>" in dom
    for key, heading in rhtml.SECTIONS:  # every section, with its heading
        assert f'data-section="{key}"' in dom and rhtml.esc(heading) in dom
    for fig in ("fig-coefficients", "fig-icc", "fig-loo", "fig-ppc"):
        m = re.search(rf'data-figure="{fig}"', dom)
        assert m, f"figure {fig} missing"
    n_img = len(re.findall(r"<img ", dom))
    assert n_img == len(re.findall(r'src="data:image/svg\+xml;base64,', dom))
    # no script from a user string ran or became an element
    title = re.search(r"<title>(.*?)</title>", dom).group(1)
    assert html.unescape(title) == BAD_TITLE  # the page's own title, not the payload's
    assert "<script" not in dom.lower() and 'src="x"' not in dom
    shot = tmp_path / "report.png"
    subprocess.run(_chrome_args(tmp_path) + ["--window-size=1400,4000", f"--screenshot={shot}",
                                             url], capture_output=True, timeout=120)
    from PIL import Image

    im = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert im.shape[0] == 4000 and im.std() > 10  # a page, not a blank
    keep = os.environ.get("BAYESPANEL_ARTIFACTS")
    if keep:
        os.makedirs(keep, exist_ok=True)
        shutil.copy(shot, os.path.join(keep, "report.png"))
    print(f"screenshot kept at {shot}")
