"""The registry of model kinds: every fact about a kind, in one place.

Three sorts of records are registered:

- :class:`ColumnMap`, one per ``Design.matrices`` column map (:data:`COLUMNS`): which of a
  model's coefficients carry each covariate's within and between effects. The
  coefficient parts of the variance partition, the between-minus-within contrasts and the
  true value of each coefficient given true effects all derive from it.
- :class:`ModelKind`, a Bayesian model built by a builder class. It has three names: the
  class name (``"RandomIntercept"``), the snake-case name the command line and
  ``results.json`` use (``"random_intercept"``) and the name of its column map
  (``"random"``, which is also the name of its reference counterpart).
- :class:`ReferenceKind`, a frequentist reference fit of :mod:`bayespanel.reference`
  (``"pooled"``, ``"within"``, ``"between"``, ``"random"``, ``"mundlak"``,
  ``"within_between"``); its name is also the column map of its columns.

The command line's choices, the schema's enums, the report's titles and texts and the
tables of the runner, the design check, the partition and the contrasts read these
records. Every public function that takes a model accepts the class, the class name and
the snake-case name alike (:func:`model`). Kinds come from three places: the built-in
files of this package (one per kind), a :func:`register` call at run time, and installed
packages that name a kind in the entry-point group ``bayespanel.kinds``
(:data:`ENTRY_POINT_GROUP`; loaded on the first question asked about the model kinds,
see :func:`load_plugins`).

>>> from bayespanel import kinds
>>> kinds.model("RandomIntercept").name
'random_intercept'
>>> kinds.model("fixed_effects").columns
'within'

This module is a lower layer: it imports nothing of the package above ``errors`` and
``terms``; the builder classes are named by import path and loaded on first use.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from importlib import import_module, metadata

import numpy as np

from ..core.errors import SpecificationError, choices_error
from ..core.terms import AS_IS, parse, part_label

__all__ = ["ColumnMap", "ModelKind", "ReferenceKind", "register", "unregister", "model",
           "builder", "reference", "column_map", "models", "references", "model_names",
           "reference_names", "latent_model_names", "glm_reference_names", "snake_name",
           "with_default_priors", "load_plugins", "COLUMNS", "UNIT_EFFECTS",
           "ENTRY_POINT_GROUP"]

#: the column maps of ``Design.matrices`` a kind can use
COLUMNS = ("pooled", "random", "within", "between", "mundlak", "within_between")
#: what the unit intercepts are: none (``tau = 0``), random (``N(0, sigma_unit^2)``) or
#: fixed (flat prior, integrated out to the within likelihood)
UNIT_EFFECTS = ("none", "random", "fixed")
#: the entry-point group through which installed packages add kinds
ENTRY_POINT_GROUP = "bayespanel.kinds"


@dataclass(frozen=True)
class ColumnMap:
    """Which coefficients of a column map carry each covariate's within and between effects.

    A covariate that varies within units has a within effect (of its deviation from the
    unit mean) and a between effect (of its unit mean). ``within`` and ``between`` give
    each as a sum of the coefficients of parts of the covariate, ``((part, sign), ...)``
    (parts of :mod:`bayespanel.core.terms`), or None where the columns estimate no such effect.
    For the Mundlak columns, for example, the within effect is the coefficient of ``x``
    and the between effect that of ``x`` plus that of ``x (unit mean)`` (Mundlak 1978);
    for the hybrid columns they are the coefficients of ``x (within)`` and
    ``x (between)`` (Rights & Sterba 2019 for the split of a model into these parts).
    Everything else derives from these two sums: the parts of each draw
    (:meth:`effects`), the between-minus-within contrast (:attr:`contrast`,
    :meth:`contrast_covariates`, :meth:`contrast_matrix`) and the true value of each
    coefficient given true within and between effects (:meth:`true_coefficients`).

    Attributes
    ----------
    name : str
        The ``Design.matrices`` kind (one of :data:`COLUMNS`).
    within, between : tuple of (part, sign) pairs, or None
    intercept : bool
        Whether the columns hold an intercept.
    constants : bool
        Whether covariates constant within units keep a coefficient of their own.
    """

    name: str
    within: tuple | None
    between: tuple | None
    intercept: bool = True
    constants: bool = True

    def __post_init__(self):
        if self.name not in COLUMNS:
            raise choices_error("name", self.name, COLUMNS)

    # ------------------------------------------------------------------ contrasts
    @property
    def contrast(self) -> tuple:
        """The between minus the within effect of a covariate as ``((part, sign), ...)``
        (parts whose signs do not cancel); ``()`` when the columns carry no contrast."""
        if self.within is None or self.between is None:
            return ()
        net: dict = {}
        for part, sign in self.between:
            net[part] = net.get(part, 0) + sign
        for part, sign in self.within:
            net[part] = net.get(part, 0) - sign
        return tuple((part, sign) for part, sign in net.items() if sign != 0)

    def _refuse_contrast(self):
        why = ("it estimates no between effect" if self.between is None else
               "it estimates no within effect" if self.within is None else
               "it assumes the within and between effects are equal")
        raise SpecificationError(
            f"a {self.name!r} model has no within/between contrast ({why}); fit WithinBetween "
            "or CorrelatedEffects (Mundlak) to estimate it")

    def contrast_covariates(self, labels) -> list:
        """The covariates whose contrast the labels carry (every part of :attr:`contrast`
        among them), in the order of the labels of the first part; refused (naming the
        models that have contrasts) when the columns carry none."""
        if not self.contrast:
            self._refuse_contrast()
        terms = {parse(lab) for lab in labels}
        first = self.contrast[0][0]
        return [t.column.label for t in map(parse, labels) if t.part == first
                and all(t.with_part(part) in terms for part, _ in self.contrast)]

    def contrast_matrix(self, labels, time_varying) -> np.ndarray:
        """Linear map ``L`` with ``delta = coef @ L.T``, one row per covariate of
        ``time_varying`` (refused when a part of its contrast is not among ``labels``)."""
        if not self.contrast:
            self._refuse_contrast()
        labels = list(labels)
        pos = {lab: j for j, lab in enumerate(labels)}
        L = np.zeros((len(time_varying), len(labels)))
        for r, t in enumerate(time_varying):
            for part, sign in self.contrast:
                name = part_label(t, part)
                if name not in pos:
                    raise SpecificationError(
                        f"the model has no coefficient {name!r}; its terms are "
                        f"{', '.join(map(repr, labels))}")
                L[r, pos[name]] += sign
        return L

    def set_contrast(self, b, labels, covariate, size):
        """``b`` (coefficients in ``labels`` order) with the contrast of ``covariate`` set
        to ``size``, by changing its first part's coefficient (the between part of the
        hybrid columns, the unit mean of Mundlak's); ``None`` when a part is missing."""
        if not self.contrast:
            self._refuse_contrast()
        labels = list(labels)
        names = [(part_label(covariate, part), sign) for part, sign in self.contrast]
        if any(name not in labels for name, _ in names):
            return None
        b = np.array(b, dtype=float)
        (first, s0), rest = names[0], names[1:]
        b[labels.index(first)] = (float(size) - sum(s * b[labels.index(n)] for n, s in rest)) / s0
        return b

    # ------------------------------------------------------------------ parts
    def effects(self, terms, time_varying, labels, coef):
        """Within and between coefficients of every draw (the Rights & Sterba split).

        Parameters
        ----------
        terms : list of str
            The original covariates (``Design.terms``).
        time_varying : list of str
            Those that vary within units (``Design.time_varying``).
        labels : list of str
            The model's coefficient labels.
        coef : array (S, k)
            Coefficient draws (or one estimate, ``S = 1``), columns in ``labels`` order.

        Returns
        -------
        g_w : array (S, p_w)
            Within effects of the time-varying covariates. A part that is not among the
            labels counts 0 (an occasion indicator of a balanced panel has no unit-mean
            column); the parts of the within sum must be there when the columns also carry
            a between effect.
        g_b : array (S, p_b) or None
            Between effects of the time-varying covariates, then the coefficients of the
            time-constant ones; None when the columns estimate no between effect.
        """
        if self.within is None:
            raise SpecificationError(
                f"the {self.name!r} columns carry no within effect to split; choose one of "
                + ", ".join(repr(n) for n, c in _COLUMN_MAPS.items() if c.within is not None))
        coef = np.atleast_2d(np.asarray(coef, dtype=float))
        labels = list(labels)
        pos = {lab: j for j, lab in enumerate(labels)}
        zero = np.zeros(coef.shape[0])
        required = {part for part, _ in self.within} if self.between is not None else set()

        def col(name):
            if name not in pos:
                raise SpecificationError(
                    f"the {self.name} model has no coefficient {name!r}; its terms are "
                    f"{', '.join(map(repr, labels))}")
            return coef[:, pos[name]]

        def effect(t, parts):
            out = zero
            for part, sign in parts:
                name = part_label(t, part)
                if part in required or name in pos:
                    out = out + sign * col(name)
            return out

        tv = list(time_varying)
        tc = [t for t in terms if t not in tv and t != "Intercept"]
        g_w = [effect(t, self.within) for t in tv]
        g_b = None
        if self.between is not None:
            g_b = [effect(t, self.between) for t in tv] + [col(t) for t in tc]
        g_w = np.column_stack(g_w) if g_w else np.zeros((coef.shape[0], 0))
        if g_b is not None:
            g_b = np.column_stack(g_b) if g_b else np.zeros((coef.shape[0], 0))
        return g_w, g_b

    # ------------------------------------------------------------------ truth
    def true_coefficients(self, within, between, constant=None, intercept=None, *,
                          strict=True) -> dict:
        """True value of each coefficient label given true effects.

        Solves :attr:`within` = ``within[x]`` and :attr:`between` = ``between[x]`` for the
        coefficients of the parts of each covariate ``x``. Where the columns cannot carry
        the two effects (one coefficient for both, as pooled and random-intercept columns
        have, when they differ) ``strict`` refuses, naming the covariate; otherwise that
        covariate is left out, and so are the intercept and the time-constant
        coefficients, which then absorb part of the difference.

        Parameters
        ----------
        within, between : dict
            True within and between effects by covariate label (a covariate missing from
            ``between`` gives only the coefficients the within effect determines).
        constant : dict, optional
            True coefficients of the time-constant covariates.
        intercept : float, optional
        strict : bool

        Returns
        -------
        dict
            Label -> value: the intercept, the parts of the time-varying covariates (part
            by part) and the time-constant covariates, as far as they are determined.
        """
        found: dict = {}
        lost = False
        for x in (within if self.within is not None else between):
            eqs = []
            if self.within is not None:
                eqs.append((dict(self.within), within[x]))
            if self.between is not None and between.get(x) is not None:
                eqs.append((dict(self.between), between[x]))
            solved = _solve_parts(eqs)
            if solved is None:
                if strict:
                    raise SpecificationError(
                        f"truth has different within ({within[x]}) and between "
                        f"({between[x]}) effects of {x!r}; a {self.name} model has one "
                        "coefficient for it: give truth={'coef': {...}} or choose "
                        "WithinBetween / CorrelatedEffects")
                lost = True
                continue
            found[x] = solved
        out: dict = {}
        if self.intercept and intercept is not None and not lost:
            out["Intercept"] = intercept
        order = [p for p, _ in (self.within or ())] + [p for p, _ in (self.between or ())]
        for part in dict.fromkeys(order):
            for x, parts in found.items():
                if part in parts:
                    out[part_label(x, part)] = parts[part]
        if self.constants and not lost:
            out.update(constant or {})
        return out


def _solve_parts(equations):
    """Solve ``sum(sign * c[part]) = value`` equations for the coefficients ``c`` by
    substitution (each effect adds at most one unknown part); ``None`` when an equation
    with no unknown left does not hold (``numpy.isclose``)."""
    known: dict = {}
    pending = list(equations)
    while pending:
        for eq in pending:
            parts, value = eq
            unknown = [p for p in parts if p not in known]
            if len(unknown) <= 1:
                break
        else:
            break  # the rest is undetermined: those parts are left out
        pending.remove(eq)
        done = sum(sign * known[p] for p, sign in parts.items() if p in known)
        if unknown:
            sign = parts[unknown[0]]
            known[unknown[0]] = value if (sign == 1 and not done) else (value - done) / sign
        elif not np.isclose(done, value):
            return None
    return known


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
    def column_map(self) -> ColumnMap:
        """How its coefficients carry the within and between effects."""
        return column_map(self.columns)

    @property
    def contrasts(self) -> bool:
        """Whether the columns hold separate within and between effects (so the model
        has between-minus-within contrasts)."""
        return bool(self.column_map.contrast)


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
    statistics : str or None
        The column map whose sufficient statistics the fit reads, when not its own (the
        within and between fits derive theirs from the random-intercept columns).
    """

    name: str
    title: str
    assumptions: str
    unit_effects: str
    variance_components: bool = False
    glm_title: str | None = None
    notes: tuple = ()
    statistics: str | None = None

    def __post_init__(self):
        if self.name not in COLUMNS:
            raise choices_error("name", self.name, COLUMNS)
        if self.unit_effects not in UNIT_EFFECTS:
            raise choices_error("unit_effects", self.unit_effects, UNIT_EFFECTS)
        if self.statistics is not None and self.statistics not in COLUMNS:
            raise choices_error("statistics", self.statistics, COLUMNS)

    @property
    def column_map(self) -> ColumnMap:
        """How its coefficients carry the within and between effects."""
        return column_map(self.name)

    @property
    def statistics_of(self) -> str:
        """The column map whose sufficient statistics the fit reads."""
        return self.statistics or self.name


_COLUMN_MAPS: dict[str, ColumnMap] = {}
_MODELS: dict[str, ModelKind] = {}
_REFERENCES: dict[str, ReferenceKind] = {}


def register(kind):
    """Add a :class:`ColumnMap`, :class:`ModelKind` or :class:`ReferenceKind` to the
    registry.

    Raises :class:`~bayespanel.core.errors.SpecificationError` when its name (or, for a model,
    its class name) is taken, when a model's reference or column map is not registered,
    or when a model's builder class says otherwise about its name, columns or unit
    effects.
    """
    if isinstance(kind, ColumnMap):
        if kind.name in _COLUMN_MAPS:
            raise SpecificationError(f"a column map named {kind.name!r} is registered")
        _COLUMN_MAPS[kind.name] = kind
        return kind
    if isinstance(kind, ReferenceKind):
        if kind.name in _REFERENCES:
            raise SpecificationError(f"a reference kind named {kind.name!r} is registered")
        _REFERENCES[kind.name] = kind
        return kind
    if not isinstance(kind, ModelKind):
        raise SpecificationError("register takes a ColumnMap, a ModelKind or a ReferenceKind, "
                                 f"got {type(kind).__name__}")
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


def column_map(name) -> ColumnMap:
    """The column map of this ``Design.matrices`` kind (or of a kind's record)."""
    if isinstance(name, ColumnMap):
        return name
    if isinstance(name, (ModelKind, ReferenceKind)):
        return name.column_map
    if name not in _COLUMN_MAPS:
        raise choices_error("kind", name, tuple(_COLUMN_MAPS))
    return _COLUMN_MAPS[name]


_PLUGINS_LOADED = False


def load_plugins(entry_points=None) -> list:
    """Register the kinds installed packages name in the group :data:`ENTRY_POINT_GROUP`.

    Each entry point names a module whose import registers its kinds (``pkg.kind``), or
    an object (``pkg.kind:KIND``): a kind record, a sequence of them, or a callable
    returning either, registered here. Runs once, on the first question asked of the
    registry; a plugin that fails to load or register is skipped with a ``UserWarning``
    naming it, so one broken package does not stop the command line.

    Parameters
    ----------
    entry_points : iterable of importlib.metadata.EntryPoint, optional
        For tests; default: those installed (``importlib.metadata.entry_points``).

    Returns
    -------
    list of str
        The names of the entry points that loaded.
    """
    global _PLUGINS_LOADED
    _PLUGINS_LOADED = True
    if entry_points is None:
        entry_points = metadata.entry_points(group=ENTRY_POINT_GROUP)
    loaded = []
    for ep in entry_points:
        try:
            obj = ep.load()
            if callable(obj) and not isinstance(obj, type):
                obj = obj()
            if isinstance(obj, (ColumnMap, ModelKind, ReferenceKind)):
                obj = [obj]
            if isinstance(obj, (list, tuple)):
                for k in obj:
                    if isinstance(k, ModelKind) and k.name in _MODELS \
                            and _MODELS[k.name] == k:
                        continue  # registered by its module's import already
                    register(k)
        except Exception as exc:  # noqa: BLE001 (any failure of a third party's code)
            warnings.warn(f"model kinds of the entry point {ep.name!r} ({ep.value}) in "
                          f"{ENTRY_POINT_GROUP!r} were not loaded: {type(exc).__name__}: "
                          f"{exc}", UserWarning, stacklevel=2)
            continue
        loaded.append(ep.name)
    return loaded


def _plugins():
    if not _PLUGINS_LOADED:
        load_plugins()


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
    _plugins()
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
    _plugins()
    return tuple(_MODELS.values())


def references() -> tuple:
    """Every registered reference kind, in registration order."""
    return tuple(_REFERENCES.values())


def model_names() -> tuple:
    """Snake-case names of the registered model kinds (the command line's choices)."""
    _plugins()
    return tuple(_MODELS)


def reference_names() -> tuple:
    """Names of the registered reference kinds."""
    return tuple(_REFERENCES)


def latent_model_names() -> tuple:
    """Snake-case names of the model kinds fitted with latent unit effects (the outcome
    families other than Gaussian and random slopes); the others refuse those."""
    _plugins()
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


