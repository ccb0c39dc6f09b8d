"""The registry of model kinds (bayespanel.kinds): one record per kind, read everywhere.

Outside sources, named beside each check: the Grunfeld investment panel shipped by
statsmodels.datasets; statsmodels' OLS and MixedLM (REML) fitted on it.
"""

import sys
import warnings

import numpy as np
import pytest
import statsmodels.formula.api as smf

import bayespanel as bp
from bayespanel import kinds
from bayespanel.data.design import KINDS as DESIGN_KINDS
from bayespanel.core.errors import SpecificationError
from bayespanel.analysis.recovery import design_check
from bayespanel.report.results_json import schema
from bayespanel.app.runner import Settings

FORMULA = "invest ~ value + capital"


@pytest.fixture(scope="module")
def panel(grunfeld):
    return bp.Panel(grunfeld, unit="firm", time="year")


def test_registered_facts_agree_with_the_builders_and_the_reference_functions():
    assert set(kinds.COLUMNS) == set(DESIGN_KINDS)
    for k in kinds.models():
        cls = k.builder_class()
        assert cls is getattr(bp, k.class_name)
        assert (cls.kind, cls.unit_effects) == (k.columns, k.unit_effects), k.name
        assert k.reference in kinds.reference_names()
        assert kinds.reference(k.reference).unit_effects == k.unit_effects
    for r in kinds.references():
        assert callable(getattr(bp.reference, r.name))
    assert kinds.latent_model_names() == ("random_intercept", "within_between",
                                          "correlated_effects")


def test_every_name_of_a_kind_resolves_to_the_same_record(panel):
    for k in kinds.models():
        cls = k.builder_class()
        assert kinds.model(k.name) is kinds.model(k.class_name) is kinds.model(cls) is k
    with pytest.raises(SpecificationError, match="random_intercept"):
        kinds.model("random")  # a column map, not a model name: the message lists the names
    s = Settings(unit="firm", time="year", formula=FORMULA,
                 models=("RandomIntercept", bp.FixedEffects, "within_between"))
    assert s.models == ("random_intercept", "fixed_effects", "within_between")
    design = panel.design(FORMULA)
    by_name = design.build("within_between")
    assert type(by_name) is bp.WithinBetween
    assert by_name.spec == design.build(bp.WithinBetween).spec == design.build(
        "WithinBetween").spec


def test_design_check_takes_the_class_its_name_and_the_snake_name(panel, grunfeld):
    runs = [design_check(panel, m, FORMULA, truth="reference", replicates=3, bayes=False,
                         progress=False, seed=5)
            for m in ("random_intercept", "RandomIntercept", bp.RandomIntercept)]
    for other in runs[1:]:
        assert other.truth == runs[0].truth
        assert other.table().equals(runs[0].table())
    # truth="reference" is the REML random-intercept fit on the real outcome; outside
    # check: statsmodels MixedLM (REML) on the Grunfeld panel (statsmodels.datasets)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ml = smf.mixedlm(FORMULA, grunfeld, groups=grunfeld["firm"]).fit(reml=True)
    for term, value in runs[0].truth["coef"].items():
        assert value == pytest.approx(ml.fe_params[term], rel=1e-4, abs=1e-6)
    assert runs[0].truth["sigma_obs"] == pytest.approx(np.sqrt(ml.scale), rel=1e-4)


def test_the_design_check_verb_takes_a_class_name(panel, grunfeld, tmp_path, capsys):
    import pandas as pd

    from bayespanel.app.cli import main

    grunfeld.to_csv(tmp_path / "g.csv", index=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["design-check", str(tmp_path / "g.csv"), "--unit", "firm", "--time",
                     "year", "--formula", FORMULA, "--model", "WithinBetween",
                     "--reference-only", "--replicates", "3", "--quiet",
                     "--out", str(tmp_path / "dc")]) == 0
    capsys.readouterr()
    got = pd.read_csv(tmp_path / "dc" / "design_check.csv", index_col=[0, 1])
    api = design_check(panel, "within_between", FORMULA, truth="reference", replicates=3,
                       bayes=False, progress=False, seed=1).table()
    np.testing.assert_allclose(got["bias"].to_numpy(), api["bias"].to_numpy(), rtol=1e-9)


def test_a_reference_fit_has_one_title(panel, grunfeld):
    res = bp.reference.pooled(panel, FORMULA)
    assert res.summary().splitlines()[0] == kinds.reference("pooled").title == "Pooled OLS"
    # the numbers under that title: statsmodels OLS on the same rows
    ols = smf.ols(FORMULA, grunfeld).fit()
    np.testing.assert_allclose(res.coef.to_numpy(), ols.params.to_numpy(), rtol=1e-10)


def test_schema_enums_are_the_registered_names():
    import json
    from importlib import resources

    on_disk = json.loads(resources.files("bayespanel").joinpath(
        "schema/results.schema.json").read_text("utf-8"))["$defs"]
    live = schema()["$defs"]
    for part, names in (("model", kinds.model_names()),
                        ("reference_fit", kinds.reference_names())):
        assert on_disk[part]["properties"]["name"]["enum"] == list(names)
        assert live[part]["properties"]["name"]["enum"] == list(names)


# ---------------------------------------------------------------------- a kind added here
class WidePooled(bp.Pooled):
    """Pooled regression whose slopes have a wide normal prior: a throwaway kind, made and
    registered in this file only."""


WIDE = kinds.ModelKind(
    "wide_pooled", "WidePooled", WidePooled, columns="pooled", unit_effects="none",
    reference="pooled", title="Pooled regression, wide slope priors",
    assumptions="As the pooled regression, with slope priors 100 times wider.",
    priors={"coef": {"family": "normal", "sigma": 1000.0}})


@pytest.fixture(scope="module")
def wide():
    kinds.register(WIDE)
    yield WIDE
    kinds.unregister("wide_pooled")


@pytest.fixture(scope="module")
def wide_run(wide, grunfeld, tmp_path_factory):
    from bayespanel.app.cli import main

    folder = tmp_path_factory.mktemp("wide")
    grunfeld.to_csv(folder / "grunfeld.csv", index=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(["fit", str(folder / "grunfeld.csv"), "--unit", "firm", "--time", "year",
                   "--formula", FORMULA, "--models", "WidePooled", "--reference", "pooled",
                   "--draws", "300", "--tune", "300", "--chains", "2", "--seed", "3",
                   "--out", str(folder / "run"), "--quiet"])
    assert rc == 0
    return folder / "run"


def test_a_registered_kind_fits_through_the_api(wide, panel, grunfeld):
    m = WidePooled(panel, FORMULA)
    assert m.priors["value"].kwargs["sigma"] == 1000.0  # the kind's default prior
    assert WidePooled(panel, FORMULA, priors={"coef": {"family": "normal", "sigma": 5.0}}
                      ).priors["value"].kwargs["sigma"] == 5.0  # the user's wins
    assert bp.Pooled(panel, FORMULA).priors["value"].kwargs["sigma"] != 1000.0
    post = m.sample(draws=300, tune=300, chains=2, seed=3, progress=False)
    # outside check: with priors this wide the posterior mean is the least-squares fit,
    # statsmodels OLS on the Grunfeld panel (statsmodels.datasets)
    ols = smf.ols(FORMULA, grunfeld).fit()
    s = post.summary()
    for term in ("Intercept", "value", "capital"):
        assert abs(s.at[term, "mean"] - ols.params[term]) < 0.25 * s.at[term, "sd"], term


def test_a_registered_kind_runs_through_the_command_line_json_and_report(wide_run, grunfeld):
    from bayespanel.report.results_json import load_results, validate

    res = load_results(wide_run)
    validate(res)  # the schema's name enum comes from the registry
    (entry,) = res["models"]
    assert (entry["name"], entry["builder"], entry["title"], entry["reference_counterpart"]) \
        == ("wide_pooled", "WidePooled", WIDE.title, "pooled")
    assert entry["assumptions"] == WIDE.assumptions
    assert "1000" in entry["priors"]["value"]
    # outside check: statsmodels OLS on the same rows (the pooled reference fit agrees)
    ols = smf.ols(FORMULA, grunfeld).fit()
    for c in entry["coefficients"]:
        assert abs(c["estimate"] - ols.params[c["term"]]) < 0.25 * c["sd"], c["term"]
    (ref,) = res["reference"]
    for c in ref["coefficients"]:
        assert c["estimate"] == pytest.approx(ols.params[c["term"]], rel=1e-9)
    html = (wide_run / "report.html").read_text("utf-8")
    assert WIDE.title in html and WIDE.assumptions in html


class NarrowPooled(bp.Pooled):
    """A second throwaway builder, never registered."""


def test_registering_refuses_facts_that_contradict_the_builder_or_a_taken_name():
    from dataclasses import replace

    narrow = replace(WIDE, name="narrow_pooled", class_name="NarrowPooled",
                     builder=NarrowPooled)
    with pytest.raises(SpecificationError, match="columns='within' but the class has 'pooled'"):
        kinds.register(replace(narrow, columns="within"))
    with pytest.raises(SpecificationError, match="class_name='Other'"):
        kinds.register(replace(narrow, class_name="Other"))
    with pytest.raises(SpecificationError, match="'pooled' is registered"):
        kinds.register(replace(narrow, name="pooled"))
    with pytest.raises(SpecificationError, match="reference"):
        kinds.register(replace(narrow, reference="nowhere"))
    assert "narrow_pooled" not in kinds.model_names()


# ---------------------------------------------------------------------- installed kinds
TOY_MODULE = '''
import bayespanel as bp
from bayespanel import kinds


class ToyPooled(bp.Pooled):
    """A pooled model an installed package adds."""


KIND = kinds.ModelKind(
    "toy_pooled", "ToyPooled", "toy_kinds:ToyPooled", columns="pooled",
    unit_effects="none", reference="pooled", title="Toy pooled regression",
    assumptions="As the pooled regression.")
'''


@pytest.fixture
def installed_toy(tmp_path, monkeypatch):
    """A package installed the way pip leaves one (a module and its dist-info folder with
    an entry_points.txt, the format of the Python packaging specification "Entry points
    specification"), found on sys.path by importlib.metadata."""
    (tmp_path / "toy_kinds.py").write_text(TOY_MODULE, "utf-8")
    info = tmp_path / "toy_kinds-0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text("Metadata-Version: 2.1\nName: toy-kinds\nVersion: 0.1\n",
                                   "utf-8")
    (info / "entry_points.txt").write_text(
        "[bayespanel.kinds]\ntoy = toy_kinds:KIND\nbroken = toy_kinds:MISSING\n", "utf-8")
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.setattr(kinds.registry, "_PLUGINS_LOADED", False)
    yield
    if "toy_pooled" in kinds.registry._MODELS:
        kinds.unregister("toy_pooled")
    sys.modules.pop("toy_kinds", None)


def test_a_kind_from_an_installed_package_reaches_the_command_line(installed_toy, capsys):
    from bayespanel.app.cli import main

    with pytest.warns(UserWarning, match="'broken'.*not loaded"):  # skipped, named
        names = kinds.model_names()  # the first question loads the entry points
    assert names[-1] == "toy_pooled"
    toy = kinds.model("ToyPooled")
    assert toy.builder_class().__module__ == "toy_kinds"
    assert kinds.model(toy.builder_class()) is toy
    assert Settings(unit="firm", time="year", formula=FORMULA,
                    models=("ToyPooled",)).models == ("toy_pooled",)
    with pytest.raises(SystemExit) as stop:
        main(["fit", "--help"])
    assert stop.value.code == 0
    assert "toy_pooled" in capsys.readouterr().out
    assert schema()["$defs"]["model"]["properties"]["name"]["enum"][-1] == "toy_pooled"


# ---------------------------------------------------------------------- column maps
@pytest.mark.parametrize("columns", kinds.COLUMNS)
def test_true_coefficients_are_what_least_squares_finds_on_noiseless_data(columns):
    """Outside check: statsmodels OLS on each column map's columns of an outcome made
    without noise from known within, between and time-constant effects returns exactly
    the coefficients the registry's truth mapping gives, and its effects() maps them back."""
    import pandas as pd

    rng = np.random.default_rng(4)
    N, T = 12, 5
    unit = np.repeat(np.arange(N), T)
    df = pd.DataFrame({"unit": unit, "time": np.tile(np.arange(T), N),
                       "x": rng.normal(size=N * T) + rng.normal(size=N)[unit],
                       "z": rng.normal(size=N * T), "r": rng.normal(size=N)[unit]})
    equal = columns in ("pooled", "random")  # one coefficient for both effects
    w = {"x": 1.5, "z": -0.8}
    b = {"x": 1.5 if equal else 4.0, "z": -0.8}
    c, intercept = {"r": 2.0}, 3.0
    y = np.full(len(df), intercept) + c["r"] * df["r"]
    for x in w:
        mean = df.groupby("unit")[x].transform("mean")
        y = y + w[x] * (df[x] - mean) + b[x] * mean
    df["y"] = y
    design = bp.Panel(df, unit="unit", time="time").design("y ~ x + z + r")
    M, labels = design.matrices(columns)
    ybar = np.bincount(design.unit_codes, weights=design.y) / design.T   # unit means of y
    target = design.y if columns != "between" else ybar
    if columns == "within":
        target = design.y - ybar[design.unit_codes]
    ols = sm_ols(target, M)
    cmap = kinds.column_map(columns)
    truth = cmap.true_coefficients(w, b, c, intercept)
    assert set(truth) == set(labels)
    np.testing.assert_allclose([truth[lab] for lab in labels], ols, atol=1e-9)
    if cmap.within is not None:
        g_w, g_b = cmap.effects(design.terms, design.time_varying, labels, ols)
        np.testing.assert_allclose(g_w[0], [w["x"], w["z"]], atol=1e-9)
        if g_b is not None:
            np.testing.assert_allclose(g_b[0], [b["x"], b["z"], c["r"]], atol=1e-9)
    if cmap.contrast:  # between minus within, from the same fit
        L = cmap.contrast_matrix(labels, ["x", "z"])
        np.testing.assert_allclose(L @ ols, [b["x"] - w["x"], 0.0], atol=1e-9)


def sm_ols(y, M):
    import statsmodels.api as sm

    return sm.OLS(np.asarray(y), np.asarray(M)).fit().params


def test_one_coefficient_cannot_carry_unequal_effects():
    random = kinds.column_map("random")
    with pytest.raises(SpecificationError, match="different within .* of 'x'"):
        random.true_coefficients({"x": 1.0}, {"x": 2.0}, {"r": 1.0}, 0.5)
    # not strict: that covariate, the intercept and the time-constant ones are left out
    assert random.true_coefficients({"x": 1.0, "z": 3.0}, {"x": 2.0, "z": 3.0}, {"r": 1.0},
                                    0.5, strict=False) == {"z": 3.0}
    with pytest.raises(SpecificationError, match="no within/between contrast"):
        random.contrast_matrix(["x"], ["x"])
