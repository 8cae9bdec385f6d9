"""The partially collapsed path for normal outcomes with crossed factors.

Crossed factors have no nesting chain to integrate, but one factor can always
be integrated out exactly given the others: with every other factor's effects
fixed, the rows of different groups of that factor are independent, and each
group is a one-factor normal problem in the residual ``y - X t_cell``
(:func:`hierwork.model.marginal.integrated_group_loglik`). The factor with the
most groups is integrated (the dimension NUTS sees drops the most, and with
it the largest funnel); the others are sampled as on the reduced path, in
their planned forms (:func:`hierwork.model.rowwise.build_model` on the plan
without that factor). After sampling, :func:`add_group_effects` draws its
``F__effect`` exactly from its conditional normal for every posterior draw,
so the run folder holds the same variables as on every other path, and then
refreshes every factor's effects by a few exact Gibbs sweeps, so that they mix
as the coefficients and SDs do.

Cost per gradient: O(cells x p^2), cells being the combinations of all
factors' groups that occur (at most the rows).
"""
from __future__ import annotations

from dataclasses import dataclass, replace

from hierwork import runtime  # noqa: F401  (before PyTensor)

import numpy as np
import pymc as pm
import xarray as xr

from hierwork.inference import seeds
from hierwork.model import marginal
from hierwork.model.blocks import coords_of, factor_scales, group_predictor_term
from hierwork.model.cells import CellStats
from hierwork.model.collapsed import chol_draws
from hierwork.model.paths import integrated_factor, sampled_plan, shifted_columns
from hierwork.model.refresh import REFRESH_SWEEPS, set_aside_sampled_forms
from hierwork.model.rowwise import build_model, cell_terms
from hierwork.plan.plan import FactorPlan, ModelPlan


@dataclass(frozen=True)
class SemiCollapsedProblem:
    """A plan split for the semi-collapsed path: the factor integrated out and the plan of the rest."""

    factor: FactorPlan
    rest: ModelPlan


def semi_collapsed_problem(plan: ModelPlan) -> SemiCollapsedProblem:
    """Split a plan: its integrated factor (:func:`~hierwork.model.paths.integrated_factor`) and the rest."""
    if not plan.family.exact_normal or not plan.factors:
        raise ValueError("the semi-collapsed path needs a normal outcome and at least one grouping factor")
    return SemiCollapsedProblem(integrated_factor(plan), sampled_plan(plan, "semi_collapsed"))


def build_semi_collapsed_model(plan: ModelPlan, problem: SemiCollapsedProblem | None = None,
                               shift: bool = True) -> pm.Model:
    """PyMC model with the integrated factor's effects integrated out, the others sampled.

    Free variables and priors are those of :func:`hierwork.model.rowwise.build_model`
    less the integrated factor's effects (its ``F__sd``, ``F__corr`` and
    ``F__gamma`` stay); ``F__effect`` is added after sampling by
    :func:`add_group_effects`. The sampled factors are crossed with the
    integrated one, whose mean effect the data do not separate from the
    intercept either, so the coefficients the reduced path would shift are
    shifted here too (``shift=False``: not, the reference of the tests).
    """
    problem = problem or semi_collapsed_problem(plan)
    f = problem.factor

    def likelihood_of(b, free_cols, parts, extras):
        model = pm.modelcontext(None)
        for name, values in coords_of(plan).items():
            if name not in model.coords:
                model.add_coord(name, values)
        chol = factor_scales(f, plan)[1]
        shift = group_predictor_term(f, plan)
        stats, coef, effects, groups = cell_terms(problem.rest, b, free_cols, parts, extra=(f,))
        if shift is not None:
            effects.append((shift[:, None], (0,), groups[:, -1]))
        integrated = marginal.Integrated(tuple(f.varying_cols), groups[:, -1], f.n_groups)
        pm.Potential("y_integrated", marginal.integrated_group_loglik(stats, coef, effects, integrated, chol,
                                                                extras.get("residual_sd")).sum())

    return build_model(problem.rest, reduced=True, shift=shifted_columns(plan) if shift else False,
                       likelihood_of=likelihood_of)


def add_group_effects(idata, plan: ModelPlan, seed, problem: SemiCollapsedProblem | None = None):
    """Draw the integrated factor's ``F__effect`` exactly, then refresh every factor's effects, in place.

    First the integrated factor is drawn from its conditional normal given
    each posterior draw of the rest. The effects NUTS sampled (every other
    factor's) are then refreshed by :data:`REFRESH_SWEEPS` Gibbs sweeps: each
    factor in turn is drawn from its exact conditional normal given the
    coefficients, the SDs and the other factors' current effects (on a normal
    outcome, the rows of different groups of one factor are independent given
    the rest). Each step leaves the joint posterior unchanged, so every stored
    draw is still an exact posterior draw; but the stored effects now mix as
    the coefficients and SDs do, not as NUTS's draws of a thousand or more
    correlated effects, whose tail mixing (folded R-hat) is the weak point of
    large crossed fits. NUTS's own draws of the refreshed factors'
    parameterisation (``F__contrast``, ``b_shifted_*``...) no longer match the
    stored effects; they are kept in the group ``sampled_forms`` (in
    ``posterior.nc``) and are not gated.

    Parameters
    ----------
    idata : arviz.InferenceData
        Posterior of :func:`build_semi_collapsed_model` (``b``, every other factor's
        ``F__effect``, the SDs, ``F__gamma``...).
    plan : ModelPlan
    seed : int
        The run's seed; the draws use their own stream derived from it.
    problem : SemiCollapsedProblem, optional

    Returns
    -------
    arviz.InferenceData (the same object).
    """
    problem = problem or semi_collapsed_problem(plan)
    rng = seeds.rng(seed, "group_effects")
    _draw_factor(idata.posterior, plan, problem, rng)
    others = [SemiCollapsedProblem(g, replace(plan, factors=tuple(h for h in plan.factors if h is not g)))
              for g in problem.rest.factors]
    if not others:
        return idata
    for _ in range(REFRESH_SWEEPS):
        for step in others + [problem]:
            _draw_factor(idata.posterior, plan, step, rng)
    set_aside_sampled_forms(idata, problem.rest.factors)
    return idata


def _draw_factor(post, plan: ModelPlan, problem: SemiCollapsedProblem, rng) -> None:
    """``F__effect`` of ``problem.factor`` drawn from its conditional normal given the rest's current draws."""
    f = problem.factor
    n_chain, n_draw = post.sizes["chain"], post.sizes["draw"]

    def flat(name):
        values = post[name].values
        return values.reshape((n_chain * n_draw,) + values.shape[2:])

    stats, groups, effects = _draw_terms(plan, problem, flat)
    if f.predictors:
        effects.append(((flat(f"{f.name}__gamma") @ f.W.T)[:, :, None], (0,), groups[:, -1]))
    chols = chol_draws(flat, f)
    u = marginal.draw_integrated_effects(stats, flat("b"), effects,
                                      marginal.Integrated(tuple(f.varying_cols), groups[:, -1], f.n_groups),
                                      chols, None if plan.known_sd is not None else flat("residual_sd"), rng=rng)
    post[f"{f.name}__effect"] = xr.DataArray(
        u.reshape(n_chain, n_draw, f.n_groups, len(f.varying)),
        coords={"chain": post.chain, "draw": post.draw, f.name: list(f.levels), f"{f.name}__term": list(f.varying)},
        dims=("chain", "draw", f.name, f"{f.name}__term"))


def _draw_terms(plan, problem, flat) -> tuple[CellStats, np.ndarray, list]:
    """Cell statistics and the sampled factors' per-draw effect terms (effects and group predictors)."""
    parts = [(g, flat(f"{g.name}__effect"), None) for g in problem.rest.factors]
    stats, _, effects, groups = cell_terms(problem.rest, np.zeros(plan.X.shape[1]), [], parts,
                                           extra=(problem.factor,))
    for k, g in enumerate(problem.rest.factors):
        if g.predictors:
            effects.append(((flat(f"{g.name}__gamma") @ g.W.T)[:, :, None], (0,), groups[:, k]))
    return stats, groups, effects
