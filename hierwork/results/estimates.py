"""Posterior draws -> the tables users read: group estimates, population summary, pooling.

Every value is on the scale of the linear predictor with the population
predictors at 0, in the data's own units. A group's intercept is the population
intercept plus its group-level predictor terms plus its offset and, for nested
factors, its ancestors' offsets and predictor terms; a varying slope likewise.
Parameter names match the spec's ``priors`` keys (``farm.sd``, ``farm.nitrogen.sd``).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from hierwork.inference.convergence import diagnose
from hierwork.plan.plan import FactorPlan, ModelPlan


def group_coefficient_draws(idata, plan: ModelPlan, f: FactorPlan) -> np.ndarray:
    """Draws of each group's own coefficients, shape (chain, draw, J, q)."""
    post = idata.posterior
    b = post["b"].values  # (c, d, p)
    out = np.stack([b[..., col] for col in f.varying_cols], axis=-1)[:, :, None, :]
    out = np.broadcast_to(out, out.shape[:2] + (f.n_groups, len(f.varying))).copy()
    node, idx = f, np.arange(f.n_groups)
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


def group_estimates(idata, plan: ModelPlan, baseline: pd.DataFrame, interval: float) -> pd.DataFrame:
    """The run folder's ``group_estimates.csv`` table.

    Parameters
    ----------
    idata : arviz.InferenceData
    plan : ModelPlan
    baseline : pandas.DataFrame
        From :func:`hierwork.results.baselines.baselines`.
    interval : float
        Probability of the central interval (``lower``, ``upper``).

    Returns
    -------
    pandas.DataFrame
        ``factor, group, term, n, no_pooling, complete_pooling, partial_mean,
        partial_sd, lower, upper, shrinkage``. ``shrinkage`` is how far the
        estimate moved from no pooling towards complete pooling (0 = not at all,
        1 = all the way), NaN when the two baselines coincide.
    """
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    frames = []
    for f in plan.factors:
        draws = group_coefficient_draws(idata, plan, f)
        flat = draws.reshape(-1, f.n_groups, len(f.varying))
        for t, term in enumerate(f.varying):
            frames.append(pd.DataFrame({
                "factor": f.name, "group": list(f.levels), "term": term,
                "partial_mean": flat[:, :, t].mean(axis=0), "partial_sd": flat[:, :, t].std(axis=0, ddof=1),
                "lower": np.quantile(flat[:, :, t], lo_q, axis=0),
                "upper": np.quantile(flat[:, :, t], hi_q, axis=0)}))
    partial = pd.concat(frames, ignore_index=True)
    table = baseline.merge(partial, on=["factor", "group", "term"], how="left", validate="one_to_one")
    gap = table["no_pooling"] - table["complete_pooling"]
    with np.errstate(divide="ignore", invalid="ignore"):
        table["shrinkage"] = np.where(np.abs(gap) > 1e-12, (table["no_pooling"] - table["partial_mean"]) / gap,
                                      np.nan)
    return table


def parameter_draws(idata, plan: ModelPlan) -> dict:
    """Population-level and variance parameters as named draws (chain, draw)."""
    post = idata.posterior
    out = {}
    for k, term in enumerate(plan.terms):
        out[term] = post["b"].values[..., k]
    for name in plan.family.parameters(plan.outcome):
        out[name] = post[name].values
    for f in plan.factors:
        sd = post[f"{f.name}__sd"].values
        for t, term in enumerate(f.varying):
            out[f"{f.name}.sd" if t == 0 else f"{f.name}.{term}.sd"] = sd[..., t]
        if f"{f.name}__corr" in post:
            corr = post[f"{f.name}__corr"].values
            for a in range(len(f.varying)):
                for c in range(a + 1, len(f.varying)):
                    out[f"{f.name}.corr[{f.varying[a]},{f.varying[c]}]"] = corr[..., a, c]
        for r, col in enumerate(f.predictors):
            out[f"{f.name}.{col}"] = post[f"{f.name}__gamma"].values[..., r]
    return out


def population_summary(idata, plan: ModelPlan, interval: float) -> pd.DataFrame:
    """The run folder's ``summary.csv``: mean, sd, central interval, ESS and R-hat per parameter."""
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    named = parameter_draws(idata, plan)
    stacked = np.stack([np.asarray(d, dtype=float) for d in named.values()], axis=-1)  # (chain, draw, K)
    r_hat, ess_bulk, ess_tail = diagnose(stacked)
    flat = stacked.reshape(-1, stacked.shape[-1])
    return pd.DataFrame({"parameter": list(named), "mean": flat.mean(axis=0), "sd": flat.std(axis=0, ddof=1),
                         "lower": np.quantile(flat, lo_q, axis=0), "upper": np.quantile(flat, hi_q, axis=0),
                         "ess_bulk": ess_bulk, "ess_tail": ess_tail, "r_hat": r_hat})


def pooling_factors(idata, plan: ModelPlan) -> pd.DataFrame:
    """Pooling factor per factor and varying term (Gelman and Pardoe 2006).

    ``lambda = 1 - V_j(E[u_j]) / E[V_j(u_j)]``, where ``V_j`` is the variance
    across groups and ``E`` the posterior mean (Gelman, A. and Pardoe, I. 2006,
    "Bayesian measures of explained variance and pooling in multilevel
    (hierarchical) models", Technometrics 48, 241-251, eq. 8). Near 0: groups
    keep their own estimates; near 1: they are pooled to the population value.
    """
    rows = []
    for f in plan.factors:
        effect = idata.posterior[f"{f.name}__effect"].values  # (c, d, J, q)
        flat = effect.reshape(-1, f.n_groups, len(f.varying))
        for t, term in enumerate(f.varying):
            e_var = float(np.mean(np.var(flat[:, :, t], axis=1, ddof=1)))
            var_e = float(np.var(flat[:, :, t].mean(axis=0), ddof=1))
            rows.append({"factor": f.name, "term": term, "n_groups": f.n_groups,
                         "pooling_factor": 1 - var_e / e_var if e_var > 0 else np.nan})
    return pd.DataFrame(rows)
