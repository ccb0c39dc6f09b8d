"""Model builders: from a panel and a formula to a PyMC model of the Gaussian family.

``Pooled``, ``RandomIntercept``, ``WithinBetween``, ``CorrelatedEffects`` (Mundlak) and
``FixedEffects`` share one machine, :class:`GaussianModel`; they differ in the columns
of the design (``Design.matrices(kind)``) and in what the unit intercepts are:

==================  ================  ===============================================
builder             design kind       unit intercepts
==================  ================  ===============================================
Pooled              pooled            none (``tau = 0``)
RandomIntercept     random            ``u_i ~ N(0, sigma_unit^2)``
WithinBetween       within_between    ``u_i ~ N(0, sigma_unit^2)``
CorrelatedEffects   mundlak           ``u_i ~ N(0, sigma_unit^2)``
FixedEffects        within            flat prior (integrated out: within likelihood)
==================  ================  ===============================================

With ``likelihood="marginal"`` (default) the intercepts are integrated out exactly and the
likelihood reads only the sufficient statistics (:mod:`bayespanel.core.gaussian`), held
in the graph as ``pm.Data`` so :meth:`GaussianModel.set_suffstats` swaps a new data set in
without rebuilding or recompiling. ``likelihood="latent"`` builds the same model with one
non-centred latent intercept per unit and a row-level likelihood (Papaspiliopoulos,
Roberts and Sköld 2007), for checking and for users who want the intercepts in the graph.

Inside the graph every column is standardised (:class:`~bayespanel.core.gaussian.Scaling`);
deterministic nodes ``coef``, ``sigma_obs``, ``sigma_unit`` and ``icc`` carry the
parameters on the original scale, and the priors are stated on that scale
(:mod:`bayespanel.bayes.priors`).

References
----------
.. [1] Mundlak, Y. (1978). On the pooling of time series and cross section data.
   Econometrica 46, 69-85. doi:10.2307/1913646
.. [2] Papaspiliopoulos, O., Roberts, G. O. and Sköld, M. (2007). A general framework for the
   parametrization of hierarchical models. Statistical Science 22, 59-73.
   doi:10.1214/088342307000000014
"""

from __future__ import annotations

import os
import warnings

import numpy as np
import pandas as pd

from ..core import ar1
from .. import kinds
from ..core.errors import DataHandlingWarning, EstimationError, SpecificationError, choices_error
from ..core.mathcore import intraclass_correlation
from ..core import gaussian
from .priors import coef_rv, prior_on_standard_scale, resolve_priors, rho_rv, sd_rv
from .spec import ModelSpec
from .graph import mark_built

__all__ = ["ModelSpec", "GaussianModel", "Pooled", "RandomIntercept", "WithinBetween",
           "CorrelatedEffects", "FixedEffects", "BUILDERS"]

LIKELIHOODS = ("marginal", "latent")
_PKG_DIR = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _column_sd(stats, kind):
    """SD of each column of ``[X, y]`` as it enters the likelihood (divisor ``n - 1``)."""
    dof = max(stats.n - 1, 1)
    sd = np.sqrt(np.clip(np.diag(stats.total), 0.0, None) / dof)
    if kind == "within":
        sd[:-1] = np.sqrt(np.clip(np.diag(stats.within)[:-1], 0.0, None) / dof)
    return sd


class GaussianModel:
    """A Gaussian panel model built as a :class:`pymc.Model` (see the module docstring).

    Parameters
    ----------
    panel : bayespanel.Panel
    formula : str
        Wilkinson formula such as ``"y ~ x + z"``; unit intercepts come from the model.
    priors : dict, optional
        Per term label, ``"coef"`` (all slopes), ``"sigma_obs"``, ``"sigma_unit"``; values
        are :class:`~bayespanel.bayes.Prior`, a family/preset name (``"gamma2"``) or a dict.
        See :func:`~bayespanel.bayes.priors.resolve_priors` and docs/priors.md.
    likelihood : {"marginal", "latent"}
    occasion_effects : bool
        Add one indicator per occasion (the first is the reference).
    family : str
        ``"gaussian"``, the builders' own family (docs/families.md); the builder reads
        ``family=`` before it is built, and any other family, or ``random_slopes=``,
        builds a latent-effect model instead (``bayespanel.bayes.latent``).
    errors : {"iid", "ar1"}
        The occasion-level errors of a unit: independent (``"iid"``, the default) or a
        stationary AR(1) on the panel's time column, ``Cov(e_it, e_is) = sigma_obs^2
        rho^|time_t - time_s|`` (``"ar1"``; docs/serial-correlation.md).
        With ``"ar1"`` the model gains the parameter ``rho`` (prior key ``"rho"``) and
        reads the AR(1) statistics of :mod:`bayespanel.core.ar1`; the unit intercepts still
        integrate out exactly. Only the marginal likelihood and a panel with its rows at
        hand (not a partitioned source) are supported so far.

    Attributes
    ----------
    pymc_model : pymc.Model
    labels : list of str
    priors : dict of Prior (data scale, fully specified)
    stats : SuffStats
    spec : ModelSpec
    """

    kind = "random"
    unit_effects = "random"
    likelihoods = LIKELIHOODS
    #: occasion-level errors ("iid" or "ar1"); set per model by ``errors=``
    errors = "iid"

    def __new__(cls, *args, **kwargs):
        # family= (other than "gaussian") and random_slopes= build a
        # latent-effect model (bayespanel.bayes.latent) instead
        from .latent import latent_model, wants_latent

        if wants_latent(kwargs):
            errors = kwargs.pop("errors", "iid")
            kwargs.pop("initial_conditions", None)  # read by the design (bayespanel.data.initial)
            if errors != "iid":
                _check_errors(errors)
                ar1.refuse_pending(errors, "family= other than 'gaussian' and random_slopes=")
            return latent_model(cls, *args, **kwargs)
        return super().__new__(cls)

    def __init__(self, panel, formula, priors=None, likelihood="marginal",
                 occasion_effects=False, family="gaussian", errors="iid",
                 initial_conditions=True):
        self._check_likelihood(likelihood)
        self._set_errors(errors, likelihood)
        if not isinstance(occasion_effects, (bool, np.bool_)):
            raise SpecificationError(
                f"occasion_effects={occasion_effects!r} must be True or False")
        # initial_conditions is passed only when not the default (a partitioned source's
        # design has no lags, nor the option)
        extra = {} if initial_conditions is True else {"initial_conditions": initial_conditions}
        design = panel.design(formula, occasion_effects=bool(occasion_effects), **extra)
        self._init_design(design, priors, likelihood)

    def _set_errors(self, errors, likelihood):
        self.errors = _check_errors(errors)
        if self.errors == "ar1" and likelihood != "marginal":
            ar1.refuse_pending("ar1", f"likelihood={likelihood!r}")

    # ------------------------------------------------------------------ constructors
    @classmethod
    def from_design(cls, design, priors=None, likelihood="marginal", errors="iid"):
        """Build the model on a ready :class:`~bayespanel.data.design.Design` (``design.build``).

        The likelihood reads the design's sufficient statistics
        (``Design.model_suffstats(kind)``); the rows ``(M, y, unit_codes)`` are made
        from the design only when something needs them (``likelihood="latent"``,
        predictive draws, LOO), so building a marginal model holds no ``n x k`` matrix.
        """
        obj = cls.__new__(cls)
        obj._check_likelihood(likelihood)
        obj._set_errors(errors, likelihood)
        obj._init_design(design, priors, likelihood)
        return obj

    def _init_design(self, design, priors, likelihood):
        from ..data.initial import WITH_AR1, notes

        said = notes(design, [type(self).__name__])
        for text in said[1:]:  # fixed effects, pooled
            warnings.warn(text, DataHandlingWarning, stacklevel=4)
        if said and self.errors == "ar1":
            warnings.warn(WITH_AR1, DataHandlingWarning, stacklevel=4)
        stats = self._design_stats(design)
        labels = list(stats.names[:-1])
        self.design = design
        self.ar1_stats = self.ar1_time = None
        if self.errors == "ar1":
            self.ar1_stats = self._ar1_stats(design, labels)
        self._setup(stats, labels, outcome=design.outcome, units=design.units, priors=priors,
                    likelihood=likelihood, rows=None, design_spec=design.spec.to_dict(),
                    rows_from=(lambda: self._rows_of(design)) if design.has_rows else None)

    def _design_stats(self, design):
        return design.model_suffstats(self.kind)

    def _ar1_stats(self, design, labels):
        """The AR(1) statistics of this model's columns ``[M, y]`` (:func:`ar1.compute`),
        gaps read from the panel's time column."""
        column = dict(design.spec.to_dict()).get("time", "time")
        if not design.has_rows:   # one more pass over the partitions (data.ar1pass)
            from ..data.ar1pass import design_ar1_stats

            A, B = self._row_map(design)
            return design_ar1_stats(design, A, B, labels + [design.outcome], column)
        M, y, codes = self._rows_of(design)
        #: the occasion of every estimation row as a number (gaps are its differences)
        self.ar1_time = ar1.occasion_times(design.time, column)
        return ar1.compute(M, y, codes, self.ar1_time, names=labels + [design.outcome],
                           column=column)

    def _row_map(self, design):
        """``(A, B)``: this model's rows of ``[M, y]`` are ``A z + B zbar_i`` for a design
        row ``z = [x, y]`` and its unit mean (the columns of :meth:`_rows_of`)."""
        if self.kind in ("mundlak", "within_between"):
            return design.row_map(self.kind)
        p = design.k + 1
        return np.eye(p), np.zeros((p, p))

    def _rows_of(self, design):
        # the pooled and random kinds use the design's columns as they are: share them
        # (nothing writes to a model's rows) instead of a copy per model and posterior
        M = design.X if self.kind in ("pooled", "random") else self._matrix(design)[0]
        return M, design.y, design.unit_codes

    @property
    def rows(self):
        """``(M, y, unit_codes)`` on the estimation rows, or None; made from the design
        on first use when the model was built on one."""
        if getattr(self, "_rows", None) is None and getattr(self, "_rows_from", None):
            self._rows = self._rows_from()
            self._rows_from = None
        return getattr(self, "_rows", None)

    @rows.setter
    def rows(self, value):
        self._rows = value
        self._rows_from = None

    @classmethod
    def from_suffstats(cls, stats, labels, *, outcome="y", units=None, priors=None,
                       likelihood="marginal", rows=None, design_spec=None, errors="iid",
                       time=None):
        """Build the model from precomputed sufficient statistics (no rows needed).

        Parameters
        ----------
        stats : SuffStats
            Statistics of ``[M, y]`` for this model's design kind (``p = len(labels) + 1``).
        labels : list of str
            Column labels of ``M`` (e.g. from ``Design.matrices(kind)``).
        outcome : str
        units : sequence, optional
            Unit labels (default ``0..N-1``).
        rows : tuple (M, y, unit_codes), optional
            The rows, needed only for ``likelihood="latent"``, predictive draws and LOO.
        design_spec : dict, optional
            Saved with the model specification.
        errors : {"iid", "ar1"}
            With ``"ar1"`` the AR(1) statistics are computed from ``rows`` and ``time``
            (both required): the occasion of every row as a number
            (:func:`bayespanel.core.ar1.occasion_times`).
        """
        obj = cls.__new__(cls)
        obj._check_likelihood(likelihood)
        obj._set_errors(errors, likelihood)
        obj.design = None
        obj.ar1_stats = obj.ar1_time = None
        if obj.errors == "ar1":
            obj.ar1_stats, obj.ar1_time = _ar1_of_rows(rows, time, list(labels) + [outcome])
        obj._setup(stats, list(labels), outcome=outcome, units=units, priors=priors,
                   likelihood=likelihood, rows=rows, design_spec=design_spec)
        return obj

    def _check_likelihood(self, likelihood):
        if likelihood not in self.likelihoods:
            hint = "" if likelihood not in LIKELIHOODS else (
                f"; {type(self).__name__} has no unit intercepts to make latent")
            raise SpecificationError(choices_error("likelihood", likelihood, self.likelihoods)
                                     .args[0] + hint)

    def _matrix(self, design):
        return design.matrices(self.kind)

    def _setup(self, stats, labels, *, outcome, units, priors, likelihood, rows, design_spec,
               rows_from=None):
        labels = [str(x) for x in labels]
        if stats.k != len(labels):
            raise SpecificationError(
                f"labels has {len(labels)} names but the statistics have {stats.k} covariate "
                "columns")
        if likelihood == "latent" and rows is None and rows_from is None:
            raise SpecificationError(
                "likelihood='latent' needs the rows (M, y, unit_codes); build from a panel or "
                "pass rows=")
        self.labels = labels
        self.outcome = str(outcome)
        self.likelihood = likelihood
        self.units = pd.Index(units if units is not None else np.arange(stats.n_units))
        if len(self.units) != stats.n_units:
            raise SpecificationError(
                f"units has {len(self.units)} labels but the statistics have {stats.n_units} units")
        self.intercept = (labels.index("Intercept")
                          if "Intercept" in labels and self.kind != "within" else None)
        if self.unit_effects == "random" and np.all(np.asarray(stats.lengths) == 1):
            raise EstimationError(
                f"every unit has a single row, so in {type(self).__name__} the unit "
                "intercepts and the residuals cannot be told apart (sigma_unit and sigma_obs "
                "are not identified); use Pooled, or a panel with repeated occasions")
        self.stats = stats
        self.rows = rows
        self._rows_from = rows_from
        self.scaling = self._scaling(stats)
        sd = _column_sd(stats, self.kind)
        priors = kinds.with_default_priors(type(self), priors)
        self.priors = resolve_priors(priors, labels, intercept=self.intercept, sd_y=sd[-1],
                                     mean_y=float(stats.mean[-1]), sd_x=sd[:-1],
                                     has_unit_sd=self.unit_effects == "random",
                                     rho=self._rho_range())
        self._check_rho_prior()
        self.spec = ModelSpec(
            model=type(self).__name__, kind=self.kind, unit_effects=self.unit_effects,
            likelihood=likelihood, outcome=self.outcome, labels=tuple(labels),
            priors=tuple((k, tuple(sorted(p.to_dict().items())))
                         for k, p in self.priors.items()),
            design=tuple(design_spec.items()) if design_spec else None, errors=self.errors)
        self._nutpie = None
        self._pymc_logp = None  # compiled log density and gradient (bayes.sampling)
        self.pymc_model = self._build()
        mark_built(self)  # so that a user's additions to pymc_model are known

    def _rho_range(self):
        """Default range of ``rho``: (-1, 1), or [0, 1) when some gap between occasions
        is not a whole number (``rho^d`` of a negative ``rho`` is not real); None
        without AR(1) errors."""
        if self.errors != "ar1":
            return None
        return (-1.0, 1.0) if self.ar1_stats.integer_gaps else (0.0, 1.0)

    def _check_rho_prior(self):
        if self.errors != "ar1" or self.ar1_stats.integer_gaps:
            return
        lower = self.priors["rho"].kwargs["lower"]
        if lower < 0:
            gaps = self.ar1_stats.gaps
            odd = gaps[gaps != np.round(gaps)]
            raise SpecificationError(
                f"priors['rho'] allows negative rho (lower={lower:g}), but some gaps between "
                f"occasions are not whole numbers (e.g. {odd[0]:g}), and rho^gap of a "
                "negative rho has no real value; give the prior a lower bound of 0 or more")

    def _scaling(self, stats) -> gaussian.Scaling:
        sd = _column_sd(stats, self.kind)
        dof = max(stats.n - 1, 1)
        size = np.sqrt(np.diag(stats.total) / dof + np.asarray(stats.mean) ** 2)
        bad = [j for j in range(stats.p) if not sd[j] > 1e-9 * max(size[j], 1e-300)
               and j != self.intercept]
        if bad:
            names = (self.labels + [self.outcome])
            raise EstimationError(
                "no variation to estimate from in column(s) "
                + ", ".join(repr(names[j]) for j in bad)
                + (" within units" if self.kind == "within" else ""))
        center = np.zeros(stats.p)
        if self.intercept is not None:
            center = np.asarray(stats.mean, dtype=float).copy()
            center[self.intercept] = 0.0
        scale = sd.copy()
        if self.intercept is not None:
            scale[self.intercept] = 1.0
        return gaussian.Scaling(tuple(center), tuple(scale), self.intercept)

    # ------------------------------------------------------------------ graph
    def _prior_values(self, scaling) -> dict:
        """Standardised prior parameters, keyed by their pm.Data names."""
        out = {}
        for fam, idx in self._coef_groups().items():
            cols = {}
            for j in idx:
                par = prior_on_standard_scale(self.priors[self.labels[j]], scaling, j,
                                              self.intercept)
                for name, val in par.items():
                    cols.setdefault(name, []).append(val)
            for name, vals in cols.items():
                out[f"prior_coef_{fam}_{name}"] = np.asarray(vals, dtype=float)
        for comp in self._sd_names():
            par = prior_on_standard_scale(self.priors[comp], scaling)
            for name, val in par.items():
                out[f"prior_{comp}_{name}"] = np.asarray(val, dtype=float)
        if self.errors == "ar1":   # a correlation: the same on every scale
            for name, val in self.priors["rho"].kwargs.items():
                out[f"prior_rho_{name}"] = np.asarray(val, dtype=float)
        return out

    def _sd_names(self):
        return ["sigma_obs"] + (["sigma_unit"] if self.unit_effects == "random" else [])

    def _coef_groups(self) -> dict:
        groups = {}
        for j, lab in enumerate(self.labels):
            groups.setdefault(self.priors[lab].family, []).append(j)
        return groups

    def _data_values(self) -> dict:
        """Every pm.Data value of the marginal graph for the current statistics."""
        vals = {}
        if self.errors == "ar1":
            vals.update(ar1.data_values(self._ar1_arrays()))
        elif self.likelihood == "marginal":
            std = self.scaling.standardise(self.stats)
            vals.update({f"stats_{k}": v for k, v in std.items()})
            vals["stats_n"] = np.asarray(float(self.stats.n))
            vals["stats_n_units"] = np.asarray(float(self.stats.n_units))
        A, a0 = self.scaling.coef_map()
        vals["coef_map"] = A
        vals["coef_offset"] = a0
        vals["scale_y"] = np.asarray(self.scaling.scale_y)
        vals.update(self._prior_values(self.scaling))
        return vals

    def _build(self):
        import pymc as pm
        import pytensor.tensor as pt

        coords = {"term": self.labels}
        groups = self._coef_groups()
        if len(groups) > 1:
            for fam, idx in groups.items():
                coords[f"term_{fam}"] = [self.labels[j] for j in idx]
        if self.likelihood == "latent" or self.unit_effects != "none":
            coords["unit"] = self._unit_coord()
        vals = self._data_values()
        with pm.Model(coords=coords) as model:
            d = {name: pm.Data(name, val) for name, val in vals.items()}
            parts, order = [], []
            for fam, idx in groups.items():
                name = "coef_std" if len(groups) == 1 else f"coef_std_{fam}"
                dims = "term" if len(groups) == 1 else f"term_{fam}"
                par = {k[len(f"prior_coef_{fam}_"):]: v for k, v in d.items()
                       if k.startswith(f"prior_coef_{fam}_")}
                parts.append(coef_rv(pm, name, fam, par, dims))
                order.extend(idx)
            b_std = parts[0] if len(parts) == 1 else pt.concatenate(parts)[np.argsort(order)]
            sig = {}
            for comp in self._sd_names():
                par = {k[len(f"prior_{comp}_"):]: v for k, v in d.items()
                       if k.startswith(f"prior_{comp}_")}
                sig[comp] = sd_rv(pm, f"{comp}_std", self.priors[comp].family, par)
            sigma = sig["sigma_obs"]
            tau = sig.get("sigma_unit")
            if self.errors == "ar1":
                par = {k[len("prior_rho_"):]: v for k, v in d.items()
                       if k.startswith("prior_rho_")}
                rho = rho_rv(pm, "rho", self.priors["rho"].family, par)
                self._ar1_potential(pm, pt, d, b_std, sigma, tau, rho)
            elif self.likelihood == "marginal":
                self._marginal_potential(pm, pt, d, b_std, sigma, tau)
            else:
                self._latent_likelihood(pm, b_std, sigma, tau, d["scale_y"])
            pm.Deterministic("coef", d["coef_map"] @ b_std + d["coef_offset"], dims="term")
            pm.Deterministic("sigma_obs", d["scale_y"] * sigma)
            if tau is not None:
                pm.Deterministic("sigma_unit", d["scale_y"] * tau)
                pm.Deterministic("icc", intraclass_correlation(tau ** 2, sigma ** 2))
        return model

    def _unit_coord(self):
        """The unit labels for the graph's ``unit`` dimension. PyMC keeps them as a tuple of
        Python objects (about 40 bytes a unit); models built on one design share the
        design's tuple instead of holding one each."""
        d = getattr(self, "design", None)
        if d is not None and hasattr(d, "unit_labels") and self.units.equals(d.units):
            return d.unit_labels()
        return list(self.units)

    def _marginal_potential(self, pm, pt, d, b_std, sigma, tau):
        v = gaussian.residual_vector(b_std, xp=pt)
        if self.unit_effects == "fixed":
            ll = gaussian.within_loglik(v, d["stats_within"], d["stats_n"], d["stats_n_units"],
                                        sigma, xp=pt)
        else:
            ll = gaussian.marginal_loglik(
                v, d["stats_within"], d["stats_group_cp"], d["stats_group_mean"],
                d["stats_group_count"], d["stats_lengths"], sigma,
                tau if tau is not None else 0.0, xp=pt)
        pm.Potential("loglik", ll)

    def _ar1_arrays(self):
        """The AR(1) statistics on the standardised columns (:meth:`ar1.AR1Stats.arrays`)."""
        return self.ar1_stats.arrays(center=self.scaling.c, scale=self.scaling.s)

    def _ar1_potential(self, pm, pt, d, b_std, sigma, tau, rho):
        """The AR(1) marginal log-likelihood (:func:`bayespanel.core.ar1.loglik`) on the
        standardised columns: the numbers that change with the outcome are ``pm.Data``
        (``ar1_*``, :func:`bayespanel.core.ar1.data_values`), the link structure is fixed."""
        arrays = ar1.with_values(self._ar1_arrays(), d)
        self._ar1_structure = ar1.structure(arrays)
        v = gaussian.residual_vector(b_std, xp=pt)
        t = None if self.unit_effects == "fixed" else (tau if tau is not None else 0.0)
        pm.Potential("loglik", ar1.loglik(v, arrays, rho, sigma, t, xp=pt))

    def _latent_likelihood(self, pm, b_std, sigma, tau, scale_y):
        M, y, codes = self.rows
        Ms, ys = self.scaling.standardise_rows(np.asarray(M, float), np.asarray(y, float))
        Xd = pm.Data("rows_X", Ms)
        yd = pm.Data("rows_y", ys)
        cd = pm.Data("rows_unit", np.asarray(codes, dtype=np.int64))
        if self.unit_effects == "random":
            z = pm.Normal("unit_std", 0.0, 1.0, dims="unit")
            u = tau * z
        else:
            u = pm.Flat("unit_std", dims="unit")
        pm.Deterministic("unit_effect", scale_y * u, dims="unit")
        pm.Normal("y_std", mu=Xd @ b_std + u[cd], sigma=sigma, observed=yd)

    # ------------------------------------------------------------------ data swap
    def set_suffstats(self, stats, rows=None, time=None):
        """Swap in new sufficient statistics without rebuilding or recompiling the graph.

        The priors stay as resolved at build time (fixed on the data scale); the internal
        standardisation follows the new statistics. Shapes must match: same columns,
        and for ``likelihood="latent"`` the new ``rows`` with the same units.

        Parameters
        ----------
        stats : SuffStats
        rows : tuple (M, y, unit_codes), optional
            The new rows (required for the latent likelihood and for ``errors="ar1"``);
            without them the model forgets its rows (predictive draws and LOO then need a
            panel).
        time : array (n,), optional
            ``errors="ar1"``: the occasion of every new row as a number (default: the
            model's, for new outcomes on the same rows). The new rows must have the same
            link structure (units, occasions and gaps; :func:`bayespanel.core.ar1.structure`)
            as the model's: other rows need a new model (``from_suffstats(...,
            errors="ar1", time=...)``), as exact refits and K-fold build.
        """
        new_ar1 = None
        if self.errors == "ar1":
            if rows is None:
                raise SpecificationError(
                    "set_suffstats of a model with errors='ar1' needs rows= (M, y, "
                    "unit_codes): the AR(1) statistics are computed from the rows")
            if time is None:
                if self.ar1_time is None or len(self.ar1_time) != len(rows[1]):
                    raise SpecificationError(
                        "set_suffstats of a model with errors='ar1' needs time= (the "
                        "occasion of every new row) when the rows are not the model's")
                time = self.ar1_time
            new_ar1, time = _ar1_of_rows(rows, time, self.labels + [self.outcome])
        if stats.p != self.stats.p:
            raise SpecificationError(
                f"the new statistics have {stats.k} covariate columns; this model has "
                f"{self.stats.k} ({', '.join(self.labels)})")
        if self.likelihood == "latent":
            if rows is None or stats.n_units != self.stats.n_units:
                raise SpecificationError(
                    "a latent-intercept model needs rows= with the same units to swap data")
        if stats.n_units != self.stats.n_units:
            self.units = pd.Index(np.arange(stats.n_units))
        if new_ar1 is not None:
            scaling = self._scaling(stats)
            arrays = new_ar1.arrays(center=scaling.c, scale=scaling.s)
            if ar1.structure(arrays) != self._ar1_structure:
                raise SpecificationError(
                    "the new rows of this errors='ar1' model have another link structure "
                    "(units, occasions or gaps between them) than the rows it was built on; "
                    "build a new model on them (from_suffstats(..., errors='ar1', time=...))")
            self.ar1_stats, self.ar1_time = new_ar1, time
        self.stats = stats
        self.rows = rows
        self.scaling = self._scaling(stats)
        vals = self._data_values()
        if self.likelihood == "latent":
            M, y, codes = rows
            Ms, ys = self.scaling.standardise_rows(np.asarray(M, float), np.asarray(y, float))
            vals.update(rows_X=Ms, rows_y=ys, rows_unit=np.asarray(codes, dtype=np.int64))
        import pymc as pm

        with self.pymc_model:
            pm.set_data(vals)
        return self

    # ------------------------------------------------------------------ sampling
    def sample(self, draws=1000, tune=1000, chains=4, seed=1, sampler="auto", progress=True,
               cores=None, target_accept=0.8, start=None):
        """Draw from the posterior with NUTS; returns a :class:`~bayespanel.bayes.posterior.Posterior`.

        Parameters
        ----------
        draws, tune, chains : int
        seed : int or None
            The same seed gives identical draws (with the same sampler). ``None`` draws a
            seed from the operating system and records it in the posterior.
        sampler : {"auto", "pymc", "nutpie"}
            ``"auto"`` picks by model size: see
            :func:`bayespanel.bayes.sampling.choose_sampler` (measured in
            bench/bench_models.py).
        progress : bool
        cores : int, optional
            Chains run in parallel on up to this many processes (default: 1 for PyMC's
            sampler with the marginal likelihood, whose chains cost less than starting
            processes; else ``min(chains, CPUs)``;
            :func:`bayespanel.bayes.sampling.default_cores`). The draws do not depend on it.
        target_accept : float
        start : {"mode", "jitter"}, optional
            Where the chains start: ``"mode"`` (the default for the marginal likelihood)
            starts them around the posterior mode with the Laplace covariance as the
            initial mass matrix, so that warm-up does not grow with the rows;
            ``"jitter"`` is the previous start (see :mod:`bayespanel.bayes.sampling`).

        Notes
        -----
        Hoffman and Gelman (2014), The No-U-Turn sampler, JMLR 15, 1593-1623. Diagnostics
        are checked after sampling and reported with :class:`~bayespanel.SamplingWarning`.
        """
        from .posterior import Posterior
        from .sampling import run

        dt, info = run(self, draws=draws, tune=tune, chains=chains, seed=seed, sampler=sampler,
                       progress=progress, cores=cores, target_accept=target_accept, start=start)
        post = Posterior.from_model(self, dt, info)
        post.diagnostics(warn=True)
        return post

    def sample_prior_predictive(self, draws=500, seed=1):
        """Draws from the prior and, when the rows are known, of the outcome.

        Returns
        -------
        xarray.DataTree
            Group ``prior`` (``coef``, ``sigma_obs``, ``sigma_unit``, ``icc`` on the data
            scale) and, with rows, ``prior_predictive`` with ``y`` on every estimation row:
            ``y = M b + u_i + e`` with ``u_i ~ N(0, sigma_unit^2)`` and ``e`` independent or,
            with ``errors="ar1"``, AR(1) on the rows' occasions (none for ``Pooled``;
            :class:`FixedEffects` has no proper prior for the intercepts, so its outcome
            draws hold the unit means of the data fixed).
        """
        import pymc as pm
        import xarray as xr

        from .sampling import check_int
        from .posterior import simulate_outcome

        check_int("draws", draws, 1)
        names = ["coef", "sigma_obs"] + (["sigma_unit", "icc"] if self.unit_effects == "random"
                                         else []) + (["rho"] if self.errors == "ar1" else [])
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=".*Potential.*")
            dt = pm.sample_prior_predictive(draws=draws, model=self.pymc_model,
                                            random_seed=seed, var_names=names)
        prior = dt["prior"].to_dataset()[names]
        groups = {"prior": xr.DataTree(prior)}
        if self.rows is not None:
            rng = np.random.default_rng(seed)
            b = prior["coef"].values.reshape(-1, len(self.labels))
            sig = prior["sigma_obs"].values.ravel()
            tau = prior["sigma_unit"].values.ravel() if "sigma_unit" in prior else None
            M, y, codes = self.rows
            fixed = None
            if self.unit_effects == "fixed":
                fixed = _ss_unit_mean_residual(self.stats, b)
            errors = None
            if self.errors == "ar1":     # AR(1) errors on the rows' own occasions
                tl = ar1.Timeline.build(codes, self.ar1_time)
                errors = ar1.simulate_errors(tl, prior["rho"].values.ravel(), sig, rng)
            yrep = simulate_outcome(M, codes, b, sig, tau, rng, unit_shift=fixed,
                                    errors=errors)
            groups["prior_predictive"] = xr.DataTree(xr.Dataset(
                {"y": (("chain", "draw", "row"), yrep[None])}))
        return xr.DataTree.from_dict(groups)

    def __repr__(self):
        errors = "" if self.errors == "iid" else f", errors={self.errors!r}"
        return (f"{type(self).__name__}({self.outcome} ~ {', '.join(self.labels)}; "
                f"{self.stats.n} rows, {self.stats.n_units} units, {self.likelihood}{errors})")


def _ar1_of_rows(rows, time, names):
    """``(AR1Stats, numeric times)`` of rows ``(M, y, unit_codes)`` at occasions ``time``."""
    if rows is None or time is None:
        raise SpecificationError(
            "a model with errors='ar1' built from statistics needs rows= (M, y, unit_codes) "
            "and time= (the occasion of every row): the AR(1) statistics come from the rows "
            "in time order")
    M, y, codes = rows
    t = ar1.occasion_times(time)
    if len(t) != len(y):
        raise SpecificationError(f"time has {len(t)} values for {len(y)} rows")
    return ar1.compute(M, y, codes, t, names=names), t


def _check_errors(errors):
    if not isinstance(errors, str) or errors not in ar1.ERRORS:
        raise choices_error("errors", errors, ar1.ERRORS)
    return errors


def _ss_unit_mean_residual(stats, b):
    """Per draw and unit, ``ybar_i - xbar_i'b`` (the fixed-effects intercept at its centre)."""
    v = gaussian.residual_vector(np.atleast_2d(b))
    return v @ stats.unit_mean.T


class Pooled(GaussianModel):
    """Pooled linear regression, ``y_it = x_it'b + e_it`` (no unit intercepts)."""

    kind = "pooled"
    unit_effects = "none"
    likelihoods = ("marginal",)


class RandomIntercept(GaussianModel):
    """Random-intercept model, ``y_it = x_it'b + u_i + e_it``, ``u_i ~ N(0, sigma_unit^2)``."""

    kind = "random"


class WithinBetween(GaussianModel):
    """Within-between (hybrid) model: each time-varying ``x`` enters as its within part
    ``x_it - xbar_i`` (``"x (within)"``) and its unit mean ``xbar_i`` (``"x (between)"``),
    with random intercepts (Neuhaus and Kalbfleisch 1998, Biometrics 54, 638-645)."""

    kind = "within_between"


class CorrelatedEffects(GaussianModel):
    """Correlated random effects (Mundlak 1978): the original columns plus the unit mean of
    each time-varying covariate (``"x (unit mean)"``), with random intercepts. The
    coefficient of ``x`` equals the within effect; that of its unit mean is the contextual
    effect."""

    kind = "mundlak"


class FixedEffects(GaussianModel):
    """Fixed effects: unit intercepts with flat priors, integrated out to the within
    likelihood ``p(y | b, sigma) ∝ sigma^-(n-N) exp(-sum_i W_i / 2 sigma^2)``.

    Only time-varying covariates are estimable; they enter on the original scale so that
    the unit intercepts ``ybar_i - xbar_i'b`` can be recovered after sampling.
    """

    kind = "within"
    unit_effects = "fixed"

    def _design_stats(self, design):
        if design.time_constant:
            warnings.warn(
                f"FixedEffects leaves out {', '.join(map(repr, design.time_constant))}: "
                "constant within units, absorbed by the unit intercepts (not estimable)",
                DataHandlingWarning, skip_file_prefixes=(_PKG_DIR,))
        return design.model_suffstats("within")

    def _matrix(self, design):
        labels = design.labels("within")
        cols = [design.terms.index(t) for t in labels]
        return design.X[:, cols], labels

    def _row_map(self, design):
        # the original time-varying columns (the AR(1) density takes the within limit)
        cols = [design.terms.index(t) for t in design.labels("within")] + [design.k]
        A = np.eye(design.k + 1)[cols]
        return A, np.zeros_like(A)


BUILDERS = {cls.__name__: cls for cls in
            (Pooled, RandomIntercept, WithinBetween, CorrelatedEffects, FixedEffects)}
