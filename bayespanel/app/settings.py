"""The settings of a run (:class:`Settings`): their defaults, checks, the analysis file
(TOML) they are written to and read from (:func:`load_settings`), and the choices the
command line offers."""

from __future__ import annotations

import json
import os
import re
import tomllib
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path

from .. import kinds
from ..core.ar1 import ERRORS
from ..core.errors import SpecificationError, choices_error
from ..bayes.families import FAMILIES
from ..bayes.sampling import MIN_DRAWS, SAMPLERS
from ..core.options import get_option

__all__ = ["Settings", "load_settings", "LEVELS", "SAMPLERS", "COVS", "RE_METHODS",
           "LOO_OBSERVATIONS", "MAX_REFITS"]

LEVELS = ("occasion", "unit")
COVS = ("classical", "cluster", "cr2")
RE_METHODS = ("swamy-arora", "ml", "reml")
LOO_OBSERVATIONS = 400
MAX_REFITS = 10


@dataclass(frozen=True)
class Settings:
    """Every choice of a run (see docs/cli.md for the analysis-file form).

    Parameters
    ----------
    unit, time, formula : str
        Panel columns and the Wilkinson formula.
    data : str, optional
        CSV or Parquet file (``None`` when a DataFrame is passed to :func:`run`).
    models : tuple of str
        Bayesian models by snake-case name (:func:`bayespanel.kinds.model_names`):
        ``pooled``, ``random_intercept``, ``within_between``, ``correlated_effects``,
        ``fixed_effects`` and any kind registered later; default all of them.
    reference : tuple of str
        Reference fits: ``pooled``, ``within``, ``between``, ``random``, ``mundlak``,
        ``within_between``.
    priors : dict
        Prior overrides by term label or ``coef``, ``sigma_obs``, ``sigma_unit`` (see
        docs/priors.md); applied to every model where the key exists.
    draws, tune, chains, seed, sampler : sampling controls (the seed fixes every draw).
    cov, re_method : reference covariance (default CR1 by unit) and variance-component
        method of the random-intercept reference fits.
    level : {"occasion", "unit"}
        The LOO level of the comparison.
    rope : float, optional
        Half-width of the region of practical equivalence for the contrasts.
    interval : float
        Probability of every interval reported (default: the package's ``interval``
        option when the settings are made, :func:`bayespanel.set_option`).
    occasion_effects : bool
        One indicator per occasion in every model.
    initial_conditions : bool
        With the lagged outcome among the covariates (``lag(y)``), model the unit effect
        given the first outcome (Wooldridge 2005; bayespanel.data.initial). Default True.
    ppc_draws : int
        Posterior draws used for the predictive checks.
    reference_folds : int, optional
        How reference fits enter the LOO table: ``None`` or ``0`` exact leave-one-out
        refits at every size (closed form, from downdated statistics); ``K >= 2`` grouped
        K-fold (the comparison then says what mixing methods means for the ranking).
    refit_high_k : bool
        Replace the PSIS-LOO points whose Pareto k is above the threshold by exact refits
        (one posterior sample each, the compiled model reused), at most ``max_refits``
        per model.
    max_refits : int
        Most exact refits per model (default ``MAX_REFITS``); with more high-k points the
        PSIS values stay and the problem list says so.
    title : str, optional
    delimiter : str, optional
        Field delimiter of a CSV file (one character); default ``,`` (tab for ``.tsv``).
    out_of_core : bool
        Read the Parquet file or folder on Dask and work from one-pass statistics
        (docs/cli.md lists what is left out and why).
    loo_observations : int, optional
        Out of core: points sampled by the sub-sampled LOO (default ``LOO_OBSERVATIONS``).
    family : str
        Outcome family (docs/families.md): ``gaussian`` (default), ``student_t``,
        ``bernoulli``, ``binomial``, ``poisson``, ``negative_binomial``. Families other
        than ``gaussian``, and random slopes, are fitted by the kinds with latent effects
        only (:func:`bayespanel.kinds.latent_model_names`); their reference fits are
        pooled GLMs (:func:`bayespanel.kinds.glm_reference_names`) for the logit and log
        links.
    trials : str, optional
        Column with the binomial trials of every row (``family="binomial"`` only).
    exposure : str, optional
        Column with the exposure of every row, entering counts as ``log(exposure)``
        (``poisson`` and ``negative_binomial`` only).
    random_slopes : tuple of str
        Time-varying covariates whose (within) slope varies by unit (at most two).
    centred : bool
        Centred instead of non-centred latent unit effects (docs/families.md).
    errors : {"iid", "ar1"}
        Occasion-level errors of the Gaussian models: independent given the unit
        intercept (default), or AR(1) within units on the time column's own spacing
        (docs/serial-correlation.md). AR(1) errors apply to the Gaussian family without
        random slopes, with the rows in memory.

    ``models`` and ``reference`` default to every model and reference fit that applies
    to the family: all five and all six for the Gaussian family without random slopes.
    """

    unit: str
    time: str
    formula: str
    data: str | None = None
    models: tuple | None = None
    reference: tuple | None = None
    priors: dict = field(default_factory=dict)
    draws: int = 1000
    tune: int = 1000
    chains: int = 4
    seed: int = 1
    sampler: str = "auto"
    cov: str = "cluster"
    re_method: str = "swamy-arora"
    level: str = "occasion"
    rope: float | None = None
    interval: float = field(default_factory=lambda: get_option("interval"))
    occasion_effects: bool = False
    initial_conditions: bool = True
    ppc_draws: int = 200
    reference_folds: int | None = None
    refit_high_k: bool = False
    max_refits: int = MAX_REFITS
    title: str | None = None
    data_sha256: str | None = None
    delimiter: str | None = None
    out_of_core: bool = False
    loo_observations: int | None = None
    family: str = "gaussian"
    trials: str | None = None
    exposure: str | None = None
    random_slopes: tuple = ()
    centred: bool = False
    errors: str = "iid"

    def __post_init__(self):
        # values of the wrong type are kept as they are for check() to refuse by name
        defaults = {"models": (kinds.latent_model_names() if self.latent
                               else kinds.model_names()),
                    "reference": (kinds.glm_reference_names() if self.glm_reference
                                  else kinds.reference_names())}
        for name in ("models", "reference", "random_slopes"):
            v = getattr(self, name)
            if v is None:
                v = defaults[name]
            if isinstance(v, str):
                v = tuple(x.strip() for x in v.split(",") if x.strip())
            if isinstance(v, (list, tuple)):
                if name == "models":  # class names and classes become snake-case names
                    v = [kinds.snake_name(m) for m in v]
                object.__setattr__(self, name, tuple(v))
        if isinstance(self.data, os.PathLike):
            object.__setattr__(self, "data", os.fspath(self.data))
        if self.priors is None or isinstance(self.priors, dict):
            object.__setattr__(self, "priors", dict(self.priors or {}))
        lkj = self.priors.get("lkj_eta") if isinstance(self.priors, dict) else None
        if isinstance(lkj, str):
            try:
                self.priors["lkj_eta"] = float(lkj)
            except ValueError:
                pass  # refused by check() with the option named

    @property
    def latent(self) -> bool:
        """True when the models have latent unit effects: a family other than the
        Gaussian, or random slopes."""
        return self.family != "gaussian" or bool(self.random_slopes)

    @property
    def glm_reference(self) -> bool:
        """True when the reference fits are pooled GLMs (logit and log-link families)."""
        return self.family not in ("gaussian", "student_t")

    # ------------------------------------------------------------------ checks
    def check(self) -> "Settings":
        """Check every option before any work; messages name the option and the choices."""
        for name in ("unit", "time", "formula"):
            v = getattr(self, name)
            if not isinstance(v, str) or not v.strip():
                raise SpecificationError(f"{name} is required (got {v!r})")
        for name in ("models", "reference"):
            v = getattr(self, name)
            if not isinstance(v, tuple) or not all(isinstance(x, str) for x in v):
                raise SpecificationError(f"{name}={v!r} must be a list of names (or a "
                                         "comma-separated string)")
        for name in ("data", "title", "data_sha256"):
            v = getattr(self, name)
            if v is not None and not isinstance(v, str):
                raise SpecificationError(f"{name}={v!r} must be text")
        if not isinstance(self.priors, dict):
            raise SpecificationError(f"priors={self.priors!r} must be a mapping of prior keys "
                                     "to families")
        for m in self.models:
            if m not in kinds.model_names():
                raise choices_error("models", m, kinds.model_names())
        for r in self.reference:
            if r not in kinds.reference_names():
                raise choices_error("reference", r, kinds.reference_names())
        if len(set(self.models)) != len(self.models):
            raise SpecificationError(f"models={list(self.models)!r} names a model twice")
        if not self.models and not self.reference:
            raise SpecificationError("nothing to fit: models and reference are both empty")
        for name, lo in (("draws", MIN_DRAWS), ("tune", 0), ("chains", 1), ("ppc_draws", 1)):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int) or v < lo:
                raise SpecificationError(f"{name}={v!r} must be an integer >= {lo}")
        if isinstance(self.seed, bool) or not isinstance(self.seed, int) or self.seed < 0:
            raise SpecificationError(f"seed={self.seed!r} must be a non-negative integer")
        if self.sampler not in SAMPLERS:
            raise choices_error("sampler", self.sampler, SAMPLERS)
        if self.cov not in COVS:
            raise choices_error("cov", self.cov, COVS)
        if self.re_method not in RE_METHODS:
            raise choices_error("re_method", self.re_method, RE_METHODS)
        if self.level not in LEVELS:
            raise choices_error("level", self.level, LEVELS)
        if not isinstance(self.interval, (int, float)) or not 0 < self.interval < 1:
            raise SpecificationError(f"interval={self.interval!r} must be a number in (0, 1)")
        if self.reference_folds is not None and (
                isinstance(self.reference_folds, bool) or not isinstance(self.reference_folds, int)
                or self.reference_folds == 1 or self.reference_folds < 0):
            raise SpecificationError(f"reference_folds={self.reference_folds!r} must be 0 "
                                     "(exact leave-one-out) or an integer K >= 2")
        if not isinstance(self.refit_high_k, bool):
            raise SpecificationError(f"refit_high_k={self.refit_high_k!r} must be true or false")
        if isinstance(self.max_refits, bool) or not isinstance(self.max_refits, int) \
                or self.max_refits < 1:
            raise SpecificationError(f"max_refits={self.max_refits!r} must be an integer >= 1")
        if self.out_of_core and self.refit_high_k:
            raise SpecificationError(
                "refit_high_k: exact refits need the rows, which the out-of-core route does "
                "not load; drop refit_high_k or out_of_core")
        if self.rope is not None and (isinstance(self.rope, bool) or not isinstance(
                self.rope, (int, float)) or not 0 < self.rope < float("inf")):
            raise SpecificationError(f"rope={self.rope!r} must be a finite positive number")
        if self.delimiter is not None and (not isinstance(self.delimiter, str)
                                           or len(self.delimiter) != 1):
            raise SpecificationError(
                f"delimiter={self.delimiter!r} must be one character, such as ';' or '|' "
                "(a tab: 'tab' on the command line, \"\\t\" in an analysis file)")
        if self.delimiter is not None and self.out_of_core:
            raise SpecificationError("delimiter applies to CSV files; out_of_core reads Parquet")
        if not isinstance(self.out_of_core, bool):
            raise SpecificationError(f"out_of_core={self.out_of_core!r} must be true or false")
        if self.loo_observations is not None and (
                isinstance(self.loo_observations, bool)
                or not isinstance(self.loo_observations, int) or self.loo_observations < 2):
            raise SpecificationError(f"loo_observations={self.loo_observations!r} must be an "
                                     "integer >= 2")
        if self.out_of_core and self.reference_folds is not None:
            raise SpecificationError(
                "reference_folds: the reference fits' cross-validation refits need the rows, "
                "which the out-of-core route does not load; drop reference_folds or "
                "out_of_core")
        if not isinstance(self.occasion_effects, bool):
            raise SpecificationError(f"occasion_effects={self.occasion_effects!r} must be "
                                     "true or false")
        if not isinstance(self.initial_conditions, bool):
            raise SpecificationError(f"initial_conditions={self.initial_conditions!r} must be "
                                     "true or false")
        self._check_family()
        self._check_errors()
        from ..bayes.latent import EXTRA_PRIOR_KEYS
        from ..bayes.priors import check_prior

        for k, v in self.priors.items():
            if k == "lkj_eta":
                if isinstance(v, bool) or not isinstance(v, (int, float)) or not v > 0:
                    raise SpecificationError(f"priors['lkj_eta']={v!r} must be a positive "
                                             "number (the LKJ shape of the random-slope "
                                             "correlations)")
                continue
            if not isinstance(v, (str, dict)):
                raise SpecificationError(
                    f"priors[{k!r}]={v!r}: give a family name such as 'gamma2' or a table "
                    "like {family = 'normal', sigma = 10}")
            if k not in EXTRA_PRIOR_KEYS:
                check_prior(k, v)  # family and parameters, before any data is read
        return self

    def _check_family(self):
        """The family, its columns and the models and reference fits that apply to it."""
        if self.family not in FAMILIES:
            raise choices_error("family", self.family, FAMILIES)
        for name in ("trials", "exposure"):
            v = getattr(self, name)
            if v is not None and (not isinstance(v, str) or not v.strip()):
                raise SpecificationError(f"{name}={v!r} must be a column name")
        if self.family == "binomial" and self.trials is None:
            raise SpecificationError("family='binomial' needs trials: the column with the "
                                     "number of trials of every row (--trials COL)")
        if self.trials is not None and self.family != "binomial":
            raise SpecificationError(f"trials={self.trials!r} is used by family='binomial' "
                                     f"only, not {self.family!r}")
        if self.exposure is not None and self.family not in ("poisson", "negative_binomial"):
            raise SpecificationError(f"exposure={self.exposure!r} is used by the count "
                                     "families ('poisson', 'negative_binomial') only, not "
                                     f"{self.family!r}")
        if not all(isinstance(x, str) and x for x in self.random_slopes):
            raise SpecificationError(f"random_slopes={list(self.random_slopes)!r} must be "
                                     "covariate names")
        if len(set(self.random_slopes)) != len(self.random_slopes):
            raise SpecificationError(f"random_slopes={list(self.random_slopes)!r} names a "
                                     "covariate twice")
        if len(self.random_slopes) > 2:
            raise SpecificationError(f"random_slopes={list(self.random_slopes)!r}: at most "
                                     "two random slopes are supported")
        if not isinstance(self.centred, bool):
            raise SpecificationError(f"centred={self.centred!r} must be true or false")
        if not self.latent:
            if self.centred:
                raise SpecificationError("centred applies to latent unit effects only (a "
                                         "family other than gaussian, or random slopes)")
            return
        what = (f"family={self.family!r}" if self.family != "gaussian" else "random slopes")
        bad = [m for m in self.models if m not in kinds.latent_model_names()]
        if bad:
            raise SpecificationError(
                f"models: {', '.join(bad)} cannot fit {what}; the models that can are "
                f"{', '.join(kinds.latent_model_names())}")
        if self.glm_reference:
            bad = [r for r in self.reference if r not in kinds.glm_reference_names()]
            if bad:
                raise SpecificationError(
                    f"reference: {', '.join(bad)} has no counterpart for family="
                    f"{self.family!r} (a linear fit of a {self.family} outcome would not match "
                    f"the models); the reference fits for it are pooled GLMs on the columns "
                    f"of {', '.join(kinds.glm_reference_names())}")
            if self.cov == "cr2":
                raise SpecificationError(
                    f"cov='cr2' is for the linear reference fits; the reference GLMs of "
                    f"family={self.family!r} take 'cluster' or 'classical'")
        if self.out_of_core:
            raise SpecificationError(
                f"out_of_core: {what} needs the rows (latent unit effects are sampled row by "
                "row); drop out_of_core or use the Gaussian family without random slopes")

    def _check_errors(self):
        """The occasion-level errors and the routes that can fit them."""
        if self.errors not in ERRORS:
            raise choices_error("errors", self.errors, ERRORS)
        if self.errors == "iid":
            return
        if self.latent:
            what = (f"family={self.family!r}" if self.family != "gaussian"
                    else "random slopes")
            raise SpecificationError(
                f"errors='ar1' applies to the Gaussian models without random slopes, not to "
                f"{what}; drop errors='ar1' (--errors) or fit the Gaussian family")

    # ------------------------------------------------------------------ files
    def to_dict(self) -> dict:
        d = asdict(self)
        for k in ("models", "reference", "random_slopes"):
            d[k] = list(getattr(self, k))
        if self.initial_conditions:  # the default: runs without it keep their settings
            del d["initial_conditions"]
        return d

    def to_toml(self) -> str:
        """The analysis file that repeats this run (``bayespanel fit --config FILE``)."""
        lines = ["# bayespanel analysis file: `bayespanel fit --config THIS_FILE --out DIR`",
                 "# repeats the run exactly (same data, checked by SHA-256, same seeds)."]
        if self.title is not None:
            lines.append(f"title = {_toml_value(self.title)}")
        lines += ["", "[data]"]
        for k in ("data", "unit", "time", "data_sha256", "delimiter"):
            v = getattr(self, k)
            if v is not None:
                lines.append(f"{'file' if k == 'data' else 'sha256' if k == 'data_sha256' else k}"
                             f" = {_toml_value(v)}")
        if self.out_of_core:
            lines.append("out_of_core = true")
        lines += ["", "[model]", f"formula = {_toml_value(self.formula)}",
                  f"models = {_toml_value(list(self.models))}",
                  f"occasion_effects = {_toml_value(self.occasion_effects)}",
                  f"family = {_toml_value(self.family)}"]
        for k in ("trials", "exposure"):
            if getattr(self, k) is not None:
                lines.append(f"{k} = {_toml_value(getattr(self, k))}")
        if self.random_slopes:
            lines.append(f"random_slopes = {_toml_value(list(self.random_slopes))}")
        if self.centred:
            lines.append("centred = true")
        lines.append(f"errors = {_toml_value(self.errors)}")
        if not self.initial_conditions:
            lines.append("initial_conditions = false")
        lines += ["", "[priors]"]
        lines += [f"{_toml_key(k)} = {_toml_value(v)}" for k, v in self.priors.items()]
        lines += ["", "[sampling]"] + [f"{k} = {_toml_value(getattr(self, k))}" for k in
                                       ("draws", "tune", "chains", "seed", "sampler", "ppc_draws")]
        lines += ["", "[reference]", f"fits = {_toml_value(list(self.reference))}",
                  f"cov = {_toml_value(self.cov)}", f"method = {_toml_value(self.re_method)}",
                  "", "[comparison]", f"level = {_toml_value(self.level)}"]
        if self.reference_folds is not None:
            lines.append(f"reference_folds = {_toml_value(self.reference_folds)}")
        if self.refit_high_k:
            lines.append("refit_high_k = true")
        if self.max_refits != MAX_REFITS:
            lines.append(f"max_refits = {_toml_value(self.max_refits)}")
        if self.rope is not None:
            lines.append(f"rope = {_toml_value(self.rope)}")
        if self.loo_observations is not None:
            lines.append(f"loo_observations = {_toml_value(self.loo_observations)}")
        lines += ["", "[report]", f"interval = {_toml_value(self.interval)}"]
        return "\n".join(lines) + "\n"


_TOML_LAYOUT = {  # section -> {key in file: Settings field}
    "": {"title": "title"},
    "data": {"file": "data", "unit": "unit", "time": "time", "sha256": "data_sha256",
             "out_of_core": "out_of_core", "delimiter": "delimiter"},
    "model": {"formula": "formula", "models": "models", "occasion_effects": "occasion_effects",
              "family": "family", "trials": "trials", "exposure": "exposure",
              "random_slopes": "random_slopes", "centred": "centred", "errors": "errors",
              "initial_conditions": "initial_conditions"},
    "sampling": {k: k for k in ("draws", "tune", "chains", "seed", "sampler", "ppc_draws")},
    "reference": {"fits": "reference", "cov": "cov", "method": "re_method"},
    "comparison": {"level": "level", "rope": "rope", "reference_folds": "reference_folds",
                   "loo_observations": "loo_observations", "refit_high_k": "refit_high_k",
                   "max_refits": "max_refits"},
    "report": {"interval": "interval", "title": "title"},
}


def _toml_key(k: str) -> str:
    return k if re.fullmatch(r"[A-Za-z0-9_-]+", k) else json.dumps(k)


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_toml_key(k)} = {_toml_value(x)}" for k, x in v.items()) + "}"
    raise SpecificationError(f"cannot write {v!r} to an analysis file")


#: the TOML types each setting may have in an analysis file (the values are checked
#: further by :meth:`Settings.check`)
_FILE_TYPES = {
    **dict.fromkeys(("title", "data", "unit", "time", "formula", "data_sha256", "sampler",
                     "cov", "re_method", "level", "errors"), (str,)),
    **dict.fromkeys(("models", "reference"), (list, str)),
}  # numbers and switches are checked, with their ranges, by Settings.check
_TYPE_NAMES = {str: "text", list: "a list of names"}


def _check_file_type(path, name, value):
    """Refuse a value of the wrong TOML type, naming the key as the file spells it."""
    want = _FILE_TYPES.get(name)
    ok = want is None or isinstance(value, want)
    if ok and name in ("models", "reference") and isinstance(value, list):
        ok = all(isinstance(x, str) for x in value)
    if not ok:
        key = next(f"[{sec}] {k}" if sec else k for sec, keys in _TOML_LAYOUT.items()
                   for k, f in keys.items() if f == name)
        raise SpecificationError(
            f"analysis file {str(path)!r}: {key} = {value!r} must be "
            + " or ".join(_TYPE_NAMES[t] for t in want))


def load_settings(path, **overrides) -> Settings:
    """Read an analysis file (TOML); ``overrides`` (not None) replace its values.

    A relative data path is taken relative to the analysis file's folder. Unknown
    sections or keys are errors naming them, so a typo never passes silently.
    """
    from ..data.io import regular_file
    from ..core.outputs import settle_for

    path = regular_file(path, "analysis file", SpecificationError)
    settle_for(path)  # an analysis.toml of a run folder: finish an interrupted publish first
    try:
        doc = tomllib.loads(path.read_text("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise SpecificationError(f"analysis file {str(path)!r} is not valid TOML: {exc}") from None
    except RecursionError:
        raise SpecificationError(f"analysis file {str(path)!r} nests tables or arrays too "
                                 "deeply to be an analysis file") from None
    except OSError as exc:
        raise SpecificationError(f"cannot read analysis file {str(path)!r}: "
                                 f"{exc.strerror or exc}") from None
    values = {}
    for key, val in doc.items():
        if isinstance(val, dict):
            if key == "priors":
                values["priors"] = dict(val)
                continue
            if key not in _TOML_LAYOUT or key == "":
                raise SpecificationError(
                    f"analysis file {str(path)!r}: unknown section [{key}]; sections are "
                    + ", ".join(f"[{s}]" for s in list(_TOML_LAYOUT)[1:] + ["priors"]))
            for k, v in val.items():
                if k not in _TOML_LAYOUT[key]:
                    raise SpecificationError(
                        f"analysis file {str(path)!r}: unknown key {k!r} in [{key}]; valid "
                        f"keys are {', '.join(_TOML_LAYOUT[key])}")
                values[_TOML_LAYOUT[key][k]] = v
        elif key in _TOML_LAYOUT[""]:
            values[_TOML_LAYOUT[""][key]] = val
        else:
            raise SpecificationError(f"analysis file {str(path)!r}: unknown top-level key {key!r}")
    for name, v in values.items():
        _check_file_type(path, name, v)
    if values.get("data") is not None and not Path(values["data"]).is_absolute():
        values["data"] = str((path.parent / values["data"]).resolve())
    values.update({k: v for k, v in overrides.items() if v is not None})
    missing = [f for f in ("unit", "time", "formula") if f not in values]
    if missing:
        raise SpecificationError(f"analysis file {str(path)!r} does not give "
                                 f"{', '.join(missing)} (in [data] and [model])")
    names = {f.name for f in fields(Settings)}
    return Settings(**{k: v for k, v in values.items() if k in names}).check()
