"""The registry of model kinds: every fact about a kind, in one place.

Two sorts of kinds are registered:

- :class:`ModelKind`, a Bayesian model built by a class in :mod:`bayespanel.models`. It
  has three names: the class name (``"RandomIntercept"``), the snake-case name the
  command line and ``results.json`` use (``"random_intercept"``) and the name of its
  columns (``"random"``, a ``Design.matrices`` kind, which is also the name of its
  reference counterpart).
- :class:`ReferenceKind`, a frequentist reference fit of :mod:`bayespanel.reference`
  (``"pooled"``, ``"within"``, ``"between"``, ``"random"``, ``"mundlak"``,
  ``"within_between"``); its name is also the ``Design.matrices`` kind of its columns.

The command line's choices, the schema's enums, the report's titles and texts and the
tables of the runner and the design check read these records; a new kind is one
:func:`register` call (in its own file) plus its builder. Every public function that
takes a model accepts the class, the class name and the snake-case name alike
(:func:`model`).

>>> from bayespanel import kinds
>>> kinds.model("RandomIntercept").name
'random_intercept'
>>> kinds.model("fixed_effects").columns
'within'

This module is a lower layer: it imports nothing of the package above ``errors``; the
builder classes are named by import path and loaded on first use.
"""

from __future__ import annotations

from dataclasses import dataclass
from importlib import import_module

from .errors import SpecificationError, choices_error

__all__ = ["ModelKind", "ReferenceKind", "register", "unregister", "model", "builder", "reference",
           "models", "references", "model_names", "reference_names",
           "latent_model_names", "glm_reference_names", "snake_name", "with_default_priors", "COLUMNS",
           "UNIT_EFFECTS"]

#: the column maps of ``Design.matrices`` a kind can use
COLUMNS = ("pooled", "random", "within", "between", "mundlak", "within_between")
#: what the unit intercepts are: none (``tau = 0``), random (``N(0, sigma_unit^2)``) or
#: fixed (flat prior, integrated out to the within likelihood)
UNIT_EFFECTS = ("none", "random", "fixed")


@dataclass(frozen=True)
class ModelKind:
    """Every fact about one Bayesian model kind.

    Attributes
    ----------
    name : str
        Snake-case name used by the command line, analysis files and ``results.json``.
    class_name : str
        Name of the builder class.
    builder : str or type
        The builder class, or its import path ``"package.module:Class"`` (loaded on
        first use by :meth:`builder_class`).
    columns : str
        The ``Design.matrices`` kind of its columns (one of :data:`COLUMNS`).
    unit_effects : {"none", "random", "fixed"}
    reference : str or None
        Name of the reference fit shown beside it (a :class:`ReferenceKind`).
    title : str
        Title in the report, tables and ``results.json``.
    assumptions : str
        What the model assumes, in plain words (report and ``results.json``).
    latent : bool
        Whether it is fitted with the outcome families other than Gaussian and with
        random slopes (through latent unit effects).
    glm_reference : str or None
        The pooled GLM beside it for those families (a :class:`ReferenceKind` with a
        ``glm_title``).
    priors : dict or None
        Default priors of the kind, in the form of the builders' ``priors=`` (keys: a term
        label, ``"coef"``, ``"sigma_obs"``, ``"sigma_unit"``); the user's priors replace
        the same keys. None: the package's defaults (docs/priors.md).
    """

    name: str
    class_name: str
    builder: object
    columns: str
    unit_effects: str
    reference: str | None
    title: str
    assumptions: str
    latent: bool = False
    glm_reference: str | None = None
    priors: dict | None = None

    def __post_init__(self):
        if self.columns not in COLUMNS:
            raise choices_error("columns", self.columns, COLUMNS)
        if self.unit_effects not in UNIT_EFFECTS:
            raise choices_error("unit_effects", self.unit_effects, UNIT_EFFECTS)

    def builder_class(self) -> type:
        """The builder class (imported on first use when registered by path)."""
        if isinstance(self.builder, str):
            mod, _, attr = self.builder.partition(":")
            return getattr(import_module(mod), attr)
        return self.builder

    @property
    def contrasts(self) -> bool:
        """Whether the columns hold separate within and between effects (so the model
        has between-minus-within contrasts)."""
        return self.columns in ("within_between", "mundlak")


@dataclass(frozen=True)
class ReferenceKind:
    """Every fact about one frequentist reference fit.

    Attributes
    ----------
    name : str
        Its name (``bp.reference.<name>``, ``results.json``); also the ``Design.matrices``
        kind of its columns.
    title : str
        Title in the report, tables, ``results.json`` and the printed summary.
    assumptions : str
        One-line statement of the estimator (the report's fallback text).
    unit_effects : {"none", "random", "fixed"}
    variance_components : bool
        Whether the fit estimates a unit variance by a method (``method=``).
    glm_title : str or None
        First word(s) of the title of the pooled GLM on these columns (the reference of
        the non-Gaussian families); None when there is none.
    notes : tuple of str
        What the estimator assumes, one sentence a point (the fit's ``assumptions``).
    """

    name: str
    title: str
    assumptions: str
    unit_effects: str
    variance_components: bool = False
    glm_title: str | None = None
    notes: tuple = ()

    def __post_init__(self):
        if self.name not in COLUMNS:
            raise choices_error("name", self.name, COLUMNS)
        if self.unit_effects not in UNIT_EFFECTS:
            raise choices_error("unit_effects", self.unit_effects, UNIT_EFFECTS)


_MODELS: dict[str, ModelKind] = {}
_REFERENCES: dict[str, ReferenceKind] = {}


def register(kind):
    """Add a :class:`ModelKind` or :class:`ReferenceKind` to the registry.

    Raises :class:`~bayespanel.errors.SpecificationError` when its name (or, for a model,
    its class name) is taken, when a model's reference is not registered, or when a
    model's builder class says otherwise about its name, columns or unit effects.
    """
    if isinstance(kind, ReferenceKind):
        if kind.name in _REFERENCES:
            raise SpecificationError(f"a reference kind named {kind.name!r} is registered")
        _REFERENCES[kind.name] = kind
        return kind
    if not isinstance(kind, ModelKind):
        raise SpecificationError(
            f"register takes a ModelKind or a ReferenceKind, got {type(kind).__name__}")
    taken = {n for k in _MODELS.values() for n in (k.name, k.class_name)}
    clash = [n for n in (kind.name, kind.class_name) if n in taken]
    if clash:
        raise SpecificationError(f"a model kind named {clash[0]!r} is registered")
    for ref in (kind.reference, kind.glm_reference):
        if ref is not None and ref not in _REFERENCES:
            raise choices_error("reference", ref, list(_REFERENCES))
    if not isinstance(kind.builder, str):  # a class at hand: its own facts must agree
        cls = kind.builder
        said = {"class_name": cls.__name__, "columns": getattr(cls, "kind", kind.columns),
                "unit_effects": getattr(cls, "unit_effects", kind.unit_effects)}
        wrong = [f"{k}={v!r} but the class has {said[k]!r}" for k, v in
                 (("class_name", kind.class_name), ("columns", kind.columns),
                  ("unit_effects", kind.unit_effects)) if said[k] != v]
        if wrong:
            raise SpecificationError(f"model kind {kind.name!r}: " + "; ".join(wrong))
    _MODELS[kind.name] = kind
    return kind


def unregister(name: str) -> None:
    """Remove the model kind of this snake-case name (for kinds added at run time)."""
    _MODELS.pop(model(name).name)


def model(which) -> ModelKind:
    """The registered model kind of a builder class, a class name or a snake-case name.

    Parameters
    ----------
    which : ModelKind, type or str
        ``RandomIntercept`` (the class), ``"RandomIntercept"`` or ``"random_intercept"``.
        A class registered under no kind resolves through its nearest registered base.

    Raises
    ------
    SpecificationError
        Naming the value and the valid names.
    """
    if isinstance(which, ModelKind):
        return which
    if isinstance(which, type):
        for cls in which.__mro__:
            for k in _MODELS.values():
                if k.class_name == cls.__name__ and k.builder_class() is cls:
                    return k
        raise SpecificationError(f"{which.__name__} is not a registered model kind; choose "
                                 "one of " + ", ".join(k.class_name for k in _MODELS.values()))
    for k in _MODELS.values():
        if which in (k.name, k.class_name):
            return k
    raise choices_error("model", which, model_names())


def builder(which) -> type:
    """The builder class of a model kind given by its class (returned as it is, registered
    or not), class name or snake-case name."""
    if isinstance(which, type):
        return which
    return model(which).builder_class()


def reference(name: str) -> ReferenceKind:
    """The registered reference kind of this name."""
    if isinstance(name, ReferenceKind):
        return name
    if name not in _REFERENCES:
        raise choices_error("reference", name, reference_names())
    return _REFERENCES[name]


def models() -> tuple:
    """Every registered model kind, in registration order."""
    return tuple(_MODELS.values())


def references() -> tuple:
    """Every registered reference kind, in registration order."""
    return tuple(_REFERENCES.values())


def model_names() -> tuple:
    """Snake-case names of the registered model kinds (the command line's choices)."""
    return tuple(_MODELS)


def reference_names() -> tuple:
    """Names of the registered reference kinds."""
    return tuple(_REFERENCES)


def latent_model_names() -> tuple:
    """Snake-case names of the model kinds fitted with latent unit effects (the outcome
    families other than Gaussian and random slopes); the others refuse those."""
    return tuple(k.name for k in _MODELS.values() if k.latent)


def glm_reference_names() -> tuple:
    """Names of the reference kinds with a pooled GLM on their columns (the reference
    fits of the logit and log-link families)."""
    return tuple(k.name for k in _REFERENCES.values() if k.glm_title)


def with_default_priors(builder, priors):
    """The priors a builder class uses: its kind's default priors (:attr:`ModelKind.priors`)
    with the user's ``priors`` replacing the same keys; ``priors`` as given when the kind
    has none or the class is registered under no kind."""
    try:
        defaults = model(builder).priors
    except SpecificationError:
        return priors
    if not defaults:
        return priors
    if priors is not None and not isinstance(priors, dict):
        return priors  # refused with its message by resolve_priors
    return {**defaults, **(priors or {})}


def snake_name(which):
    """The snake-case name of a registered model kind given by any of its names or its
    class; anything else is returned as it is (for the caller's check to refuse)."""
    try:
        return model(which).name
    except (SpecificationError, TypeError):
        return which


# ---------------------------------------------------------------------- the built-in kinds
for _ref in (
    ReferenceKind(
        "pooled", "Pooled OLS", "Least squares on all rows, cluster-robust errors by unit.",
        unit_effects="none", glm_title="Pooled",
        notes=(
            "One intercept for all units: unit-level differences are left in the "
            "error term.",
            "The covariates are uncorrelated with the whole error, unit part "
            "included.",
            "Classical errors: independent rows with one variance. Cluster-robust "
            "errors: independent units, any correlation and variance within a unit.",
        ),
    ),
    ReferenceKind(
        "within", "Within (fixed effects)",
        "Least squares on unit-demeaned rows; degrees of freedom corrected for the absorbed "
        "unit means.", unit_effects="fixed",
        notes=(
            "Each unit has its own intercept, which may be correlated with the "
            "covariates; only variation within units identifies the coefficients.",
            "The covariates are strictly exogenous: uncorrelated with the "
            "occasion-level error on every occasion of the unit.",
            "Covariates constant within units cannot be estimated and are dropped.",
            "Classical errors: independent occasions with one variance. "
            "Cluster-robust errors: any correlation within a unit.",
        ),
    ),
    ReferenceKind(
        "between", "Between", "Least squares on the unit means, one row per unit.",
        unit_effects="none",
        notes=(
            "Uses only the unit means (one row per unit): the unit means of the "
            "covariates must be uncorrelated with the unit effect.",
            "Answers a question about differences between units, not changes within "
            "them.",
        ),
    ),
    ReferenceKind(
        "random", "Random effects (GLS)",
        "Feasible GLS with variance components estimated by the method named beside it.",
        unit_effects="random", variance_components=True,
        notes=(
            "The unit intercepts are random, with one variance, and uncorrelated with "
            "every covariate on every occasion (the Hausman and Mundlak tests check "
            "this).",
            "Within and between effects of each covariate are equal (one "
            "coefficient).",
            "Classical errors: homoskedastic unit effects and occasion errors.",
        ),
    ),
    ReferenceKind(
        "mundlak", "Mundlak (GLS)",
        "Random-effects GLS with the unit means of the time-varying covariates added.",
        unit_effects="random", variance_components=True, glm_title="Mundlak",
        notes=(
            "The unit effect may be correlated with the covariates, but only through "
            "the unit means of the time-varying covariates (Mundlak 1978); the rest "
            "of it is random.",
            "The coefficients of the time-varying covariates equal the fixed-effects "
            "ones; the unit-mean terms are the between-minus-within differences.",
            "Classical errors: homoskedastic unit effects and occasion errors.",
        ),
    ),
    ReferenceKind(
        "within_between", "Within-between (GLS)",
        "Random-effects GLS on the within and between parts of each time-varying covariate.",
        unit_effects="random", variance_components=True, glm_title="Within-between",
        notes=(
            "Each time-varying covariate has a within effect (its deviation from the "
            "unit mean) and a between effect (the unit mean), estimated separately.",
            "The random intercept is uncorrelated with the unit means and the "
            "time-constant covariates given the other terms.",
            "Classical errors: homoskedastic unit effects and occasion errors.",
        ),
    ),
):
    register(_ref)

_BUILDERS = "bayespanel.models.builders:"
for _kind in (
    ModelKind(
        "pooled", "Pooled", _BUILDERS + "Pooled", columns="pooled", unit_effects="none",
        reference="pooled", title="Pooled regression",
        assumptions="One intercept for every unit: units differ only through the covariates. "
        "Rows of the same unit are treated as independent, which overstates precision when "
        "units differ in their baseline. Useful as a floor to compare against."),
    ModelKind(
        "random_intercept", "RandomIntercept", _BUILDERS + "RandomIntercept",
        columns="random", unit_effects="random", reference="random",
        title="Random intercept",
        assumptions="Each unit has its own baseline, drawn from a normal distribution whose "
        "SD is the unit SD. Each covariate has one effect, which mixes its within-unit and "
        "its between-unit association; this is right only if the two are equal, i.e. if the "
        "unit baselines are unrelated to the covariates.",
        latent=True, glm_reference="pooled"),
    ModelKind(
        "within_between", "WithinBetween", _BUILDERS + "WithinBetween",
        columns="within_between", unit_effects="random", reference="within_between",
        title="Within-between (hybrid)",
        assumptions="Each time-varying covariate is split into the unit's mean (between "
        "part) and the occasion's deviation from it (within part), each with its own effect; "
        "unit baselines vary as in the random-intercept model. The within effect is "
        "protected against stable differences between units; time-constant covariates keep "
        "one effect.",
        latent=True, glm_reference="within_between"),
    ModelKind(
        "correlated_effects", "CorrelatedEffects", _BUILDERS + "CorrelatedEffects",
        columns="mundlak", unit_effects="random", reference="mundlak",
        title="Correlated random effects (Mundlak)",
        assumptions="The random-intercept model with the unit means of the time-varying "
        "covariates added. Their coefficients measure how far the between effect departs "
        "from the within effect (the contextual effect); the covariates' own coefficients "
        "equal the within effects.",
        latent=True, glm_reference="mundlak"),
    ModelKind(
        "fixed_effects", "FixedEffects", _BUILDERS + "FixedEffects",
        columns="within", unit_effects="fixed", reference="within", title="Fixed effects",
        assumptions="Every unit has its own free baseline, so only changes within units "
        "inform the coefficients; covariates that never change within a unit cannot be "
        "estimated. Predicts occasions of known units only: a new unit's baseline is "
        "unknown."),
):
    register(_kind)
del _ref, _kind
