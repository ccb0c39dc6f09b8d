"""The design check's inputs: the model refitted (with its rows) and the truth on its terms."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ... import kinds
from ...core import suffstats as _ss
from ...core.errors import SpecificationError, choices_error
from ..contrasts import contrast_rows
from ..occasions import true_occasion_coef
from .fits import _fit_reference, ar1_marginal_fit


def _builder(model):
    from ...bayes import GaussianModel
    from ...bayes.latent import LatentModel

    if isinstance(model, LatentModel):  # also an instance of its builder (latent_class)
        raise SpecificationError(
            f"the design check runs the Gaussian models; {model!r} has latent unit effects "
            "(family= or random_slopes=)")
    if isinstance(model, GaussianModel):
        return model
    if isinstance(model, (str, kinds.ModelKind)):
        return kinds.builder(model)
    if isinstance(model, type) and issubclass(model, GaussianModel):
        return model
    raise SpecificationError(
        f"model={model!r} is not a model; give a builder name such as 'RandomIntercept', a "
        "builder class, or a built model")


def _make_model(source, model, formula, priors, occasion_effects, errors=None):
    """A built model carrying its rows ``(M, y, unit_codes)``; ``errors`` (``None``: the
    built model's own, else ``"iid"``) is the error structure of a model built here."""
    from ...data.design import Design
    from ...data.panel import Panel

    built = _builder(model)
    if not isinstance(built, type):
        if built.rows is None:
            raise SpecificationError(
                "the model has no rows (built from sufficient statistics alone); the design "
                "check needs the covariate rows: build it from a panel")
        if errors is not None and errors != built.errors:
            raise SpecificationError(
                f"errors={errors!r} differs from the built model's errors={built.errors!r}; "
                "leave errors= out or build the model with it")
        return built
    errors = "iid" if errors is None else errors
    if isinstance(source, Panel):
        if formula is None:
            raise SpecificationError("formula= is needed when the design check starts from a "
                                     "panel and a builder name")
        return built(source, formula, priors=priors, occasion_effects=occasion_effects,
                     errors=errors)
    if isinstance(source, Design):
        M, labels = _design_matrix(built, source)
        stats = _ss.compute(M, source.y, source.unit_codes, names=labels + [source.outcome])
        return built.from_suffstats(stats, labels, outcome=source.outcome, units=source.units,
                                    priors=priors, rows=(M, source.y, source.unit_codes),
                                    design_spec=source.spec.to_dict(), errors=errors,
                                    time=source.time if errors == "ar1" else None)
    raise SpecificationError(
        f"the design check needs a Panel, a Design or a built model, got {type(source).__name__}")


def _design_matrix(cls, design):
    """The covariate rows a builder class uses (fixed effects: original time-varying columns)."""
    if cls.kind == "within":
        _, labels = design.matrices("within")
        return design.X[:, [design.terms.index(t) for t in labels]], labels
    M, labels = design.matrices(cls.kind)
    return M, list(labels)


def _truth_vector(truth, model, difference):
    """``(b, sigma_unit, sigma_obs, rho)`` on the model's columns from the user's truth
    (``rho`` is ``None`` unless the model has ``errors="ar1"``)."""
    labels = list(model.labels)
    kind = model.kind
    serial = getattr(model, "errors", "iid") == "ar1"
    rho = None
    if isinstance(truth, str):
        if truth != "reference":
            raise choices_error("truth", truth, ["reference", "a dict", "a fitted result"])
        M, y, codes = model.rows
        truth = _fit_reference(model, M, y, codes, "reml")
        if serial:   # the AR(1) model's own maximum likelihood, started at the reference
            truth = ar1_marginal_fit(model, start=(_finite(truth.sigma_unit, 1.0),
                                                   truth.sigma_obs))
    if isinstance(truth, dict):
        if "coef" in truth:
            coef = dict(truth["coef"])
        elif "within" in truth:
            coef = _coef_from_components(truth, labels, kind)
        else:
            raise SpecificationError(
                "truth= needs a 'coef' entry (values by term label: "
                + ", ".join(map(repr, labels)) + ") or the demo layout with 'within', "
                "'between', 'constant' and 'intercept'")
        su, so = truth.get("sigma_unit"), truth.get("sigma_obs")
        rho = truth.get("rho")
    else:  # a fitted result: ReferenceResult or Posterior answer with the same names
        if not hasattr(truth, "coef") or not hasattr(truth, "sigma_obs"):
            raise SpecificationError(
                f"truth={type(truth).__name__} is not usable; give a dict, 'reference', or a "
                "fitted result with .coef, .sigma_unit and .sigma_obs")
        coef = {k: float(v) for k, v in pd.Series(truth.coef).items()}
        su, so = getattr(truth, "sigma_unit", 0.0), truth.sigma_obs
        if serial and "rho" in getattr(truth, "parameter_names", []):
            rho = float(truth.draws("rho").mean())        # a posterior of an AR(1) model
    missing = [lab for lab in labels if lab not in coef]
    if missing:
        raise SpecificationError(
            "truth has no value for term(s) " + ", ".join(map(repr, missing))
            + "; the model's terms are " + ", ".join(map(repr, labels)))
    extra = [k for k in coef if k not in labels]
    if extra:
        raise SpecificationError(
            "truth names term(s) the model does not have: " + ", ".join(map(repr, extra))
            + "; the model's terms are " + ", ".join(map(repr, labels)))
    b = np.array([float(coef[lab]) for lab in labels])
    if so is None or not np.isfinite(float(so)) or float(so) <= 0:
        raise SpecificationError(f"truth sigma_obs={so!r} must be a positive number")
    su = 0.0 if su is None or (kind == "pooled") else float(su)
    if not np.isfinite(su) or su < 0:
        raise SpecificationError(f"truth sigma_unit={su!r} must be a number >= 0")
    if difference:
        b = _apply_difference(b, labels, kind, difference)
    return b, su, float(so), _check_rho(rho, model, serial)


def _finite(value, default):
    value = float(value)
    return value if np.isfinite(value) and value > 0 else default


def _check_rho(rho, model, serial):
    """The true ``rho`` of an ``errors="ar1"`` model (``None`` for iid errors)."""
    if not serial:
        if rho is not None:
            raise SpecificationError(
                f"truth gives rho={rho!r} but the model has independent errors; build it "
                "with errors='ar1' (or give design_check errors='ar1')")
        return None
    if rho is None:
        raise SpecificationError(
            "truth needs 'rho' (the correlation of errors one time unit apart) for a model "
            "with errors='ar1'")
    rho = float(rho)
    low = -1.0 if model.ar1_stats.integer_gaps else 0.0
    if not low < rho < 1.0:
        raise SpecificationError(
            f"truth rho={rho!r} must lie in ({low:g}, 1)"
            + ("" if low < 0 else " (the occasions' gaps are not whole numbers)"))
    return rho


def _coef_from_components(truth, labels, kind):
    """Map the demo layout (within / between / constant effects) onto the model's terms
    (the column map's :meth:`~bayespanel.kinds.ColumnMap.true_coefficients`; occasion
    terms from :func:`~bayespanel.analysis.occasions.true_occasion_coef`)."""
    values = kinds.column_map(kind).true_coefficients(
        truth.get("within", {}), truth.get("between", {}), dict(truth.get("constant", {})),
        truth.get("intercept", 0.0))
    out = {}
    for lab in labels:
        occ = true_occasion_coef(lab, truth)
        value = occ if occ is not None else values.get(lab)
        if value is not None:
            out[lab] = value
    return out


def _apply_difference(b, labels, kind, difference):
    """Set the between effect of each named covariate to its within effect plus the size
    (the column map's contrast set to the size)."""
    columns = kinds.column_map(kind)
    if not columns.contrast:
        raise SpecificationError(
            f"difference= needs separate within and between effects; the {kind} model has "
            "one coefficient per covariate: use WithinBetween or CorrelatedEffects")
    for x, size in dict(difference).items():
        b = columns.set_contrast(b, labels, x, size)
        if b is None:
            raise SpecificationError(_no_contrast(x, labels))
    return b


def _no_contrast(x, labels):
    return (f"difference names {x!r}, which has no within and between parts in this model "
            "(only covariates that vary within units and whose unit means differ between "
            "units do); terms are "
            + ", ".join(map(repr, labels)))


def _contrasts(labels, kind):
    """``(name, weight vector)`` for each between-minus-within contrast of the model
    (:func:`bayespanel.analysis.contrasts.contrast_rows`)."""
    names, L = contrast_rows(kind, labels)
    return list(zip(names, L))
