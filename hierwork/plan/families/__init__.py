"""The outcome families: one module and one class each, registered here.

Everything hierwork knows about a family lives in its class (see
:class:`hierwork.plan.families.base.Family`): the spec keys it accepts, its data
checks, link and inverse link, the mean on the outcome's scale, working response
and IRLS weights, default priors of its extra parameters, the PyMC likelihood,
the log density and simulator used after sampling, and the no-pooling boundary
rule. Adding a family is one module in this folder and one line in
:data:`REGISTRY`; ``tests/test_families.py`` runs the common contract checks on
every registered family.

Modules are imported on first use, so reading the registry (for the spec's
list of choices, the JSON Schema or ``--help``) costs nothing.
"""
from __future__ import annotations

import importlib
from functools import lru_cache

#: Family name (the spec's ``outcome.family``) -> ``module:Class``, in the order shown to users.
REGISTRY = {
    "normal": "hierwork.plan.families.normal:Normal",
    "student_t": "hierwork.plan.families.student_t:StudentT",
    "bernoulli": "hierwork.plan.families.bernoulli:Bernoulli",
    "binomial": "hierwork.plan.families.binomial:Binomial",
    "poisson": "hierwork.plan.families.poisson:Poisson",
    "negative_binomial": "hierwork.plan.families.negative_binomial:NegativeBinomial",
    "gamma": "hierwork.plan.families.gamma:Gamma",
    "lognormal": "hierwork.plan.families.lognormal:Lognormal",
    "beta_binomial": "hierwork.plan.families.beta_binomial:BetaBinomial",
    "zero_inflated_poisson": "hierwork.plan.families.zero_inflated_poisson:ZeroInflatedPoisson",
    "ordinal": "hierwork.plan.families.ordinal:Ordinal",
}

FAMILY_NAMES = tuple(REGISTRY)


@lru_cache(maxsize=None)
def get_family(name: str):
    """The family object registered as ``name`` (a :class:`~hierwork.plan.families.base.Family`).

    Raises
    ------
    KeyError
        For an unregistered name (the spec loader checks names before this).
    """
    module, _, cls = REGISTRY[name].partition(":")
    return getattr(importlib.import_module(module), cls)()


def all_families() -> list:
    """Every registered family, in registry order."""
    return [get_family(name) for name in REGISTRY]
