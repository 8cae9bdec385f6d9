"""Posterior draws -> the tables users read: group estimates, contrasts and the population summary.

A group's **intercept row** describes the group at the reference values of the
predictors (``estimates.at``; :mod:`hierwork.results.outcome`), its **slope
rows** its slopes. Both are given on the scale of the linear predictor
(``no_pooling, complete_pooling, partial_mean, partial_sd, lower, upper``) and
on the outcome's scale (``outcome_*``: a probability, a rate per
``estimates.rate_per`` units of exposure, or the outcome's units; for a slope
row the change of the expected outcome per unit of the term), with the sizes
that say how much information a group carries, its pooling weight
(:mod:`hierwork.results.pooling`) and where it stands
(:mod:`hierwork.results.rankings`). Parameter names match the spec's ``priors``
keys (``farm.sd``, ``farm.nitrogen.sd``).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from hierwork.inference.convergence import diagnose
from hierwork.plan.families.base import element_names
from hierwork.plan.plan import FactorPlan, ModelPlan
from hierwork.names import parameter_name
from hierwork.results.outcome import factor_values, family_params, population_outcome_draws
from hierwork.results.pooling import pooling_weights
from hierwork.results.rankings import CONTRAST_COLUMNS, bounds, contrast_rows, rank_draws, rank_summary, standing
from hierwork.results.spread import spread_rows

#: Draws x groups of one factor handled at once.
BLOCK_CELLS = 20_000_000

#: Columns of ``group_estimates.csv`` in order (``trials``, ``events``, ``exposure`` only where they apply).
GROUP_COLUMNS = ("factor", "group", "term", "rows", "trials", "events", "exposure",
                 "no_pooling", "complete_pooling", "partial_mean", "partial_sd", "lower", "upper",
                 "outcome_mean", "outcome_lower", "outcome_upper", "no_pooling_outcome", "complete_pooling_outcome",
                 "pooling_weight", "p_above_population", "p_beyond_target",
                 "rank_median", "rank_lower", "rank_upper", "p_top", "p_bottom")


def group_sizes(plan: ModelPlan, f: FactorPlan) -> dict:
    """How much data each group has: ``rows``, and ``trials``, ``events``, ``exposure`` where they apply."""
    outcome = plan.outcome
    counts = plan.family.discrete and not plan.family.ordered   # an ordered level is not a number of events
    sums = {"trials": outcome.trials, "events": outcome.y if counts else None,
            "exposure": outcome.exposure}
    out = {"rows": f.sizes}
    for name, values in sums.items():
        if values is not None:
            total = np.bincount(f.index, values, f.n_groups)
            out[name] = total.round().astype(np.int64) if np.all(values == np.round(values)) else total
    return out


def group_estimates(idata, plan: ModelPlan, baseline: pd.DataFrame, interval: float) -> pd.DataFrame:
    """The run folder's ``group_estimates.csv`` table.

    Parameters
    ----------
    idata : arviz.InferenceData
    plan : ModelPlan
    baseline : pandas.DataFrame
        From :func:`hierwork.results.baselines.baselines`.
    interval : float
        Probability of the central intervals (``lower``/``upper``, ``outcome_lower``/``outcome_upper``, ranks).

    Returns
    -------
    pandas.DataFrame
        The columns of :data:`GROUP_COLUMNS` (see the module docstring and the README).
    """
    weights = pooling_weights(idata, plan)
    frames = []
    for f in plan.factors:
        columns = _factor_columns(idata, plan, f, interval)
        for t, term in enumerate(f.varying):
            frames.append(pd.DataFrame({"factor": f.name, "group": list(f.levels), "term": term,
                                        **group_sizes(plan, f), **columns[t], "pooling_weight": weights[f.name][:, t]}))
    partial = pd.concat(frames, ignore_index=True)
    table = baseline.merge(partial, on=["factor", "group", "term"], how="left", validate="one_to_one")
    table["no_pooling_outcome"] = _baseline_outcome(idata, plan, table, "no_pooling")
    table["complete_pooling_outcome"] = _baseline_outcome(idata, plan, table, "complete_pooling")
    table = pd.concat([table, spread_rows(idata, plan, interval)], ignore_index=True)
    return table[[c for c in GROUP_COLUMNS if c in table.columns] + plan.family.level_columns(plan.outcome)]


def _factor_columns(idata, plan: ModelPlan, f: FactorPlan, interval: float) -> list:
    """Per varying term, the posterior columns of every group of ``f``.

    Groups are taken in blocks of at most :data:`BLOCK_CELLS` draws x groups so
    that memory does not grow with draws times groups; the ranks, which need
    every group at once, use the evenly spaced draws of
    :func:`hierwork.results.rankings.rank_draws`, collected block by block.
    """
    lo, hi = bounds(interval)
    q, J = len(f.varying), f.n_groups
    D = int(np.prod(idata.posterior["b"].shape[:2]))
    ranked = rank_draws(D, J)
    kept = np.empty((q, len(ranked), J))
    step = max(1, BLOCK_CELLS // max(D, 1))
    parts = [[] for _ in range(q)]
    for start in range(0, J, step):
        block = np.arange(start, min(start + step, J))
        values = factor_values(idata, plan, f, block)
        link = values.link.reshape(D, len(block), q)
        outcome = values.outcome.reshape(D, len(block), q)
        population = values.population_link.reshape(D, q)
        for t in range(q):
            kept[t][:, block] = outcome[ranked, :, t]
            parts[t].append({
                "partial_mean": link[:, :, t].mean(axis=0), "partial_sd": link[:, :, t].std(axis=0, ddof=1),
                "lower": np.quantile(link[:, :, t], lo, axis=0), "upper": np.quantile(link[:, :, t], hi, axis=0),
                "outcome_mean": outcome[:, :, t].mean(axis=0),
                "outcome_lower": np.quantile(outcome[:, :, t], lo, axis=0),
                "outcome_upper": np.quantile(outcome[:, :, t], hi, axis=0),
                **standing(link[:, :, t], outcome[:, :, t], population[:, t], plan.estimands, t == 0)})
        if plan.family.level_columns(plan.outcome):   # intercept rows: each level's probability
            params = {k: v.reshape((D, 1) + v.shape[3:]) for k, v in family_params(idata, plan, 1).items()}
            shares = plan.family.level_probabilities(link[:, :, 0], params).mean(axis=0)
            parts[0][-1].update(zip(plan.family.level_columns(plan.outcome), shares.T))
    return [{**{k: np.concatenate([p[k] for p in parts[t]]) for k in parts[t][0]},
             **rank_summary(kept[t], plan.estimands.rank_k, interval)} for t in range(q)]


def _baseline_outcome(idata, plan: ModelPlan, table: pd.DataFrame, column: str) -> np.ndarray:
    """A baseline column on the outcome's scale (family parameters at their posterior means).

    Intercept rows: the expected outcome; slope rows: its change per unit of the
    term from the group's own intercept row of the same baseline.
    """
    ref, family = plan.estimands, plan.family
    params = {k: v.mean(axis=(0, 1)) for k, v in family_params(idata, plan).items()}
    level = table[table["term"] == "intercept"].set_index(["factor", "group"])[column]
    at = level.reindex(pd.MultiIndex.from_frame(table[["factor", "group"]])).to_numpy(dtype=float)
    value = table[column].to_numpy(dtype=float)
    slope = (table["term"] != "intercept").to_numpy()
    start = ref.outcome(family, at, params)
    return np.where(slope, ref.outcome(family, at + np.where(slope, value, 0.0), params) - start, start)


def contrasts(idata, plan: ModelPlan, interval: float) -> pd.DataFrame:
    """``contrasts.csv``: every requested contrast (``estimates.contrasts``), one row per varying term."""
    rows = []
    for name, a, b in plan.estimands.contrasts:
        f = plan.factor(name)
        pair = [f.levels.index(a), f.levels.index(b)]
        outcome = factor_values(idata, plan, f, pair).outcome.reshape(-1, 2, len(f.varying))
        rows += contrast_rows(name, a, b, f.varying, outcome, interval)
    return pd.DataFrame(rows, columns=list(CONTRAST_COLUMNS))


def parameter_draws(idata, plan: ModelPlan) -> dict:
    """Population-level and variance parameters as draws (chain, draw), by reader-facing name (:mod:`hierwork.names`)."""
    post = idata.posterior
    out = {}
    for k, term in enumerate(plan.terms):
        out[parameter_name("b", {"term": term})] = post["b"].values[..., k]
    vectors = plan.family.vector_parameters(plan.outcome)
    for name in plan.family.parameters(plan.outcome):
        if name in vectors:
            for k, element in enumerate(element_names(name, vectors[name][1])):
                out[element] = post[name].values[..., k]
        else:
            out[parameter_name(name, {})] = post[name].values
    for f in plan.factors:
        terms = list(f.varying)
        sd = post[f"{f.name}__sd"].values
        for t, term in enumerate(terms):
            out[parameter_name(f"{f.name}__sd", {"term": term}, terms)] = sd[..., t]
        if f"{f.name}__corr" in post:
            corr = post[f"{f.name}__corr"].values
            for a in range(len(terms)):
                for c in range(a + 1, len(terms)):
                    out[parameter_name(f"{f.name}__corr", {"a": terms[a], "c": terms[c]})] = corr[..., a, c]
        for r, col in enumerate(f.predictors):
            out[parameter_name(f"{f.name}__gamma", {"predictor": col})] = post[f"{f.name}__gamma"].values[..., r]
        if f.spread == "varying":
            out[parameter_name(f"{f.name}__spread_sd", {})] = post[f"{f.name}__spread_sd"].values
    return out


def population_summary(idata, plan: ModelPlan, interval: float) -> pd.DataFrame:
    """The run folder's ``summary.csv``: mean, sd, central interval, ESS and R-hat per parameter.

    After the model's parameters come the population on the outcome's scale:
    ``outcome`` (a typical group at the reference values) and
    ``outcome_change.<term>`` (:func:`hierwork.results.outcome.population_outcome_draws`).
    """
    lo_q, hi_q = bounds(interval)
    named = {**parameter_draws(idata, plan), **population_outcome_draws(idata, plan)}
    stacked = np.stack([np.asarray(d, dtype=float) for d in named.values()], axis=-1)  # (chain, draw, K)
    r_hat, ess_bulk, ess_tail = diagnose(stacked)
    flat = stacked.reshape(-1, stacked.shape[-1])
    return pd.DataFrame({"parameter": list(named), "mean": flat.mean(axis=0), "sd": flat.std(axis=0, ddof=1),
                         "lower": np.quantile(flat, lo_q, axis=0), "upper": np.quantile(flat, hi_q, axis=0),
                         "ess_bulk": ess_bulk, "ess_tail": ess_tail, "r_hat": r_hat})
