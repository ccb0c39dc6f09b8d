"""The bad-input matrix: every kind of bad input is refused, before any sampling, with our
own error naming the problem (exit code 2 at the command line), or handled in a documented
and reported way. None returns numbers, none shows a traceback from a dependency.

Each row of :data:`CASES` is one kind of bad input, run through the Python API and, where
the command line has the option, through ``bayespanel.app.cli.main`` in-process (one case also
through a real ``python -m bayespanel`` subprocess). The sampler is replaced by a tripwire
for the whole module, so a case that reaches sampling fails.

Outside checks, named beside them: the panel is the Grunfeld investment data shipped in
statsmodels.datasets (Baltagi's ten firms), so the good path is a published panel; the
file-level cases are judged against what pandas and Python's codecs themselves refuse
(the refusal must be ours, with the file named); the "handled and reported" cases are
checked against a statsmodels OLS on the rows that remain.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
import warnings
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel import bayes as models
from bayespanel.app.cli import main
from bayespanel.analysis.contrasts import ContrastResult
from bayespanel.core.errors import (BayespanelError, DataHandlingWarning, EstimationError,
                               FormulaError, PanelDataError, SpecificationError)
from bayespanel.app.runner import Settings

F = "invest ~ value + capital"
UNIT, TIME = "firm", "year"


# ---------------------------------------------------------------------- the panel
@pytest.fixture(scope="module")
def base(grunfeld) -> pd.DataFrame:
    """Grunfeld (statsmodels.datasets), plus a time-constant column, counts and a 0/1 column."""
    df = grunfeld[[UNIT, TIME, "invest", "value", "capital"]].copy()
    df["size"] = df.groupby(UNIT)["capital"].transform("mean")  # constant within firms
    df["count"] = (df["invest"] // 50).astype(int)
    df["high"] = (df["invest"] > df["invest"].median()).astype(int)
    df["trials"] = df["count"] + 3
    return df.reset_index(drop=True)


@pytest.fixture(autouse=True)
def no_sampling(monkeypatch):
    """A tripwire: bad input must be refused before the sampler starts."""
    import bayespanel.bayes.sampling as sampling

    def tripwire(*args, **kwargs):
        raise AssertionError("sampling started on bad input")

    # below the option checks of sampling.run, which are part of what is tested
    monkeypatch.setattr(sampling, "_run_pymc", tripwire)
    monkeypatch.setattr(sampling, "_run_nutpie", tripwire)
    monkeypatch.setattr(sampling, "_run_own", tripwire)


# ---------------------------------------------------------------------- helpers
def _panel(df, unit=UNIT, time=TIME):
    return bp.Panel(df, unit=unit, time=time)


def _fit(builder="RandomIntercept", formula=F, draws=50, chains=1, seed=1, sampler="auto",
         **opts):
    """The Python API path: Panel -> builder -> sample (the tripwire stops real sampling)."""
    def call(df):
        m = getattr(models, builder)(_panel(df), formula, **opts)
        return m.sample(draws=draws, tune=50, chains=chains, seed=seed, sampler=sampler,
                        progress=False)
    return call


def _reference(estimator="random", formula=F, **kw):
    def call(df):
        return getattr(bp.reference, estimator)(_panel(df), formula, **kw)
    return call


@dataclass
class Case:
    """One kind of bad input.

    ``data`` turns the good panel into the bad one (or is ``(suffix, bytes)`` for a bad
    file); ``api`` is the Python call that must raise ``error`` matching ``match``;
    ``cli`` the extra command-line arguments (``None``: no such option at the command
    line), which must exit with code 2 and print ``match``.
    """

    id: str
    data: Callable | tuple | None
    api: Callable | None
    cli: list | None
    error: type
    match: str
    cli_match: str | None = None
    formula: str = F
    base_cli: list = field(default_factory=lambda: ["--models", "random_intercept",
                                                    "--reference", "random"])


def _set(col, row, value, dtype=None):
    def f(df):
        df = df.copy()
        if dtype is not None:
            df[col] = df[col].astype(dtype)
        if not pd.api.types.is_object_dtype(df[col]) and isinstance(value, str):
            df[col] = df[col].astype(object)
        df.loc[row, col] = value
        return df
    return f


def _assign(**cols):
    def f(df):
        return df.assign(**{k: (v(df) if callable(v) else v) for k, v in cols.items()})
    return f


def _first_occasion(df):
    return df[df[TIME] == df[TIME].min()].copy()


def _one_unit(df):
    return df[df[UNIT] == df[UNIT].iloc[0]].copy()


def _duplicate_row(df):
    return pd.concat([df, df.iloc[[7]]], ignore_index=True)


def _no_complete_rows(df):
    df = df.copy()
    half = df.index % 2 == 0
    df.loc[half, "value"] = np.nan
    df.loc[~half, "capital"] = np.nan
    return df


def _mixed_time(df):
    df = df.copy()
    df[TIME] = df[TIME].astype(object)
    df.loc[df[TIME] == 1940, TIME] = "1940"
    return df


def _columns_in_two_levels(df):
    df = df.copy()
    df.columns = pd.MultiIndex.from_tuples([(c, "a") for c in df.columns])
    return df


CSV_GOOD_HEADER = "firm,year,invest,value,capital\n"
CASES = [
    # --- the table as a panel
    Case("duplicate-unit-occasion", _duplicate_row, _fit(), [], PanelDataError,
         r"2 rows share a unit-occasion pair; the first is firm='[^']+', year=\d+"),
    Case("missing-unit", _set(UNIT, 5, np.nan), _fit(), [], PanelDataError,
         r"unit column 'firm' has 1 missing value\(s\); first at row"),
    Case("missing-time", _set(TIME, 9, np.nan), _fit(), [], PanelDataError,
         r"time column 'year' has 1 missing value\(s\)"),
    Case("unknown-unit-column", None, lambda df: _panel(df, unit="company"),
         ["--unit", "company"], PanelDataError, r"unit column 'company' is not in the table"),
    Case("unit-equals-time", None, lambda df: _panel(df, unit=TIME),
         ["--unit", TIME], PanelDataError, r"unit and time must be different columns"),
    Case("one-unit", _one_unit, _fit(), [], PanelDataError,
         r"the panel has 1 unit in column 'firm'; at least 2 are needed"),
    Case("one-occasion-everywhere", _first_occasion, _fit(), [], EstimationError,
         r"every unit has a single row", cli_match=r"single row"),
    Case("mixed-type-occasions", _mixed_time, _fit(), None, PanelDataError,
         r"time column 'year' mixes value types \(int, str\)"),
    Case("no-complete-rows", _no_complete_rows, _fit(), [], PanelDataError,
         r"no complete rows remain after dropping missing values"),
    # --- columns
    Case("all-missing-covariate", _assign(value=np.nan), _fit(), [], PanelDataError,
         r"column 'value' is missing on every row"),
    Case("all-missing-outcome", _assign(invest=np.nan), _fit(), [], PanelDataError,
         r"column 'invest' is missing on every row"),
    Case("constant-outcome", _assign(invest=3.0), _fit(), [], PanelDataError,
         r"the outcome 'invest' is constant \(3\.0\) on every row used"),
    Case("constant-covariate", _assign(capital=7.0), _fit(), [], PanelDataError,
         r"covariate 'capital' is constant \(7\.0\)"),
    Case("collinear-covariates", _assign(capital=lambda d: 2 * d["value"] - 1.0), _fit(), [],
         PanelDataError, r"covariates are exactly collinear: 'capital'"),
    Case("strings-in-covariate", _set("value", 3, "1,5"), _fit(), [], PanelDataError,
         r"column 'value' is not numeric .*'1,5' at firm='[^']+', year=193\d is not a number"),
    Case("strings-in-outcome", _set("invest", 3, "n.a."), _fit(), [], PanelDataError,
         r"column 'invest' is not numeric .*the outcome must be numeric"),
    Case("infinite-covariate", _set("capital", 11, np.inf), _fit(), [], PanelDataError,
         r"column 'capital' has 1 infinite value\(s\); the first at firm='[^']+', year=\d+"),
    Case("infinite-outcome", _set("invest", 0, -np.inf), _fit(), [], PanelDataError,
         r"column 'invest' has 1 infinite value"),
    Case("huge-scale", _assign(value=lambda d: d["value"] * 1e200), _fit(), [], PanelDataError,
         r"term 'value' has values of magnitude 6.*e\+203, outside 1e-100\.\.1e\+100"),
    Case("tiny-scale", _assign(invest=lambda d: d["invest"] * 1e-250), _fit(), [],
         PanelDataError, r"the outcome 'invest' has values of magnitude .*e-2\d\d.*underflow"),
    Case("log-of-negative", _assign(value=lambda d: d["value"] - 1000.0),
         _fit(formula="invest ~ log(value) + capital"), [], PanelDataError,
         r"term 'log\(value\)' is not finite at firm=", formula="invest ~ log(value) + capital"),
    Case("fixed-effects-only-time-constant", None, _fit("FixedEffects", formula="invest ~ size"),
         [], EstimationError, r"no covariate in 'invest ~ size' varies within units",
         formula="invest ~ size", base_cli=["--models", "fixed_effects", "--reference", "none"]),
    # --- files
    Case("empty-file", (".csv", b""), None, [], PanelDataError, r"file '.*bad\.csv' is empty"),
    Case("header-only", (".csv", CSV_GOOD_HEADER.encode()), None, [], PanelDataError,
         r"has a header but no rows"),
    Case("blank-lines-only", (".csv", b"\n\n\n"), None, [], PanelDataError,
         r"has no table in it"),
    Case("wrong-delimiter", (".csv", b"firm;year;invest\nA;1;2\nB;1;3\n"), None, [],
         PanelDataError, r"read as a single column 'firm;year;invest'.*try that delimiter"),
    Case("not-utf8", (".csv", "firm,year,invest,caf\xe9\nA,1,2,3\n".encode("latin-1")), None,
         [], PanelDataError, r"is not valid utf-8 text \(byte \d+\); save it as UTF-8"),
    Case("corrupt-parquet", (".parquet", b"PAR1 not really"), None, [], PanelDataError,
         r"cannot read Parquet '.*bad\.parquet'"),
    Case("missing-file", ("missing", b""), None, [], PanelDataError, r"does not exist"),
    # --- formulas
    Case("unknown-column-in-formula", None, _fit(formula="invest ~ value + kapital"), [],
         FormulaError, r"unknown column 'kapital' in formula", formula="invest ~ value + kapital"),
    Case("formula-without-tilde", None, _fit(formula="invest = value"), [], FormulaError,
         r"must have exactly one '~'", formula="invest = value"),
    Case("formula-running-code", None,
         _fit(formula="invest ~ value + __import__('os').getcwd()"), [], FormulaError,
         r"double-underscore names", formula="invest ~ value + __import__('os').getcwd()"),
    Case("unit-in-formula", None, _fit(formula="invest ~ value + C(firm)"), [], FormulaError,
         r"column 'firm' identifies the units", formula="invest ~ value + C(firm)"),
    # --- options
    Case("unknown-model", None,
         lambda df: Settings(unit=UNIT, time=TIME, formula=F, models=("random_slopes",)).check(),
         ["--models", "random_slopes"], SpecificationError,
         r"models='random_slopes' is not valid; choose one of 'pooled'"),
    Case("unknown-prior-family", None, _fit(priors={"value": "cauchyish"}),
         ["--prior", "value=cauchyish"], SpecificationError,
         r"prior family='cauchyish' is not valid; choose one of"),
    Case("unknown-prior-key", None, _fit(priors={"valeu": "normal"}),
         ["--prior", "valeu=normal"], SpecificationError, r"unknown key 'valeu'"),
    Case("negative-prior-scale", None, _fit(priors={"coef": {"family": "normal", "sigma": -1}}),
         ["--prior", "coef=normal:sigma=-1"], SpecificationError,
         r"sigma=-1(\.0)? must be finite and positive"),
    Case("too-few-draws", None, _fit(draws=2), ["--draws", "2"], SpecificationError,
         r"draws=2 is too few: split R-hat and ESS need at least 4",
         cli_match=r"draws=2 must be an integer >= 4"),
    Case("zero-chains", None, _fit(chains=0), ["--chains", "0"], SpecificationError,
         r"chains=0 must be an integer"),
    Case("negative-seed", None, _fit(seed=-3), ["--seed", "-3"], SpecificationError,
         r"seed=-3 must be a non-negative integer"),
    Case("interval-as-percent", None, lambda df: _reference()(df).interval(95),
         ["--interval", "95"], SpecificationError, r"95", cli_match=r"interval=95\.0 must be"),
    Case("unknown-sampler", None, _fit(sampler="hmc"), None, SpecificationError,
         r"sampler='hmc' is not valid; choose one of 'auto', 'bayespanel', 'pymc', 'nutpie'"),
    Case("unknown-likelihood", None, _fit(likelihood="exact"), None, SpecificationError,
         r"likelihood='exact' is not valid; choose one of 'marginal', 'latent'"),
    Case("unknown-reference-method", None, _reference(method="gls"), None, SpecificationError,
         r"method='gls' is not valid; choose one of 'swamy-arora', 'ml', 'reml'"),
    Case("unknown-reference-fit", None,
         lambda df: Settings(unit=UNIT, time=TIME, formula=F, reference=("ols",)).check(),
         ["--reference", "ols"], SpecificationError, r"reference='ols' is not valid"),
    # --- outcome families (Python API; the command line fits Gaussian models)
    Case("unknown-family", None, _fit(family="gamma"), None, SpecificationError,
         r"family='gamma' is not valid; choose one of 'gaussian'"),
    Case("negative-counts", _set("count", 4, -2), _fit(formula="count ~ value", family="poisson"),
         None, PanelDataError, r"family='poisson' needs outcome 'count' to be a non-negative "
         r"whole number; found -2 \(first at firm="),
    Case("fractional-counts", _set("count", 6, 2.5, float),
         _fit(formula="count ~ value", family="negative_binomial"), None, PanelDataError,
         r"non-negative whole number; found 2\.5"),
    Case("binary-outside-0-1", _set("high", 2, 2), _fit(formula="high ~ value",
                                                        family="bernoulli"),
         None, PanelDataError, r"family='bernoulli' needs outcome 'high' coded 0/1; found 2"),
    Case("successes-above-trials", _set("count", 8, 99),
         _fit(formula="count ~ value", family="binomial", trials="trials"), None,
         PanelDataError, r"outcome 'count' = 99 exceeds its trials"),
    Case("trials-for-poisson", None, _fit(formula="count ~ value", family="poisson",
                                          trials="trials"),
         None, SpecificationError, r"trials= is only used by family='binomial'"),
    # --- accepted silently before (issue 14)
    Case("rope-not-a-number", None,
         lambda df: Settings(unit=UNIT, time=TIME, formula=F, rope=float("nan")).check(),
         ["--rope", "nan"], SpecificationError, r"rope=nan must be a finite positive number"),
    Case("rope-not-a-number-api", None,
         lambda df: ContrastResult(np.zeros((8, 1)), ["value"], "within_between",
                                   rope=float("nan")),
         None, SpecificationError, r"rope=nan: half-widths must be finite positive numbers"),
    Case("occasion-effects-as-text", None, _reference(occasion_effects="no"), None,
         SpecificationError, r"occasion_effects='no' must be True or False"),
    Case("occasion-effects-as-text-builder", None, _fit(occasion_effects="no"), None,
         SpecificationError, r"occasion_effects='no' must be True or False"),
    Case("complex-column", _assign(value=lambda d: d["value"] + 1j), _fit(), [],
         PanelDataError, r"column 'value' holds complex numbers",
         cli_match=r"column 'value' is not numeric"),
    Case("ambiguous-date-occasions",
         _assign(**{TIME: lambda d: [f"{y % 12 + 1}/1/{y}" for y in d[TIME]]}), _fit(), [],
         PanelDataError, r"time column 'year' holds dates such as '\d+/1/19\d\d' that read "
                         r"both as month/day/year and as day/month/year"),
    Case("unit-given-as-a-list", None, lambda df: _panel(df, unit=[UNIT]), None,
         PanelDataError, r"unit must be the name of one column \(text\), got list \['firm'\]"),
    Case("multiindex-columns", _columns_in_two_levels, lambda df: bp.Panel(df, UNIT, TIME),
         None, PanelDataError, r"the table's columns have 2 levels \(a MultiIndex"),
    Case("text-as-a-term", None, _fit(formula='invest ~ value + I("abc")'), [],
         FormulaError, r"I\(.abc.\). in formula .* is text, not a column of numbers",
         formula='invest ~ value + I("abc")'),
    Case("formula-in-parts", None, _fit(formula="invest ~ value | capital"), [],
         FormulaError, r"'\|' in formula 'invest ~ value \| capital' would split it",
         formula="invest ~ value | capital"),
    Case("formula-syntax-error", None, _fit(formula="invest ~ value + "), [],
         FormulaError, r"Operator `\+` has insuffient arguments .*\(at '\+' in 'value \+'\)$",
         formula="invest ~ value + "),
    Case("unclosed-parenthesis", None, _fit(formula="invest ~ value + (capital"), [],
         FormulaError, r"a parenthesis or a quote is not closed",
         formula="invest ~ value + (capital"),
]
assert len({c.id for c in CASES}) == len(CASES)
assert len(CASES) >= 30


def _bad_frame(case, base):
    if case.data is None:
        return base
    return case.data(base.copy())


def _write(case, base, folder):
    """The case's data as a file (CSV for tables; the case's own bytes for bad files)."""
    if isinstance(case.data, tuple):
        suffix, raw = case.data
        path = folder / ("never-written.csv" if suffix == "missing" else f"bad{suffix}")
        if suffix != "missing":
            path.write_bytes(raw)
        return path
    path = folder / "panel.csv"
    _bad_frame(case, base).to_csv(path, index=False)
    return path


# ---------------------------------------------------------------------- the matrix
#: what a message must not hold: numpy reprs (np.float64(7.0)) and terminal codes
_UNREADABLE = re.compile(r"np\.(float|int|uint|bool|str)\w*\(|\x1b\[")

@pytest.mark.parametrize("case", [c for c in CASES if c.api is not None], ids=lambda c: c.id)
def test_python_api_refuses(case, base):
    df = _bad_frame(case, base)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        with pytest.raises(case.error, match=case.match) as info:
            case.api(df)
    assert isinstance(info.value, BayespanelError)  # ours, never a dependency's
    assert not _UNREADABLE.search(str(info.value)), str(info.value)


@pytest.mark.parametrize("case", [c for c in CASES if isinstance(c.data, tuple)],
                         ids=lambda c: c.id)
def test_python_api_refuses_bad_files(case, base, tmp_path):
    # outside check: pandas itself fails on (or mis-reads) each of these files; the
    # refusal must be ours and name the file
    path = _write(case, base, tmp_path)
    with pytest.raises(case.error, match=case.match):
        bp.Panel.from_file(path, unit=UNIT, time=TIME)


def _cli(argv, capsys):
    try:
        rc = main(argv)
    except SystemExit as exc:  # argparse's own usage errors exit with 2 as well
        rc = exc.code
    out = capsys.readouterr()
    return rc, out.out, out.err


@pytest.mark.parametrize("case", [c for c in CASES if c.cli is not None], ids=lambda c: c.id)
def test_command_line_exits_two(case, base, tmp_path, capsys):
    path = _write(case, base, tmp_path)
    out = tmp_path / "out"
    argv = (["fit", str(path), "--unit", UNIT, "--time", TIME, "--formula", case.formula,
             "--draws", "50", "--tune", "50", "--chains", "1", "--out", str(out), "--quiet"]
            + case.base_cli + case.cli)
    rc, stdout, stderr = _cli(argv, capsys)
    assert rc == 2, stderr
    assert stderr.startswith("bayespanel: error: "), stderr
    assert re.search(case.cli_match or case.match, stderr), stderr
    assert "Traceback" not in stderr + stdout
    assert not _UNREADABLE.search(stderr), stderr
    assert not (out / "results.json").exists()  # no numbers


def test_command_line_in_a_subprocess(base, tmp_path):
    """The real entry point: exit status 2, one line naming the column, no traceback."""
    path = tmp_path / "panel.csv"
    _set("capital", 11, np.inf)(base).to_csv(path, index=False)
    proc = subprocess.run(
        [sys.executable, "-m", "bayespanel", "fit", str(path), "--unit", UNIT, "--time", TIME,
         "--formula", F, "--out", str(tmp_path / "out"), "--quiet"],
        capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert "column 'capital' has 1 infinite value(s)" in proc.stderr
    assert "Traceback" not in proc.stderr and proc.stderr.count("\n") == 1


def test_usage_errors_exit_two(capsys):
    # argparse (standard library) exits with status 2 for unknown options and bad types
    rc, _, err = _cli(["fit", "x.csv", "--out", "o", "--draws", "ten"], capsys)
    assert rc == 2 and "invalid int value: 'ten'" in err
    rc, _, err = _cli(["fit", "x.csv", "--out", "o", "--sampler", "hmc"], capsys)
    assert rc == 2 and "invalid choice: 'hmc'" in err
    rc, _, err = _cli(["fit", "--out", "o"], capsys)
    assert rc == 2 and "fit needs FILE, --unit, --time, --formula" in err


# ---------------------------------------------------------------------- handled and reported
def test_missing_values_are_dropped_and_reported(base):
    """Listwise deletion is the documented handling: a DataHandlingWarning counts the rows
    per column, and the fit uses exactly the complete rows (outside check: statsmodels OLS
    on ``dropna()``)."""
    import statsmodels.api as sm

    df = base.copy()
    df.loc[[3, 40, 41], "value"] = np.nan
    df.loc[[100], "capital"] = np.nan
    with pytest.warns(DataHandlingWarning, match=r"dropped 4 of 200 rows.*value: 3, capital: 1"):
        res = bp.reference.pooled(_panel(df), F, cov="classical")
    ok = df.dropna(subset=["value", "capital"])
    ols = sm.OLS(ok["invest"], sm.add_constant(ok[["value", "capital"]])).fit()
    np.testing.assert_allclose(res.coef[["Intercept", "value", "capital"]].to_numpy(),
                               ols.params.to_numpy(), rtol=1e-10)
    assert res.n_obs == 196


def test_fixed_effects_name_the_time_constant_covariate(base, tmp_path, capsys):
    """A covariate constant within units cannot be estimated by fixed effects: the model
    leaves it out and says so (Python warning; results.json warnings at the command line).
    Outside check: linearmodels' PanelOLS refuses to keep it too (absorbed)."""
    from linearmodels.panel import PanelOLS

    formula = "invest ~ value + capital + size"
    with pytest.warns(DataHandlingWarning, match=r"FixedEffects leaves out 'size'"):
        m = models.FixedEffects(_panel(base), formula)
    assert m.labels == ["value", "capital"]
    d = base.set_index([UNIT, TIME])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        lm = PanelOLS(d["invest"], d[["value", "capital", "size"]], entity_effects=True,
                      drop_absorbed=True).fit()
    assert "size" not in lm.params.index
    ref = bp.reference.within(_panel(base), formula)
    assert "size" in ref.dropped and "size" not in ref.coef.index


def test_nearly_collinear_design_warns_with_the_condition_number(base):
    """Outside check: numpy's SVD condition number of the centred, standardised covariates
    (the number in the message), and no warning for the plain Grunfeld design (condition
    number about 1.8; Belsley, Kuh and Welsch's threshold of 30 is common practice)."""
    rng = np.random.default_rng(4)
    df = base.assign(value2=lambda d: d["value"] * (1 + 1e-4 * rng.standard_normal(len(d))))
    Z = df[["value", "capital", "value2"]].to_numpy()
    Z = (Z - Z.mean(axis=0)) / Z.std(axis=0)
    expected = np.linalg.cond(Z)
    with pytest.warns(DataHandlingWarning, match=r"nearly collinear \(condition number") as rec:
        d = _panel(df).design("invest ~ value + capital + value2")
    msg = next(str(w.message) for w in rec if "collinear" in str(w.message))
    reported = float(msg.split("condition number ")[1].split(" ")[0])
    assert reported == pytest.approx(expected, rel=1e-2)
    assert "'value'" in msg and "'value2'" in msg and "'capital'" not in msg.split("involved")[1]
    assert d.k == 4
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _panel(base).design(F)  # well conditioned: no warning


def test_results_json_of_a_refused_run_is_never_written(base, tmp_path, capsys):
    """A bad input after an earlier good run leaves the earlier results untouched."""
    path = tmp_path / "panel.csv"
    base.to_csv(path, index=False)
    out = tmp_path / "out"
    argv = ["fit", str(path), "--unit", UNIT, "--time", TIME, "--formula", F, "--models",
            "none", "--reference", "pooled", "--out", str(out), "--quiet"]
    assert _cli(argv, capsys)[0] == 0
    before = (out / "results.json").read_bytes()
    argv[argv.index(F)] = "invest ~ value + nosuch"
    rc, _, err = _cli(argv, capsys)
    assert rc == 2 and "unknown column 'nosuch'" in err
    assert (out / "results.json").read_bytes() == before
    res = json.loads(before)
    # outside check: statsmodels OLS on Grunfeld for the estimate kept from the good run
    import statsmodels.api as sm

    ols = sm.OLS(base["invest"], sm.add_constant(base[["value", "capital"]])).fit()
    est = {c["term"]: c["estimate"] for c in res["reference"][0]["coefficients"]}
    assert est["value"] == pytest.approx(ols.params["value"], rel=1e-9)
