"""Hostile input: formulas and analysis files cannot run code or read files, report strings
are escaped, and loading saved results never unpickles.

Outside checks, named beside them: formulaic itself runs Python inside a formula (so the
screening is needed, shown on formulaic directly); Python's own ``pickle`` runs a payload
on loading (so a loader that unpickled would be caught by the marker file); the report is
parsed with the standard library's ``html.parser``; the data are the Grunfeld panel
shipped in statsmodels.datasets, and the reference numbers of the hostile-named run are
checked against statsmodels OLS.
"""

from __future__ import annotations

import os
import pickle
import re
import warnings
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.app.cli import main
from bayespanel.core.errors import FormulaError, SpecificationError

UNIT, TIME = "firm", "year"


@pytest.fixture
def marker(tmp_path):
    path = tmp_path / "payload-ran"
    yield path
    assert not path.exists(), "a hostile payload ran"


@pytest.fixture(scope="module")
def panel(grunfeld):
    return bp.Panel(grunfeld, unit=UNIT, time=TIME)


def _payloads(marker):
    touch = f"__import__('os').system('touch {marker}')"
    return [
        f"invest ~ value + {touch}",
        f"invest ~ value + {{{touch}}}",
        f"invest ~ I({touch})",
        f"invest ~ C(value, contr={touch})",
        f"invest ~ poly(value, degree=open('{marker}', 'w').write('x'))",
        f"invest ~ value + open('{marker}', 'w')",
        "invest ~ value + open('/etc/passwd').read()",
        "invest ~ value + np.load('/etc/passwd')",
        "invest ~ value + np.log.__globals__",
        "invest ~ value + numpy.lib.format",
        "invest ~ getattr(value, 'real')",
        "invest ~ value.real",
        "invest ~ (lambda: 1)()",
        "invest ~ [x for x in value]",
        "invest ~ value + globals()",
        "invest ~ value + vars()",
        "invest ~ value; import os",
        "invest ~ value @ value",
        "invest ~ (v := value)",
        "invest ~ value + f'{value}'",
        "invest ~ value\n+ exec('1')",
    ]


def test_formulaic_alone_would_run_the_payload(grunfeld, marker):
    # outside check: formulaic evaluates Python in a formula (why screening exists)
    from formulaic import model_matrix

    model_matrix(f"value + {{__import__('pathlib').Path('{marker}').touch() or 1}}",
                 grunfeld.head(3))
    assert marker.exists()
    marker.unlink()


def test_hostile_formulas_are_refused_before_evaluation(panel, marker):
    for formula in _payloads(marker):
        with pytest.raises(FormulaError) as info:
            panel.design(formula)
        assert "formula" in str(info.value) or "not allowed" in str(info.value), formula


def test_hostile_formulas_reach_neither_reference_nor_models(panel, marker):
    f = _payloads(marker)[0]
    with pytest.raises(FormulaError, match="double-underscore"):
        bp.reference.pooled(panel, f)
    with pytest.raises(FormulaError, match="double-underscore"):
        bp.models.RandomIntercept(panel, f)


def test_column_names_that_look_like_code_stay_names(grunfeld, marker):
    """A hostile CSV header: quoted with backticks, the name is looked up, never run.
    Outside check: the slope equals numpy's least squares on the same column."""
    name = f"__import__('os').system('touch {marker}')"
    df = grunfeld.rename(columns={"value": name})
    d = bp.Panel(df, UNIT, TIME).design(f"invest ~ `{name}` + capital")
    assert d.terms == ["Intercept", name, "capital"]
    res = bp.reference.pooled(bp.Panel(df, UNIT, TIME), f"invest ~ `{name}` + capital")
    X = np.column_stack([np.ones(len(df)), df[name], df["capital"]])
    beta = np.linalg.lstsq(X, df["invest"].to_numpy(), rcond=None)[0]
    assert res.coef[name] == pytest.approx(beta[1], rel=1e-10)


# ---------------------------------------------------------------------- analysis files
@pytest.fixture(scope="module")
def grunfeld_csv(tmp_path_factory, grunfeld):
    path = tmp_path_factory.mktemp("hostile") / "grunfeld.csv"
    grunfeld.to_csv(path, index=False)
    return path


class _Evil:
    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (os.system, (f"touch {self.marker}",))


def test_pickle_itself_would_run_the_payload(marker):
    # outside check: Python's pickle runs code on loading (what "never unpickle" prevents)
    pickle.loads(pickle.dumps(_Evil(marker)))
    assert marker.exists()
    marker.unlink()


def _fit_config(config, tmp_path, capsys):
    rc = main(["fit", "--config", str(config), "--out", str(tmp_path / "out"), "--quiet"])
    return rc, capsys.readouterr().err


def test_analysis_files_are_toml_only(grunfeld_csv, tmp_path, capsys, marker):
    py = tmp_path / "analysis.py"
    py.write_text(f"import os\nos.system('touch {marker}')\n")
    rc, err = _fit_config(py, tmp_path, capsys)
    assert rc == 2 and "is not valid TOML" in err
    pk = tmp_path / "analysis.toml"
    pk.write_bytes(pickle.dumps(_Evil(marker), protocol=4))
    rc, err = _fit_config(pk, tmp_path, capsys)
    assert rc == 2 and "is not valid TOML" in err and "Traceback" not in err
    pk.write_bytes(pickle.dumps(_Evil(marker), protocol=0))  # the ASCII protocol
    rc, err = _fit_config(pk, tmp_path, capsys)
    assert rc == 2 and "Traceback" not in err


def test_analysis_file_formula_is_screened(grunfeld_csv, tmp_path, capsys, marker):
    toml = tmp_path / "analysis.toml"
    toml.write_text(
        f'[data]\nfile = "{grunfeld_csv}"\nunit = "firm"\ntime = "year"\n'
        f"[model]\nformula = \"invest ~ value + {{__import__('os').system('touch {marker}')}}\"\n"
        'models = ["random_intercept"]\n')
    rc, err = _fit_config(toml, tmp_path, capsys)
    assert rc == 2 and "braces '{...}' (Python code)" in err
    assert not (tmp_path / "out" / "results.json").exists()


def test_analysis_file_has_no_code_section(grunfeld_csv, tmp_path, capsys, marker):
    toml = tmp_path / "analysis.toml"
    toml.write_text(f'[data]\nfile = "{grunfeld_csv}"\nunit = "firm"\ntime = "year"\n'
                    '[model]\nformula = "invest ~ value"\n'
                    f"[hooks]\nbefore = \"__import__('os').system('touch {marker}')\"\n")
    rc, err = _fit_config(toml, tmp_path, capsys)
    assert rc == 2 and "unknown section [hooks]" in err
    toml.write_text(f'[data]\nfile = "{grunfeld_csv}"\nunit = "firm"\ntime = "year"\n'
                    '[model]\nformula = "invest ~ value"\n'
                    f"[sampling]\nseed = \"__import__('os')\"\n")
    rc, err = _fit_config(toml, tmp_path, capsys)
    assert rc == 2 and "seed=" in err and "non-negative integer" in err


def test_data_file_named_by_an_analysis_file_is_read_as_a_table_only(tmp_path, capsys,
                                                                     marker):
    """The one path an analysis file names is read as CSV/Parquet; a script stays text."""
    script = tmp_path / "payload.csv"
    script.write_text(f"import os\nos.system('touch {marker}')\n")
    toml = tmp_path / "analysis.toml"
    toml.write_text(f'[data]\nfile = "{script}"\nunit = "firm"\ntime = "year"\n'
                    '[model]\nformula = "invest ~ value"\n')
    rc, err = _fit_config(toml, tmp_path, capsys)
    assert rc == 2 and "read as a single column" in err


# ---------------------------------------------------------------------- the report
class _Collector(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.handlers, self.text = [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.handlers += [k for k, _ in attrs if k.lower().startswith("on")]
        self.handlers += [k for k, v in attrs if v and v.strip().lower().startswith("javascript:")]

    def handle_data(self, data):
        self.text.append(data)


HOSTILE_COLUMN = "<script>alert('x')</script>"
HOSTILE_TITLE = "<img src=x onerror=alert(1)> & \"quotes\""


@pytest.fixture(scope="module")
def hostile_run(grunfeld, tmp_path_factory):
    from bayespanel.app.runner import Settings, run

    df = grunfeld.rename(columns={"value": HOSTILE_COLUMN})
    out = tmp_path_factory.mktemp("hostile_report")
    s = Settings(unit=UNIT, time=TIME, formula=f"invest ~ `{HOSTILE_COLUMN}` + capital",
                 models=(), reference=("pooled",), title=HOSTILE_TITLE)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        results = run(s, df=df, out=out, quiet=True)
    return out, results


def test_report_strings_are_escaped(hostile_run, grunfeld):
    out, results = hostile_run
    html = (out / "report.html").read_text("utf-8")
    parsed = _Collector()
    parsed.feed(html)  # outside check: the standard library's HTML parser
    assert "script" not in parsed.tags  # the report has no scripts at all
    assert not parsed.handlers
    assert HOSTILE_COLUMN not in html and "<img src=x" not in html
    text = "".join(parsed.text)
    assert HOSTILE_COLUMN in text and HOSTILE_TITLE in text  # shown, as text
    # the numbers next to the hostile label are right (outside check: statsmodels OLS)
    import statsmodels.api as sm

    ols = sm.OLS(grunfeld["invest"], sm.add_constant(grunfeld[["value", "capital"]])).fit()
    coef = {c["term"]: c["estimate"] for c in results["reference"][0]["coefficients"]}
    assert coef[HOSTILE_COLUMN] == pytest.approx(ols.params["value"], rel=1e-9)


def test_report_images_are_embedded_not_fetched(hostile_run):
    """No external resource: every src is a data URI (a shared report phones no one)."""
    html = (hostile_run[0] / "report.html").read_text("utf-8")
    srcs = re.findall(r'(?:src|href)="([^"]*)"', html)
    assert all(s.startswith(("data:", "#")) for s in srcs), [s[:40] for s in srcs
                                                           if not s.startswith("data:")]


# ---------------------------------------------------------------------- loading results
@pytest.fixture(scope="module")
def saved_posterior(panel, tmp_path_factory):
    path = tmp_path_factory.mktemp("post") / "ri.nc"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        post = bp.models.RandomIntercept(panel, "invest ~ value + capital").sample(
            draws=60, tune=60, chains=1, seed=3, progress=False)
    post.save(path)
    return post, path


def test_loading_a_posterior_never_unpickles(saved_posterior, monkeypatch, grunfeld):
    from bayespanel.bayes.posterior import Posterior

    import statsmodels.formula.api as smf  # imported before pickle is patched below

    post, path = saved_posterior

    def forbidden(*a, **k):
        raise AssertionError("pickle used while loading")

    for name in ("loads", "load", "Unpickler"):
        monkeypatch.setattr(pickle, name, forbidden)
    back = Posterior.load(path)
    pd.testing.assert_frame_equal(back.summary(), post.summary())
    # outside check: the posterior mean sits near statsmodels MixedLM (REML) on Grunfeld
    monkeypatch.undo()
    ml = smf.mixedlm("invest ~ value + capital", grunfeld, groups="firm").fit(reml=True)
    assert abs(back.coef["value"] - ml.params["value"]) < 5 * back.sd["value"]


def test_loading_a_pickle_is_refused_and_runs_nothing(tmp_path, marker):
    from bayespanel.bayes.posterior import Posterior
    from bayespanel.report import load_results

    evil = pickle.dumps(_Evil(marker), protocol=4)
    (tmp_path / "post.nc").write_bytes(evil)
    with pytest.raises(SpecificationError, match="not a posterior file written by Posterior"):
        Posterior.load(tmp_path / "post.nc")
    (tmp_path / "results.json").write_bytes(evil)
    with pytest.raises(SpecificationError, match="is not valid JSON"):
        load_results(tmp_path)


def test_a_netcdf_file_of_someone_else_is_refused(tmp_path):
    import xarray as xr

    from bayespanel.bayes.posterior import Posterior

    path = tmp_path / "other.nc"
    xr.Dataset({"a": ("x", np.arange(3.0))}).to_netcdf(path, engine="h5netcdf")
    with pytest.raises(SpecificationError, match="was not written by Posterior.save"):
        Posterior.load(path)


def test_the_package_source_has_no_unpickling_and_no_eval():
    """A static check of our own source: nothing unpickles, evaluates or shells out."""
    root = Path(bp.__file__).parent
    pattern = re.compile(r"^\s*(import pickle|from pickle|import cloudpickle|import dill)|"
                         r"\b(eval|exec)\(|allow_pickle\s*=\s*True|yaml\.|shell=True|"
                         r"os\.system\(|pd\.read_pickle|np\.load\(", re.M)
    hits = [f"{p.relative_to(root)}: {m.group(0).strip()}" for p in root.rglob("*.py")
            for m in pattern.finditer(p.read_text("utf-8"))]
    # The one exception: the compile cache stores compiled log densities (code, as
    # PyTensor's own compile folder does) and reads them only from a folder and files of
    # this user that nobody else can write (test_a_cache_entry_others_could_write_is_not_read).
    assert hits == ["bayes/logdensity.py: import pickle"] * 2
    cache = (root / "bayes" / "logdensity.py").read_text("utf-8")
    assert "if not (_private(path.parent) and _private(path)):" in cache


def test_a_cache_entry_others_could_write_is_not_read(tmp_path, monkeypatch):
    """An entry in a folder or file writable by the group or others, or behind a link, is
    never unpickled: a crafted entry that would write a file when loaded does nothing."""
    import os
    import pickle

    from bayespanel.bayes import sampling

    if not hasattr(os, "getuid"):
        pytest.skip("no file owners on this system")
    marker = tmp_path / "ran"

    class Payload:
        def __reduce__(self):
            return (Path.write_text, (marker, "code ran"))

    folder = tmp_path / "cache"
    folder.mkdir(mode=0o700)
    os.chmod(folder, 0o700)
    entry = folder / "entry.pkl"
    entry.write_bytes(pickle.dumps(Payload()))
    for folder_mode, entry_mode in [(0o770, 0o600), (0o707, 0o600), (0o700, 0o660),
                                    (0o700, 0o606)]:
        os.chmod(folder, folder_mode)
        os.chmod(entry, entry_mode)
        assert sampling._cache_load(entry, None) is None
        assert not marker.exists(), (oct(folder_mode), oct(entry_mode))
    os.chmod(folder, 0o700)
    link = folder / "link.pkl"
    link.symlink_to(entry)
    os.chmod(entry, 0o600)
    assert sampling._cache_load(link, None) is None and not marker.exists()
    # the control: the same entry, private, is read (and so the check above is what held)
    with pytest.raises(Exception):
        sampling._cache_load(entry, None)  # unpickled: the payload ran, then m=None fails
    assert marker.exists()
