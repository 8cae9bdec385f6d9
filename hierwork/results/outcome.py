"""Group and population values at the reference values, per posterior draw, on both scales.

For a group ``j`` of factor ``F`` the **intercept row** is its linear predictor
at the reference values (:mod:`hierwork.plan.estimands`)::

    eta_j = x_ref . b  +  own offsets of j (F and its ancestors, every varying term at x_ref)
            + group-level terms of F and its ancestors at j's own values
            + group-level terms of every other factor at their reference values

and a **slope row** is the group's slope of that term. The population value is
the same with every offset at 0 and every group-level predictor at its
reference value: a typical group. On the outcome's scale the intercept row is
the family's mean of ``eta_j`` (times ``rate_per``) and a slope row the change
of that mean when the term rises by one unit from its reference value. Every
transform is applied draw by draw, so the summaries are posterior means and
quantiles of the transformed draws, never transforms of summaries.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from hierwork.plan.plan import FactorPlan, ModelPlan
from hierwork.results.baselines import lineage


@dataclass
class FactorValues:
    """Draws of one factor's group values: ``link`` and ``outcome`` (chain, draw, J, q); the
    population's ``population_link`` and ``population_outcome`` (chain, draw, q)."""

    factor: FactorPlan
    link: np.ndarray
    outcome: np.ndarray
    population_link: np.ndarray
    population_outcome: np.ndarray


def group_coefficient_draws(idata, plan: ModelPlan, f: FactorPlan, groups=None) -> np.ndarray:
    """Draws of the own coefficients (every predictor at 0) of ``groups`` (default all): (chain, draw, J, q)."""
    post = idata.posterior
    idx = np.arange(f.n_groups) if groups is None else np.asarray(groups)
    b = post["b"].values  # (c, d, p)
    out = np.stack([b[..., col] for col in f.varying_cols], axis=-1)[:, :, None, :]
    out = np.broadcast_to(out, out.shape[:2] + (len(idx), len(f.varying))).copy()
    node = f
    while True:
        effect = post[f"{node.name}__effect"].values  # (c, d, J_node, q_node)
        for t, term in enumerate(f.varying):
            if term in node.varying:
                out[..., t] += effect[:, :, idx, node.varying.index(term)]
        if node.predictors:
            gamma = post[f"{node.name}__gamma"].values  # (c, d, r)
            out[..., 0] += np.einsum("cdr,jr->cdj", gamma, node.W[idx])
        if node.parent is None:
            return out
        idx = node.parent_index[idx]
        node = plan.factor(node.parent)


def family_params(idata, plan: ModelPlan, trailing: int = 0) -> dict:
    """The family's parameter draws (chain, draw) with ``trailing`` axes of length 1 to broadcast."""
    post = idata.posterior
    out = {}
    vectors = plan.family.vector_parameters(plan.outcome)
    for name in plan.family.parameters(plan.outcome):
        if name in post:
            v = post[name].values
            out[name] = v.reshape(v.shape[:2] + (1,) * trailing + v.shape[2:]) if name in vectors \
                else v.reshape(v.shape + (1,) * trailing)
    return out


def _others(idata, plan: ModelPlan, skip) -> np.ndarray:
    """Group-level terms of the factors not in ``skip``, at their reference values: (chain, draw)."""
    post, ref = idata.posterior, plan.estimands
    total = np.zeros(post["b"].shape[:2])
    for g in plan.factors:
        if g.predictors and g.name not in skip:
            total = total + post[f"{g.name}__gamma"].values @ ref.w[g.name]
    return total


def population_eta(idata, plan: ModelPlan, x: np.ndarray) -> np.ndarray:
    """Linear predictor of a typical group (offsets 0, group-level predictors at reference) at design row ``x``."""
    return idata.posterior["b"].values @ x + _others(idata, plan, ())


def factor_values(idata, plan: ModelPlan, f: FactorPlan, groups=None) -> FactorValues:
    """The intercepts at the reference values and slopes of ``groups`` (positions; default all), and the
    population's, on both scales."""
    ref, family = plan.estimands, plan.family
    b = idata.posterior["b"].values
    coef = group_coefficient_draws(idata, plan, f, groups)
    slopes = list(f.varying_cols[1:])
    fixed = [k for k in range(b.shape[-1]) if k not in f.varying_cols]
    link = coef
    link[..., 0] += (coef[..., 1:] @ ref.x[slopes] + (b[..., fixed] @ ref.x[fixed]
                                                      + _others(idata, plan, lineage(plan, f)))[..., None])
    pop_link = b[..., list(f.varying_cols)].copy()
    pop_link[..., 0] = population_eta(idata, plan, ref.x)
    return FactorValues(f, link, _to_outcome(ref, family, link, family_params(idata, plan, 1)),
                        pop_link, _to_outcome(ref, family, pop_link, family_params(idata, plan)))


def _to_outcome(ref, family, link: np.ndarray, params: dict) -> np.ndarray:
    """Intercept (last axis 0): the expected outcome; slopes: its change per unit of the term."""
    at = ref.outcome(family, link[..., 0], params)
    out = np.empty_like(link)
    out[..., 0] = at
    for t in range(1, link.shape[-1]):
        out[..., t] = ref.outcome(family, link[..., 0] + link[..., t], params) - at
    return out


def population_outcome_draws(idata, plan: ModelPlan) -> dict:
    """Summary rows on the outcome's scale, as draws (chain, draw).

    ``outcome``: a typical group at the reference values. ``outcome_change.<term>``
    for each population term (not for an identity link, where they are the
    coefficients): the change of that value when a numeric term rises by one
    unit from its reference value, or when a categorical predictor moves from
    its reference level to the term's level (other predictors at their
    reference values).
    """
    ref, family = plan.estimands, plan.family
    params = family_params(idata, plan)

    def value(x):
        return ref.outcome(family, population_eta(idata, plan, x), params)

    out = {"outcome": value(ref.x)}
    for k, term in enumerate(plan.design.terms):
        if term.kind == "intercept" or family.link == "identity":  # identity: the coefficients themselves
            continue
        start = ref.x.copy()
        if term.kind == "level":
            start[[i for i, t in enumerate(plan.design.terms) if t.column == term.column]] = 0.0
        end = start.copy()
        end[k] += 1.0
        out[f"outcome_change.{term.name}"] = value(end) - value(start)
    return out
