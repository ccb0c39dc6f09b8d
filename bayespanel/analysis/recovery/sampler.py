"""The Bayesian refits of the design check: one compilation, each replicate swaps the data."""

from __future__ import annotations

import threading

import numpy as np


class _Sampler:
    """The Bayesian model compiled once (nutpie); each replicate swaps the shared data."""

    def __init__(self, model, draws, tune, chains, target_accept):
        from ...bayes.sampling import nutpie_compiled

        self.model = model
        # the scalar parameters reported beside the coefficients
        self.scalars = (["sigma_obs"] + (["sigma_unit"] if model.unit_effects == "random"
                                         else [])
                        + (["rho"] if getattr(model, "errors", "iid") == "ar1" else []))
        self.names = ["coef"] + self.scalars
        # the compilation is kept on the model (until its graph is edited), so later
        # design checks and nutpie fits of the same model do not compile again
        self.compiled = nutpie_compiled(model)
        self.shared = {v.name for v in self.compiled.shared_var_keys}
        self.draws, self.tune, self.chains = draws, tune, chains
        self.target_accept = target_accept
        self._lock = threading.Lock()
        self._orig = (model.stats, model.rows)

    def values_for(self, stats, rows):
        # set_suffstats recomputes the standardisation and the prior values in the graph;
        # the lock keeps two replicates from reading each other's values
        with self._lock:
            self.model.set_suffstats(stats, rows=rows)
            return {v.name: np.array(v.get_value()) for v in self.model.pymc_model.data_vars
                    if v.name in self.shared}

    def restore(self):
        stats, rows = self._orig
        self.model.set_suffstats(stats, rows=rows)

    def run(self, stats, rows, seed):
        import nutpie

        import dataclasses

        # nutpie's default start reads the graph's current shared values, which another
        # replicate may be changing; start instead from a seeded uniform(-1, 1) point on
        # the unconstrained (standardised) scale, so each replicate depends on its seed only
        compiled = dataclasses.replace(self.compiled.with_data(**self.values_for(stats, rows)),
                                       initial_point_func=_uniform_start(self.compiled.n_dim))
        dt = nutpie.sample(compiled, draws=self.draws, tune=self.tune, chains=self.chains,
                           cores=1, seed=int(seed), progress_bar=False,
                           target_accept=self.target_accept, save_warmup=False)
        post = dt["posterior"]
        coef = np.asarray(post["coef"].values)                    # chain, draw, term
        out = {"coef": coef.reshape(-1, coef.shape[-1])}
        scalars = [np.asarray(post[name].values) for name in self.scalars]   # chain, draw
        out.update({name: d.ravel() for name, d in zip(self.scalars, scalars)})
        div = np.asarray(dt["sample_stats"]["diverging"].values)
        out["divergences"] = int(div.sum())
        from arviz_stats.base import array_stats

        stacked = np.concatenate([coef] + [d[..., None] for d in scalars], axis=-1)
        out["rhat"] = float(np.nanmax(array_stats.rhat(np.moveaxis(stacked, -1, 0))))
        return out


def _uniform_start(n_dim):
    def start(seed):
        return np.random.default_rng(seed).uniform(-1.0, 1.0, n_dim)

    return start
