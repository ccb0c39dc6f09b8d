"""Extending a model through ``m.pymc_model`` (docs/bayesian-models.md).

A model is built on the Grunfeld investment panel (statsmodels.datasets, 10 firms x 20
years) as a pooled regression with flat priors on the coefficients and on sigma_obs, and
sampled with both samplers, so that each keeps its compiled code. Then a variable
(``extra ~ Normal(3, 0.5)``, touching nothing else) and a normal potential on the
coefficient of ``value`` are added, and the model is sampled again with each sampler.

Outside references:

* with ``p(b, sigma) ∝ 1`` the posterior of ``b`` is multivariate Student-t with
  ``n - k - 1`` degrees of freedom, centred at the least-squares fit, scale matrix
  ``SSR / (n - k - 1) (X'X)^-1`` (integrate ``sigma^-n exp(-S(b) / 2 sigma^2)`` over
  sigma: ``S(b)^-(n-1)/2``; the standard normal-linear-model result, e.g. Gelman et al.,
  Bayesian Data Analysis, 3rd ed., section 14.2, there with ``p(sigma^2) ∝ 1/sigma^2``);
  least squares from statsmodels' OLS;
* a potential on one coefficient multiplies that coefficient's marginal by the
  potential, so its posterior is ``t_nu(b_j) N(b_j; m0, s0)`` normalised: its mean and SD
  are integrated numerically with scipy;
* the added variable's posterior is its prior, ``Normal(3, 0.5)`` (scipy.stats.norm).

Sampling is small (2 chains x 400 draws); Monte Carlo tolerances are several standard
errors wide, and each check fails by many tolerances when the edit is ignored (the
potential moves the coefficient by one posterior SD).
"""

import warnings

import numpy as np
import pymc as pm
import pytest
import scipy.integrate
import scipy.stats
import statsmodels.api as sm

import bayespanel as bp
from bayespanel.core.errors import SamplingWarning, SpecificationError
from bayespanel.analysis.loo import _draws
from bayespanel.analysis.loo.psis import refit_draws
from bayespanel.bayes import sampling as smp
from bayespanel.bayes.posterior import Posterior

FORMULA = "invest ~ value + capital"
FLAT = {"coef": "flat", "Intercept": "flat", "sigma_obs": "half_flat"}
KW = dict(draws=400, tune=400, chains=2, seed=5, progress=False)
EXTRA = scipy.stats.norm(3.0, 0.5)


def _t_posterior(df):
    """Marginal Student-t posterior of the ``value`` coefficient under flat priors."""
    X = sm.add_constant(df[["value", "capital"]].to_numpy(float))
    res = sm.OLS(df["invest"].to_numpy(float), X).fit()
    n, k = X.shape
    nu = n - k - 1
    scale = float(np.sqrt(res.ssr / nu * res.normalized_cov_params[1, 1]))
    return scipy.stats.t(nu, loc=float(res.params[1]), scale=scale)


def _with_potential(t, m0, s0):
    """Mean and SD of ``t(b) N(b; m0, s0)``, normalised (scipy quadrature)."""
    lo, hi = t.mean() - 30 * t.std(), t.mean() + 30 * t.std()
    f = lambda b: t.pdf(b) * scipy.stats.norm.pdf(b, m0, s0)  # noqa: E731
    z = scipy.integrate.quad(f, lo, hi, points=[t.mean(), m0], limit=200)[0]
    mean = scipy.integrate.quad(lambda b: b * f(b), lo, hi, points=[t.mean(), m0],
                                limit=200)[0] / z
    var = scipy.integrate.quad(lambda b: (b - mean) ** 2 * f(b), lo, hi,
                               points=[t.mean(), m0], limit=200)[0] / z
    return mean, np.sqrt(var)


@pytest.fixture(scope="module")
def fits(grunfeld):
    panel = bp.Panel(grunfeld, unit="firm", time="year")
    model = bp.Pooled(panel, FORMULA, priors=FLAT)
    t = _t_posterior(grunfeld)
    m0, s0 = t.mean() + 2 * t.std(), t.std()
    out = {"model": model, "t": t, "m0": m0, "s0": s0, "graph": model.pymc_model}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SamplingWarning)
        for sampler in ("pymc", "nutpie"):  # each sampler compiles and keeps its code
            out[("before", sampler)] = model.sample(sampler=sampler, **KW)
        out["compiled"] = (model._nutpie, model._pymc_logp)
        # the documented way to extend a model: add to its PyMC graph
        with model.pymc_model:
            b_value = model.pymc_model["coef"][model.labels.index("value")]
            pm.Potential("value_earlier_study", pm.logp(pm.Normal.dist(m0, s0), b_value))
            pm.Normal("extra", 3.0, 0.5)
        for sampler in ("pymc", "nutpie"):
            out[("after", sampler)] = model.sample(sampler=sampler, **KW)
    return out


def _value_draws(post):
    return post.draws("value").ravel()


@pytest.mark.parametrize("sampler", ["pymc", "nutpie"])
def test_unedited_model_matches_the_student_t_posterior(fits, sampler):
    # reference: the multivariate-t posterior under flat priors (statsmodels OLS pieces)
    t, d = fits["t"], _value_draws(fits[("before", sampler)])
    assert abs(d.mean() - t.mean()) < 0.15 * t.std()
    assert d.std() == pytest.approx(t.std(), rel=0.15)
    assert "extra" not in fits[("before", sampler)].idata["posterior"]


@pytest.mark.parametrize("sampler", ["pymc", "nutpie"])
def test_added_variable_is_sampled_by_each_sampler(fits, sampler):
    post = fits[("after", sampler)]
    assert post.sampling["sampler"] == sampler
    assert post.edits == ["value_earlier_study", "extra"]
    d = post.draws("extra").ravel()
    # reference: its posterior is its prior, Normal(3, 0.5) (scipy.stats.norm)
    assert abs(d.mean() - EXTRA.mean()) < 0.1
    assert d.std() == pytest.approx(EXTRA.std(), rel=0.15)
    # ... and it is a row of the summary, with its own R-hat and ESS
    row = post.summary().loc["extra"]
    assert row["mean"] == pytest.approx(d.mean())
    assert np.isfinite(row["rhat"]) and row["ess_bulk"] > 50


@pytest.mark.parametrize("sampler", ["pymc", "nutpie"])
def test_potential_moves_the_coefficient_as_the_closed_form_predicts(fits, sampler):
    mean, sd = _with_potential(fits["t"], fits["m0"], fits["s0"])
    d = _value_draws(fits[("after", sampler)])
    # reference: t_nu(b) N(b; m0, s0) integrated with scipy; the potential moves the
    # mean by about one SD of the unedited posterior, 7 tolerances
    assert abs(mean - fits["t"].mean()) > 0.9 * fits["t"].std()
    assert abs(d.mean() - mean) < 0.15 * fits["t"].std()
    assert d.std() == pytest.approx(sd, rel=0.15)


def test_an_edit_drops_the_compiled_samplers(fits):
    model = fits["model"]
    nut, logp = fits["compiled"]
    assert nut is not None and logp is not None
    # both were made again for the edited graph, not reused
    assert model._nutpie is not nut and model._pymc_logp is not logp
    assert not smp.forget_stale(model)  # the graph has not changed since
    # the on-disk compile cache is keyed by the graph: the edited graph has its own key
    post = fits[("before", "pymc")]
    fresh = bp.Pooled.from_suffstats(post.stats, post.labels, outcome=post.spec.outcome,
                                     priors=post.spec.prior_dict)
    if smp._cache_path(fresh.pymc_model) is not None:
        assert smp._cache_path(model.pymc_model) != smp._cache_path(fresh.pymc_model)


def test_refits_sample_the_edited_model(fits, grunfeld):
    post, model = fits[("after", "pymc")], fits["model"]
    fd = _draws.from_posterior(post)
    assert fd.model is model
    # leave out the first firm: the refit keeps the potential, so its coefficient follows
    # the closed form on the other nine firms (statsmodels OLS and scipy, as above)
    train = fd.codes != 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SamplingWarning)
        b = refit_draws(fd, train, sampler="pymc", **KW).flat()[0]
    rest = grunfeld[grunfeld["firm"] != np.asarray(post.units)[0]]
    t_rest = _t_posterior(rest)
    mean, sd = _with_potential(t_rest, fits["m0"], fits["s0"])
    j = post.labels.index("value")
    assert abs(mean - t_rest.mean()) > 0.5 * t_rest.std()
    assert abs(b[:, j].mean() - mean) < 0.15 * t_rest.std()
    assert b[:, j].std() == pytest.approx(sd, rel=0.15)
    # the model is given back its own data afterwards
    assert model.stats is post.stats or model.stats.n == post.stats.n


def test_refits_refuse_an_edited_model_they_cannot_rebuild(fits, tmp_path):
    post = fits[("after", "pymc")]
    path = tmp_path / "edited.nc"
    post.save(path)
    loaded = Posterior.load(path)
    assert loaded.edits == post.edits and loaded.model is None
    with pytest.raises(SpecificationError, match="value_earlier_study, extra"):
        _draws.model_of(_draws.from_posterior(loaded))
    # draws of the model as built (before the edit) still refit with the rebuilt model
    before = _draws.from_posterior(fits[("before", "pymc")])
    rebuilt = _draws.model_of(before)
    assert rebuilt is not fits["model"] and "extra" not in rebuilt.pymc_model.named_vars


def test_diagnostics_name_an_added_variable_that_did_not_converge(fits):
    post = fits[("after", "pymc")]
    # the two chains of "extra" made to disagree (shifted by 5 prior SDs): split R-hat
    # far above 1.01 (Vehtari et al. 2021), named in the problems
    ds = post.idata["posterior"].to_dataset()
    shifted = ds["extra"].copy()
    shifted[0] = shifted[0] + 2.5
    idata = post.idata.copy()
    idata["posterior"] = ds.assign(extra=shifted)
    bad = Posterior(idata, post.spec, post.stats, post.units, rows=post.rows,
                    sampling=post.sampling, scaling=post.scaling)
    bad.edits = list(post.edits)
    diag = bad.diagnostics(warn=False)
    assert diag["max_rhat_parameter"] == "extra" and diag["max_rhat"] > 1.5
    assert any("extra" in p for p in diag["problems"])


@pytest.mark.parametrize("builder, options", [
    (bp.RandomIntercept, {"family": "student_t"}),
    (bp.WithinBetween, {"random_slopes": ["value"]}),
])
def test_a_builder_with_latent_options_returns_its_own_kind(grunfeld, builder, options):
    from bayespanel import kinds
    from bayespanel.bayes.latent import LatentModel

    panel = bp.Panel(grunfeld, unit="firm", time="year")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m = builder(panel, FORMULA, None, **options)  # priors given by position, too
        direct = LatentModel(panel, FORMULA, builder=builder.__name__, kind=builder.kind,
                             **options)
    assert isinstance(m, builder) and isinstance(m, LatentModel)
    assert not isinstance(m, bp.CorrelatedEffects)
    assert kinds.model(type(m)).class_name == builder.__name__
    # the same model as the latent class builds: same log density at the initial point
    point = m.pymc_model.initial_point()
    assert m.pymc_model.compile_logp()(point) == pytest.approx(
        direct.pymc_model.compile_logp()(direct.pymc_model.initial_point()), rel=1e-12)
    with pytest.raises(SpecificationError, match="set_data"):
        m.set_suffstats(m.stats)


def test_refits_refuse_an_added_likelihood_they_cannot_leave_out(fits, grunfeld):
    # a second likelihood over the rows, added by the user: the refits swap only the
    # model's own statistics, so they would keep these rows whole
    before = fits[("before", "pymc")]
    panel = bp.Panel(grunfeld, unit="firm", time="year")
    model = bp.Pooled(panel, FORMULA, priors=FLAT)
    with model.pymc_model:
        b = model.pymc_model["coef"]
        pm.Normal("invest_again", mu=b[0], sigma=1.0, observed=grunfeld["invest"].to_numpy())
    post = Posterior.from_model(model, before.idata, dict(before.sampling))
    assert post.edits == ["invest_again"]
    with pytest.raises(SpecificationError, match="invest_again"):
        _draws.model_of(_draws.from_posterior(post))
    # prior presets rebuild from the specification: refused for an edited model
    ri = bp.RandomIntercept(panel, FORMULA)
    with ri.pymc_model:
        pm.Normal("extra", 0.0, 1.0)
    with pytest.raises(SpecificationError, match="extra"):
        bp.sensitivity.prior_presets(ri, draws=10, tune=10, chains=1)
