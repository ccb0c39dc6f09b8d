"""Posterior: labelled summaries, diagnostics, unit effects and predictive draws.

A :class:`Posterior` wraps the ``xarray.DataTree`` returned by the sampler together with
what was needed to build the model: its :class:`~bayespanel.bayes.builders.ModelSpec`,
the sufficient statistics and (when known) the estimation rows. Everything computed from
the draws calls the one implementation of the mathematics in
:mod:`bayespanel.core.gaussian`.

Summaries answer with the same names as the reference fits (:mod:`bayespanel.data.resultshape`):
``coef`` (posterior means), ``sd`` (posterior SDs, the error column), ``interval(prob)``
(equal-tailed credible intervals), ``table()`` (columns ``estimate``, ``sd``, ``lower``,
``upper``), ``variance_partition()``, ``icc``, ``n_obs``, ``n_units``, ``sigma_unit`` and
``sigma_obs``.

Saved posteriors are NetCDF files (through xarray, engine h5netcdf) with the model
specification as JSON attributes; nothing is pickled.

References
----------
.. [1] Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. and Bürkner, P.-C. (2021).
   Rank-normalization, folding, and localization: an improved R-hat for assessing
   convergence of MCMC. Bayesian Analysis 16, 667-718. doi:10.1214/20-BA1221
.. [2] Betancourt, M. (2016). Diagnosing suboptimal cotangent disintegrations in
   Hamiltonian Monte Carlo. arXiv:1604.00695
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import xarray as xr

from .. import kinds
from ..core.errors import SamplingWarning, SpecificationError
from ..core.mathcore import unit_sd_draws
from ..core import providers
from .contrasts import contrast_covariates, contrast_draws, within_between_contrasts
from .partition import design_partition, variance_partition
from .pointwise import simulate_outcome  # noqa: F401 (public here)
from .posteriorfile import posterior_parts, posterior_tree, read_tree, write_tree
from .spec import ModelSpec
from .unitdraws import UnitDraws
from ..core.jsonsafe import jsonable
from ..data.resultshape import check_prob, term_records
from ..core.suffstats import SuffStats

__all__ = ["Posterior", "simulate_outcome", "THRESHOLDS"]

#: diagnostic thresholds (Vehtari et al. 2021 for R-hat and ESS; Betancourt 2016 for BFMI)
THRESHOLDS = {"rhat": 1.01, "ess_per_chain": 100, "bfmi": 0.3}


def _percent(q) -> str:
    return f"{100 * q:.10g}%"


class Posterior(UnitDraws):
    """Posterior draws of a Gaussian panel model, with labelled summaries.

    Build with :meth:`bayespanel.bayes.GaussianModel.sample` or :meth:`Posterior.load`.

    Attributes
    ----------
    idata : xarray.DataTree
        The sampler's output (groups ``posterior``, ``sample_stats``).
    spec : ModelSpec
    stats : SuffStats
    units : pandas.Index
    rows : tuple (M, y, unit_codes) or None
    time : numpy.ndarray or None
        The occasion label (the design's ``time`` value) of every estimation row, when the
        model was built from a Panel; kept by :meth:`save` / :meth:`load`. LOO tables and
        Pareto-k warnings name occasions by it.
    row_labels : numpy.ndarray or None
        The index labels of the estimation rows in the Panel's data (``Design.rows``).
    sampling : dict
        Sampler, seed, sizes and timings.
    model : GaussianModel or None
        The model the draws came from (None for a loaded posterior): exact LOO refits and
        K-fold sample it again, with any variables or potentials the user added to its
        ``pymc_model`` (docs/bayesian-models.md).
    edits : list of str
        What the user added to the model's ``pymc_model`` before sampling
        (:func:`bayespanel.bayes.graph.graph_edits`); empty for the model as built.
        Added variables are rows of :meth:`summary` and are checked by :meth:`diagnostics`.
    """

    #: the attribute marking the saved files of a subclass, which registers itself for
    #: :meth:`load` (see ``__init_subclass__``); None for this class
    file_marker: str | None = None
    _file_kinds: dict = {}

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        if cls.__dict__.get("file_marker"):
            Posterior._file_kinds[cls.file_marker] = cls

    def __init__(self, idata, spec: ModelSpec, stats: SuffStats, units, rows=None,
                 sampling=None, scaling=None, time=None, row_labels=None, ar1_time=None):
        self.idata = idata
        self.spec = spec
        self.stats = stats
        self.units = pd.Index(units)
        if callable(rows):  # made on first use (predictive draws, LOO, partitions)
            self._rows, self._rows_from = None, rows
        else:
            self.rows = rows
        self.sampling = dict(sampling or {})
        self.scaling = scaling
        n = None if rows is None else int(stats.n)
        for name, v in (("time", time), ("row_labels", row_labels), ("ar1_time", ar1_time)):
            if v is not None and n is not None and len(v) != n:
                raise SpecificationError(f"{name} has {len(v)} values for {n} estimation rows")
        self.time = None if time is None else np.asarray(time)
        self.row_labels = None if row_labels is None else np.asarray(row_labels)
        #: ``errors="ar1"``: the occasion of every estimation row as a number (the gaps
        #: of the AR(1) are its differences; :func:`bayespanel.core.ar1.occasion_times`)
        self.ar1_time = None if ar1_time is None else np.asarray(ar1_time, dtype=float)
        #: the design the model was built on (set by :meth:`from_model`; ``None`` after
        #: :meth:`load`): without rows at hand, partitions, contrasts and LOO use its
        #: statistics (``Design.has_rows``)
        self.design = None
        self._cache = {}
        self.model, self.edits, self.graph = None, [], None

    def _keep_model(self, model):
        """Keep ``model``, what the user added to its graph and the graph sampled (a later
        edit of the model is then told apart from the graph these draws came from)."""
        from .graph import graph_edits, graph_identity

        self.model = model
        self.edits = graph_edits(model)
        self.graph = graph_identity(model.pymc_model)
        return self

    @property
    def rows(self):
        """``(M, y, unit_codes)`` on the estimation rows, or None. A posterior of a model
        built on a Design makes them from it on first use, so sampling holds no copy of
        the rows until a method needs them."""
        if self._rows is None and self._rows_from is not None:
            self._rows, self._rows_from = self._rows_from(), None
        return self._rows

    @rows.setter
    def rows(self, value):
        self._rows, self._rows_from = value, None

    @staticmethod
    def _row_info(model) -> dict:
        """``time`` and ``row_labels`` of a model built from a Panel (else ``None``)."""
        d = getattr(model, "design", None)
        if d is None or not getattr(d, "has_rows", True):
            return {"time": None, "row_labels": None}
        return {"time": getattr(d, "time", None), "row_labels": np.asarray(d.rows)}

    @classmethod
    def from_model(cls, model, idata, info) -> "Posterior":
        pending = getattr(model, "_rows", None) is None and getattr(model, "_rows_from", None)
        rows = (lambda: model.rows) if pending else model.rows
        post = cls(idata, model.spec, model.stats, model.units, rows=rows, sampling=info,
                   scaling=model.scaling, ar1_time=getattr(model, "ar1_time", None),
                   **cls._row_info(model))
        post.design = getattr(model, "design", None)
        return post._keep_model(model)

    def __repr__(self):
        post = self.idata["posterior"]
        return (f"Posterior({self.spec.model}, {post.sizes['chain']} chains x "
                f"{post.sizes['draw']} draws, sampler {self.sampling.get('sampler')!r})")

    # ------------------------------------------------------------------ draws
    @property
    def n_chains(self) -> int:
        return int(self.idata["posterior"].sizes["chain"])

    @property
    def n_draws(self) -> int:
        return int(self.idata["posterior"].sizes["draw"])

    @property
    def labels(self) -> list:
        return list(self.spec.labels)

    @property
    def parameter_names(self) -> list:
        """Rows of :meth:`summary`: coefficients, then the variance components."""
        extra = ["sigma_unit", "sigma_obs", "icc"] if self.spec.unit_effects == "random" \
            else ["sigma_obs"]
        if self.spec.errors == "ar1":
            extra.append("rho")
        return self.labels + extra

    def draws(self, name) -> np.ndarray:
        """Draws of a posterior variable or of one coefficient label, as numpy.

        ``name`` is a variable of the posterior group (``"coef"``, ``"sigma_obs"``, ...) or
        a coefficient label such as ``"x (within)"``; the result has shape
        ``(chain, draw, ...)``.
        """
        post = self.idata["posterior"]
        if name in self.labels:  # first: a column may share a name with an inner variable
            j = self.labels.index(name)
            return np.asarray(post["coef"].values[:, :, j])
        if name in post.data_vars:
            return np.asarray(post[name].values)
        raise SpecificationError(
            f"no draws named {name!r}; choose a variable ({', '.join(post.data_vars)}) or a "
            f"term ({', '.join(self.labels)})")

    def _flat(self, name, thin=1):
        return self.draws(name)[:, ::thin].reshape((-1,) + self.draws(name).shape[2:])

    # ------------------------------------------------------------------ summaries
    def _summarise(self, named: dict, prob: float) -> pd.DataFrame:
        import arviz_stats as azs

        lo, hi = (1 - prob) / 2, 1 - (1 - prob) / 2
        rows = {}
        for label, arr in named.items():
            flat = arr.reshape(-1)
            multi = arr.shape[0] > 1
            rows[label] = {
                "mean": float(flat.mean()),
                "sd": float(flat.std(ddof=1)),
                _percent(lo): float(np.quantile(flat, lo)),
                _percent(hi): float(np.quantile(flat, hi)),
                "rhat": float(azs.rhat(arr)) if multi else np.nan,
                "ess_bulk": float(azs.ess(arr, method="bulk")),
                "ess_tail": float(azs.ess(arr, method="tail", prob=(0.05, 0.95))),
            }
        return pd.DataFrame.from_dict(rows, orient="index")

    def _named_draws(self) -> dict:
        out = {lab: self.draws(lab) for lab in self.labels}
        for name in self.parameter_names[len(self.labels):]:
            out[name] = self.draws(name)
        for name, arr in self._added_draws().items():
            out.setdefault(name, arr)
        return out

    def _added_draws(self) -> dict:
        """Draws of the variables the user added to the model's graph (:attr:`edits`)
        that the sampler recorded: one entry per element, labelled ``name`` or
        ``name[label]`` by the variable's coordinates (its positions where it has none)."""
        post = self.idata["posterior"]
        out = {}
        for name in self.edits:
            if name not in post.data_vars:
                continue
            da = post[name]
            arr = np.asarray(da.values)
            if arr.ndim == 2:
                out[name] = arr
                continue
            labels = [da.coords[d].values if d in da.coords else np.arange(da.sizes[d])
                      for d in da.dims[2:]]
            for idx in np.ndindex(*arr.shape[2:]):
                where = ", ".join(str(labels[a][i]) for a, i in enumerate(idx))
                out[f"{name}[{where}]"] = arr[(slice(None), slice(None)) + idx]
        return out

    def summary(self, prob: float | None = None) -> pd.DataFrame:
        """Posterior mean, SD, equal-tailed interval, R-hat and ESS of every parameter.

        Rows are the coefficient labels (``"x"``, ``"x (within)"``, ``"x (between)"``,
        ``"x (unit mean)"``, ``"occasion[2003]"``) and then ``sigma_unit``, ``sigma_obs``
        and ``icc`` (``sigma_unit^2 / (sigma_unit^2 + sigma_obs^2)``), followed by any
        variable the user added to the model's ``pymc_model`` (:attr:`edits`). Interval columns are
        labelled by their quantile, e.g. ``2.5%`` and ``97.5%`` for ``prob=0.95``. R-hat
        is the rank-normalised split R-hat and ESS the bulk and tail effective sample
        sizes of Vehtari et al. (2021), from arviz_stats.
        """
        prob = check_prob(prob)
        key = ("summary", prob)
        if key not in self._cache:
            self._cache[key] = self._summarise(self._named_draws(), prob)
        return self._cache[key].copy()

    @property
    def coef(self) -> pd.Series:
        """Posterior means of the coefficients."""
        return pd.Series(self.draws("coef").mean(axis=(0, 1)), index=self.labels,
                         name="estimate")

    @property
    def sd(self) -> pd.Series:
        """Posterior SDs of the coefficients."""
        flat = self._flat("coef")
        return pd.Series(flat.std(axis=0, ddof=1), index=self.labels, name="sd")

    #: name of the error column of :meth:`table` (:mod:`bayespanel.data.resultshape`)
    error_name = "sd"

    @property
    def error(self) -> pd.Series:
        """The error column of :meth:`table`: the posterior SDs (same as :attr:`sd`)."""
        return self.sd

    @property
    def n_obs(self) -> int:
        """Rows of the estimation sample."""
        return int(self.stats.n)

    @property
    def n_units(self) -> int:
        """Units of the estimation sample."""
        return int(self.stats.n_units)

    @property
    def icc(self) -> float:
        """Posterior mean of the ICC ``sigma_unit^2 / (sigma_unit^2 + sigma_obs^2)``;
        ``nan`` for models without a unit variance (pooled, fixed effects), as for the
        reference fits. Its interval is in :meth:`summary` and :meth:`variance_partition`."""
        if "icc" not in self.parameter_names:
            return float("nan")
        return float(self.draws("icc").mean())

    @property
    def sigma_obs(self) -> float:
        return float(self.draws("sigma_obs").mean())

    @property
    def sigma_unit(self) -> float:
        """Posterior mean of the unit SD (0 for Pooled, nan for FixedEffects)."""
        if self.spec.unit_effects == "random":
            return float(self.draws("sigma_unit").mean())
        return 0.0 if self.spec.unit_effects == "none" else float("nan")

    def interval(self, prob: float | None = None) -> pd.DataFrame:
        """Equal-tailed credible intervals of the coefficients (columns lower, upper)."""
        prob = check_prob(prob)
        flat = self._flat("coef")
        q = np.quantile(flat, [(1 - prob) / 2, 1 - (1 - prob) / 2], axis=0)
        return pd.DataFrame({"lower": q[0], "upper": q[1]}, index=self.labels)

    def table(self, prob: float | None = None) -> pd.DataFrame:
        """Coefficients and variance components with the reference fits' column names:
        ``estimate`` (posterior mean), ``sd``, ``lower``, ``upper`` (equal-tailed interval)."""
        prob = check_prob(prob)  # None: the interval option
        s = self.summary(prob)
        lo, hi = _percent((1 - prob) / 2), _percent(1 - (1 - prob) / 2)
        out = s[["mean", "sd", lo, hi]].copy()
        out.columns = ["estimate", "sd", "lower", "upper"]
        out.attrs.update(prob=prob, error="sd")
        return out

    def to_record(self, prob: float | None = None) -> dict:
        """This posterior's part of its model entry in ``results.json`` (``models[]`` in
        docs/results-schema.md): ``coefficients`` (one record per term of
        :meth:`summary`: the posterior mean as ``estimate``, as in :meth:`table`, SD,
        interval, R-hat, bulk and tail ESS), ``scale`` (the
        other parameters of :meth:`summary`, e.g. ``sigma_unit``, ``sigma_obs``, ``icc``,
        without the tail ESS) and ``diagnostics`` (:meth:`diagnostics` without warnings).
        Non-finite numbers are ``None``."""
        prob = check_prob(prob)  # None: the interval option
        summ = self.summary(prob)
        summ = summ.rename(columns={"mean": "estimate",
                                    **dict(zip(summ.columns[2:4], ("lower", "upper")))})
        cols = ("estimate", "sd", "lower", "upper", "rhat", "ess_bulk")
        diag = self.diagnostics(warn=False)
        return {
            "coefficients": term_records(summ.loc[self.labels], cols + ("ess_tail",)),
            "scale": term_records(summ.drop(index=self.labels), cols, key="name"),
            "diagnostics": jsonable({
                "divergences": diag["divergences"], "draws": diag["draws"],
                "max_rhat": diag["max_rhat"], "min_ess_bulk": diag["min_ess_bulk"],
                "min_ess_tail": diag["min_ess_tail"],
                "min_bfmi": float(np.nanmin(diag["bfmi"])) if diag["bfmi"] else None,
                "warnings": list(diag["problems"])}),
        }

    def contextual_effects(self, prob: float | None = None) -> pd.DataFrame:
        """The contextual effect (between minus within) of each time-varying covariate.

        WithinBetween: draws of ``b_between - b_within``; CorrelatedEffects: the
        coefficient of the unit mean itself (Mundlak 1978). Rows are covariate names.
        """
        prob = check_prob(prob)  # None: the interval option
        if not kinds.column_map(self.spec.kind).contrast:
            raise SpecificationError(
                f"{self.spec.model} does not separate within and between effects; contextual "
                "effects come from WithinBetween or CorrelatedEffects")
        terms = contrast_covariates(self.spec.kind, self.labels)
        coef = self.draws("coef")
        D = contrast_draws(self.spec.kind, self.labels, terms, coef.reshape(-1, coef.shape[-1]))
        D = D.reshape(coef.shape[0], coef.shape[1], len(terms))
        named = {t: D[..., j] for j, t in enumerate(terms)}
        return self._summarise(named, check_prob(prob))

    # ------------------------------------------------------------------ diagnostics
    def diagnostics(self, warn: bool = True) -> dict:
        """Divergences, largest R-hat, smallest bulk/tail ESS and BFMI per chain.

        Thresholds (:data:`THRESHOLDS`): R-hat above 1.01 and ESS below 100 per chain
        (Vehtari et al. 2021), any divergence, BFMI below 0.3 (Betancourt 2016, a rule of
        thumb). Each crossed threshold is reported with a :class:`SamplingWarning` naming
        the parameter when ``warn`` is true; the returned dict lists them in ``problems``.
        """
        import arviz_stats as azs

        s = self.summary()
        ss = self.idata["sample_stats"]
        div = int(np.asarray(ss["diverging"].values).sum()) if "diverging" in ss else 0
        bfmi = (np.atleast_1d(azs.bfmi(np.asarray(ss["energy"].values)))
                if "energy" in ss else np.full(self.n_chains, np.nan))
        min_ess = THRESHOLDS["ess_per_chain"] * self.n_chains
        out = {
            "divergences": div,
            "draws": self.n_chains * self.n_draws,
            "max_rhat": float(s["rhat"].max()),
            "max_rhat_parameter": s["rhat"].idxmax() if s["rhat"].notna().any() else None,
            "min_ess_bulk": float(s["ess_bulk"].min()),
            "min_ess_tail": float(s["ess_tail"].min()),
            "min_ess_parameter": s[["ess_bulk", "ess_tail"]].min(axis=1).idxmin(),
            "bfmi": [float(x) for x in bfmi],
            "ess_threshold": min_ess,
        }
        problems = []
        if div:
            problems.append(f"{div} divergent transition(s) in {out['draws']} draws; the "
                            "posterior may be biased (raise target_accept or rethink priors)")
        bad_r = s.index[s["rhat"] > THRESHOLDS["rhat"]]
        if len(bad_r):
            problems.append(f"R-hat above {THRESHOLDS['rhat']} for "
                            + ", ".join(f"{k} ({s.at[k, 'rhat']:.3f})" for k in bad_r))
        ess = s[["ess_bulk", "ess_tail"]].min(axis=1)
        bad_e = ess.index[ess < min_ess]
        if len(bad_e):
            problems.append(f"ESS below {min_ess} ({THRESHOLDS['ess_per_chain']} per chain) for "
                            + ", ".join(f"{k} ({ess[k]:.0f})" for k in bad_e))
        low = [i for i, x in enumerate(bfmi) if x < THRESHOLDS["bfmi"]]
        if low:
            problems.append("BFMI below 0.3 in chain(s) "
                            + ", ".join(f"{i} ({bfmi[i]:.2f})" for i in low))
        out["problems"] = problems
        if warn:
            for msg in problems:
                warnings.warn(f"{self.spec.model}: {msg}", SamplingWarning, stacklevel=2)
        return out

    # ------------------------------------------------------------------ comparison
    # (thin entries; the work is in bayespanel.analysis.loo, reached through the provider
    # declared for "loo" (core.providers), and in bayes.partition and bayes.contrasts)
    def loo(self, level: str = "occasion", **kwargs):
        """LOO at the unit or occasion level; see :func:`bayespanel.analysis.loo.loo`."""
        return providers.provider("loo")(self, level, **kwargs)

    def variance_partition(self, reference=None):
        """Unit/occasion SDs, ICC, quasi-demeaning shares and Rights-Sterba (2019) shares
        per draw; see :func:`bayespanel.bayes.partition.variance_partition`.

        With ``errors="ar1"`` the occasion SD is the stationary SD of the errors, the ICC
        stays the share of the unit variance, and the partition gains ``"correlation one
        step apart"``: the correlation of a unit's outcomes on two occasions one time unit
        apart given the covariates, ``(sigma_unit^2 + rho sigma_obs^2) / (sigma_unit^2 +
        sigma_obs^2)`` (``rho`` for fixed effects, whose intercepts are held fixed). The
        quasi-demeaning shares ``theta`` hold for independent errors only and are ``nan``
        there.
        """
        tau, sigma = self._partition_scale()
        args = (self.spec.kind, self.labels, self._flat("coef"), sigma, tau)
        if self.rows is not None:
            out = variance_partition(self.rows[0], self.rows[2], *args, reference=reference)
        elif self.design is not None:  # a design without rows at hand: its statistics
            out = design_partition(self.design, *args, reference=reference)
        else:
            raise SpecificationError("the variance partition needs the estimation rows or "
                                     "the design the model was built on")
        if self.spec.errors == "ar1":
            out = _with_serial_correlation(out, sigma, tau, self._flat("rho"))
        return out

    def _partition_scale(self):
        """``(tau, sigma)``: draws of the unit SD (0 for pooled, None for fixed effects)
        and of the occasion-level SD the variance partition divides."""
        sigma = self._flat("sigma_obs")
        tau = unit_sd_draws(self.spec.unit_effects, self._flat("sigma_unit")
                            if self.spec.unit_effects == "random" else None, sigma.shape)
        return tau, sigma

    def contrasts(self, rope=None, prob: float | None = None, reference=None,
                  tests: bool = True):
        """Between-minus-within effects with sign and ROPE probabilities, beside the
        Hausman and cluster-robust Mundlak tests; see
        :func:`bayespanel.bayes.contrasts.within_between_contrasts`."""
        prob = check_prob(prob)  # None: the interval option

        if self.rows is None and self.design is None:
            raise SpecificationError("the contrasts need the estimation rows or the design "
                                     "the model was built on")
        # the covariates with both a within and a between coefficient (an occasion
        # indicator of a balanced panel has no between part)
        tv = contrast_covariates(self.spec.kind, self.labels)
        rows = self.rows if tests else None  # without rows at hand: the design's fits
        return within_between_contrasts(self.spec.kind, self.labels, self._flat("coef"), tv,
                                        rope=rope, prob=prob, reference=reference, rows=rows,
                                        design=self.design if tests and rows is None else None)

    # ------------------------------------------------------------------ save / load
    def save(self, path, rows: bool = True) -> None:
        """Write the posterior, its model specification and statistics to a NetCDF file.

        Groups: the sampler's (``posterior``, ``sample_stats``, ...), ``bayespanel_stats``
        (sufficient statistics and unit labels) and, with ``rows=True``, ``bayespanel_rows``
        (the estimation rows, for predictive draws and LOO). The specification, sampling
        record and scaling are JSON strings in the root attributes, with their SHA-256;
        every numeric array carries HDF5's Fletcher-32 checksum, so a damaged file is
        refused on loading rather than read as other numbers. No pickle.

        The file is made in memory and written atomically (a temporary file, fsync, a
        rename), so a full disk or an interrupt leaves no partial file and HDF5 never sees
        the write fail.
        """
        write_tree(self._tree(rows), path)

    def _tree(self, rows: bool) -> "xr.DataTree":
        """The DataTree :meth:`save` writes
        (:func:`~bayespanel.bayes.posteriorfile.posterior_tree`)."""
        return posterior_tree(self, rows)

    @classmethod
    def load(cls, path) -> "Posterior":
        """Read a posterior written by :meth:`save`; its summaries are reproduced exactly.

        Only NetCDF (HDF5) is read, through xarray; nothing is unpickled. Any other file is
        a :class:`SpecificationError` naming it.
        """
        tree = read_tree(path)
        if cls is Posterior:  # a file of a subclass (latent families) goes to its class
            for marker, sub in Posterior._file_kinds.items():
                if marker in tree.attrs:
                    return sub.load(path)
        if "bayespanel_spec" not in tree.attrs:
            raise SpecificationError(f"{path!s} was not written by Posterior.save")
        try:
            return cls._from_tree(tree)
        except (KeyError, ValueError, TypeError, AttributeError, IndexError) as exc:
            # a file that is HDF5 but not as Posterior.save wrote it (edited, damaged)
            raise SpecificationError(
                f"{str(path)!r} is not a posterior file as Posterior.save writes it: "
                f"{type(exc).__name__}: {exc}") from None

    @classmethod
    def _from_tree(cls, tree) -> "Posterior":
        args, edits = posterior_parts(tree)
        post = cls(**args)
        post.edits = edits
        return post


def _with_serial_correlation(part, sigma, tau, rho):
    """``part`` with the correlation one step apart after the ICC and no ``theta``
    (see :meth:`Posterior.variance_partition`)."""
    d = part.draws
    if tau is None:       # fixed effects: the errors' own correlation
        lag1 = np.asarray(rho, dtype=float)
    else:
        t2, s2 = np.asarray(tau, float) ** 2, np.asarray(sigma, float) ** 2
        lag1 = (t2 + rho * s2) / (t2 + s2)
    at = list(d.columns).index("ICC") + 1 if "ICC" in d.columns else len(d.columns)
    d.insert(at, "correlation one step apart", lag1)
    for c in d.columns:
        if c.startswith("theta (T="):
            d[c] = np.nan
    return part
