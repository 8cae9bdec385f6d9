"""The exact fast path for normal outcomes: path choice, models, group draws.

Paths (``choose_path``):

* ``collapsed`` -- normal outcome whose factors form one nesting chain (one
  factor, or plot within farm within region ...): every level's effects are
  integrated out, NUTS samples only ``b``, the group-predictor coefficients,
  the SDs/correlations and ``residual_sd``; afterwards
  :func:`add_group_effects` draws each ``F__effect`` exactly from its
  conditional normal for every posterior draw (BDA3 §5.4, generalised; the
  algebra is in ``hierwork/collapsed.py`` and ``fast-path.md``).
* ``reduced`` -- normal outcome with crossed factors: the group effects are
  sampled as in the plain model, but the likelihood is evaluated from per-cell
  sufficient statistics (:func:`reduced_normal_likelihood`), exact and O(cells).
* ``plain`` -- every other family: the per-row model.

Notes for the model builder (``hierwork/model.py``): :func:`build_collapsed_model`
reuses its ``coords_of``, ``population_block`` (sampling the intercept at the
predictors' means), ``family_extras``, ``factor_scales`` and
``group_predictor_term``, so priors and variable names are shared. For the
reduced path, ``build_model`` passes the same pieces it sums into the per-row
linear predictor to :func:`reduced_normal_likelihood` instead of calling
``likelihood``.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pymc as pm
import pytensor.tensor as pt
import xarray as xr

from . import collapsed
from .model import coords_of, factor_scales, family_extras, group_predictor_term, population_block
from .plan import FactorPlan, ModelPlan
from .suffstats import CellStats, cell_index, cell_stats


#: Second word of the seed of the group-effect draws (keeps them off the sampler's stream).
_DRAW_STREAM = 5


def nesting_chain(plan: ModelPlan) -> list[FactorPlan] | None:
    """The plan's factors finest first if they form one nesting chain, else None."""
    by_parent = {}
    for f in plan.factors:
        by_parent.setdefault(f.parent, []).append(f)
    if not plan.factors or any(len(kids) > 1 for kids in by_parent.values()):
        return None
    chain = [by_parent[None][0]]
    while chain[-1].name in by_parent:
        chain.append(by_parent[chain[-1].name][0])
    return chain[::-1] if len(chain) == len(plan.factors) else None


def choose_path(plan: ModelPlan) -> tuple[str, str]:
    """Return (path, reason): ``collapsed``, ``reduced`` or ``plain``."""
    if plan.family != "normal":
        return "plain", f"{plan.family} outcome: the group effects have no closed-form marginal"
    if not plan.factors:
        return "reduced", "no grouping factor: likelihood from sufficient statistics"
    if nesting_chain(plan) is not None:
        what = "one grouping factor" if len(plan.factors) == 1 else "nested factors"
        return "collapsed", (f"normal outcome with {what}: group effects integrated out exactly, "
                             "then drawn from their conditional normal")
    return "reduced", ("normal outcome with crossed factors: likelihood from per-cell sufficient "
                       "statistics, group effects sampled")


@dataclass(frozen=True)
class CollapsedProblem:
    """Statistics and chain of a plan on the collapsed path.

    ``X`` is augmented by one column per group-level predictor (its group's
    value on every row), so ``b`` followed by each factor's ``gamma`` is the
    coefficient vector of the statistics.
    """

    stats: CellStats
    chain: tuple          # FactorPlan, finest first
    levels: tuple         # collapsed.Level, finest first
    gamma_factors: tuple  # factors with group-level predictors, in the order of their columns


def collapsed_problem(plan: ModelPlan) -> CollapsedProblem:
    """Compute the sufficient statistics (once, O(rows)) for the collapsed path."""
    chain = nesting_chain(plan)
    if plan.family != "normal" or chain is None:
        raise ValueError("the collapsed path needs a normal outcome and one nesting chain of factors")
    gamma_factors = tuple(f for f in plan.factors if f.predictors)
    X = np.column_stack([plan.X] + [f.W[f.index] for f in gamma_factors])
    leaf = chain[0]
    stats = cell_stats(plan.y, X, leaf.index, leaf.n_groups, plan.known_sd)
    levels = tuple(collapsed.Level(tuple(f.varying_cols), f.n_groups,
                                   None if f.parent is None else f.parent_index) for f in chain)
    return CollapsedProblem(stats, tuple(chain), levels, gamma_factors)


def build_collapsed_model(plan: ModelPlan, problem: CollapsedProblem | None = None) -> pm.Model:
    """PyMC model with every factor's effects integrated out.

    Free variables: ``b``, ``residual_sd`` (unless SDs are known), per factor
    the SDs, correlation and group-predictor coefficients, with the same
    priors and names as :func:`hierwork.model.build_model`. ``F__effect`` is
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
        loglik = collapsed.collapsed_loglik(problem.stats, list(problem.levels), coef,
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
    chols = [_chol_draws(flat, f) for f in problem.chain]
    sigma = None if plan.known_sd is not None else flat("residual_sd")
    effects, group_ll = collapsed.draw_effects(problem.stats, list(problem.levels), coef, chols,
                                               sigma, rng=np.random.default_rng([int(seed), _DRAW_STREAM]))
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


def _chol_draws(flat, f: FactorPlan) -> np.ndarray:
    """(D, q, q) Cholesky factors ``diag(sd) chol(corr)`` from the stored SDs and correlations."""
    sd = flat(f"{f.name}__sd")
    if len(f.varying) == 1:
        return sd[:, :, None]
    return sd[:, :, None] * np.linalg.cholesky(flat(f"{f.name}__corr"))


def reduced_normal_likelihood(plan: ModelPlan, b, free_cols, parts, sigma) -> None:
    """Add the normal likelihood from per-cell statistics (the reduced path).

    Gives the same log density as the per-row ``pm.Normal`` whose mean is
    ``X[:, free_cols] @ b[free_cols] + sum(values[f.index] * X[:, f.varying_cols])
    + shift[f.index]`` summed over ``parts``.

    Parameters
    ----------
    plan : ModelPlan
        Normal family.
    b : (p,) tensor
        Population coefficients.
    free_cols : list of int
        Columns of ``X`` whose coefficient is ``b`` (the others are carried by a
        centred factor's group coefficients).
    parts : list of (FactorPlan, values, shift)
        ``values`` (J_f, q_f) multiplies the factor's varying columns; ``shift``
        (J_f,) or None is added to the linear predictor of its rows.
    sigma : scalar tensor or None
        ``residual_sd`` (None with known SDs).
    """
    cell, cell_groups = cell_index(*[f.index for f, _, _ in parts]) if parts else (
        np.zeros(plan.n, dtype=np.int64), np.zeros((1, 0), dtype=np.int64))
    stats = cell_stats(plan.y, plan.X, cell, len(cell_groups), plan.known_sd)
    mask = np.zeros(plan.X.shape[1])
    mask[list(free_cols)] = 1.0
    effects = []
    for k, (f, values, shift) in enumerate(parts):
        effects.append((values, tuple(f.varying_cols), cell_groups[:, k]))
        if shift is not None:
            effects.append((shift[:, None], (0,), cell_groups[:, k]))
    loglik = collapsed.reduced_loglik(stats, b * mask, effects, sigma)
    pm.Potential("y_reduced", loglik.sum())
