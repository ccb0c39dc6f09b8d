"""The registry of model kinds (:mod:`bayespanel.kinds.registry`) and the built-in kinds.

Each built-in kind is one file of this package holding its column map, its reference fit
and its Bayesian model (:mod:`.pooled`, :mod:`.random_intercept`, :mod:`.within_between`,
:mod:`.correlated_effects`, :mod:`.fixed_effects`; :mod:`.between` is a reference fit
only). They are registered below in the order the command line lists them. A new kind is
one such file plus its builder: registered here, by a :func:`register` call at run time, or
from an installed package through the entry-point group ``bayespanel.kinds``
(docs/architecture.md).
"""

from . import between, correlated_effects, fixed_effects, pooled, random_intercept, within_between
from .registry import *  # noqa: F403 (the registry's public names are this package's)
from .registry import __all__, register

for _file in (pooled, random_intercept, fixed_effects, between, correlated_effects,
              within_between):
    register(_file.COLUMNS)
for _file in (pooled, fixed_effects, between, random_intercept, correlated_effects,
              within_between):
    register(_file.REFERENCE)
for _file in (pooled, random_intercept, within_between, correlated_effects, fixed_effects):
    register(_file.MODEL)
del _file
