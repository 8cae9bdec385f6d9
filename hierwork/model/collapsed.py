"""The collapsed path for normal outcomes: group effects integrated out, then drawn back exactly.

With a normal outcome whose factors form one nesting chain (one factor, or plot
within farm within region ...), every level's effects are integrated out, NUTS
samples only ``b``, the group-predictor coefficients, the SDs/correlations and
``residual_sd``; afterwards :func:`add_group_effects` draws each ``F__effect``
exactly from its conditional normal for every posterior draw (BDA3 §5.4,
generalised; the algebra is in :mod:`hierwork.model.marginal` and
``docs/fast-path.md``). Priors and variable names are those of
:mod:`hierwork.model.blocks`, shared with the per-row model.
"""
from __future__ import annotations

from dataclasses import dataclass

from hierwork import runtime  # noqa: F401  (before PyTensor)

import numpy as np
import pymc as pm
import pytensor.tensor as pt
import xarray as xr

from hierwork.inference import seeds
from hierwork.model import marginal
from hierwork.model.blocks import coords_of, factor_scales, family_extras, group_predictor_term, population_block
from hierwork.model.cells import CellStats, cell_stats
from hierwork.model.paths import nesting_chain
from hierwork.plan.plan import FactorPlan, ModelPlan


@dataclass(frozen=True)
class CollapsedProblem:
    """Statistics and chain of a plan on the collapsed path.

    ``X`` is augmented by one column per group-level predictor (its group's
    value on every row), so ``b`` followed by each factor's ``gamma`` is the
    coefficient vector of the statistics.
    """

    stats: CellStats
    chain: tuple          # FactorPlan, finest first
    levels: tuple         # marginal.Level, finest first
    gamma_factors: tuple  # factors with group-level predictors, in the order of their columns


def collapsed_problem(plan: ModelPlan) -> CollapsedProblem:
    """Compute the sufficient statistics (once, O(rows)) for the collapsed path."""
    chain = nesting_chain(plan)
    if not plan.family.exact_normal or chain is None:
        raise ValueError("the collapsed path needs a normal outcome and one nesting chain of factors")
    gamma_factors = tuple(f for f in plan.factors if f.predictors)
    X = np.column_stack([plan.X] + [f.W[f.index] for f in gamma_factors])
    leaf = chain[0]
    stats = cell_stats(plan.y, X, leaf.index, leaf.n_groups, plan.known_sd)
    levels = tuple(marginal.Level(tuple(f.varying_cols), f.n_groups,
                                   None if f.parent is None else f.parent_index) for f in chain)
    return CollapsedProblem(stats, tuple(chain), levels, gamma_factors)


def build_collapsed_model(plan: ModelPlan, problem: CollapsedProblem | None = None) -> pm.Model:
    """PyMC model with every factor's effects integrated out.

    Free variables: ``b``, ``residual_sd`` (unless SDs are known), per factor
    the SDs, correlation and group-predictor coefficients, with the same
    priors and names as :func:`hierwork.model.rowwise.build_model`. ``F__effect`` is
    added after sampling by :func:`add_group_effects`.
    """
    problem = problem or collapsed_problem(plan)
    with pm.Model(coords=coords_of(plan)) as model:
        b = population_block(plan, centre=True)[0]
        extras = family_extras(plan)
        chols, gammas = {}, {}
        for f in plan.factors:
            chols[f.name] = factor_scales(f, plan)[1]
            if group_predictor_term(f, plan) is not None:
                gammas[f.name] = model[f"{f.name}__gamma"]
        coef = pt.concatenate([b] + [gammas[f.name] for f in problem.gamma_factors])
        loglik = marginal.collapsed_loglik(problem.stats, list(problem.levels), coef,
                                            [chols[f.name] for f in problem.chain],
                                            extras.get("residual_sd"))
        pm.Potential("y_collapsed", loglik)
    return model


def add_group_effects(idata, plan: ModelPlan, seed, problem: CollapsedProblem | None = None,
                      group_log_likelihood: bool = True):
    """Draw every ``F__effect`` exactly for each posterior draw, in place.

    Parameters
    ----------
    idata : arviz.InferenceData
        Posterior of the collapsed model (``b``, ``F__sd``, ``F__corr``, ...).
    plan : ModelPlan
    seed : int
        The run's seed; the draws use their own stream derived from it, so
        they are reproducible and independent of the sampler's.
    problem : CollapsedProblem, optional
        Reuse the statistics of :func:`build_collapsed_model`.
    group_log_likelihood : bool
        Store (default; computed in the same pass) ``log_likelihood["y_by_<top factor>"]`` (chain, draw, group):
        each top-level group's log-likelihood with its effects integrated out,
        for leave-one-group-out comparison.

    Returns
    -------
    arviz.InferenceData (the same object).
    """
    problem = problem or collapsed_problem(plan)
    post = idata.posterior
    n_chain, n_draw = post.sizes["chain"], post.sizes["draw"]

    def flat(name):
        values = post[name].values
        return values.reshape((n_chain * n_draw,) + values.shape[2:])

    coef = np.concatenate([flat("b")] + [flat(f"{f.name}__gamma") for f in problem.gamma_factors],
                          axis=1)
    chols = [chol_draws(flat, f) for f in problem.chain]
    sigma = None if plan.known_sd is not None else flat("residual_sd")
    effects, group_ll = marginal.draw_effects(problem.stats, list(problem.levels), coef, chols,
                                               sigma, rng=seeds.rng(seed, "group_effects"))
    for f, u in zip(problem.chain, effects):
        post[f"{f.name}__effect"] = xr.DataArray(
            u.reshape(n_chain, n_draw, f.n_groups, len(f.varying)),
            coords={"chain": post.chain, "draw": post.draw, f.name: list(f.levels),
                    f"{f.name}__term": list(f.varying)},
            dims=("chain", "draw", f.name, f"{f.name}__term"))
    if group_log_likelihood:
        top = problem.chain[-1]
        ll = xr.Dataset({f"y_by_{top.name}": xr.DataArray(
            group_ll.reshape(n_chain, n_draw, top.n_groups),
            coords={"chain": post.chain, "draw": post.draw, top.name: list(top.levels)},
            dims=("chain", "draw", top.name))})
        if "log_likelihood" in idata.groups():
            idata.log_likelihood.update(ll)
        else:
            idata.add_groups(log_likelihood=ll)
    return idata


def chol_draws(flat, f: FactorPlan) -> np.ndarray:
    """(D, q, q) Cholesky factors ``diag(sd) chol(corr)`` from the stored SDs and correlations.

    ``flat(name)`` gives a posterior variable's draws flattened over chains.
    """
    sd = flat(f"{f.name}__sd")
    if len(f.varying) == 1:
        return sd[:, :, None]
    return sd[:, :, None] * np.linalg.cholesky(flat(f"{f.name}__corr"))
