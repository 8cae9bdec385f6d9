"""The ``spread`` rows of ``group_estimates.csv``: each group's residual SD (``spread: varying``).

For every factor whose groups have their own residual SD (:mod:`hierwork.model.spread`)
one row per group with term ``spread``, in the outcome's units:

* ``partial_mean, partial_sd, lower, upper`` (and the same values as ``outcome_*``):
  the posterior of the group's residual SD ``F__spread``;
* ``no_pooling``: the group's own SD, ``sqrt(sum r^2 / (n_j - 1))`` of the
  residuals ``r`` of the least-squares fit with the population terms and one
  intercept per group of the factor (empty for one-row groups);
  ``complete_pooling``: the pooled SD of that fit, ``sqrt(sum r^2 / (n - rank))``;
* ``pooling_weight``: the posterior mean of ``v_j / (v_j + s^2)`` on the log scale,
  ``s`` the SD of the log residual SDs (``F__spread_sd``) and ``v_j = 1 / (2 (n_j - 1))``
  the large-sample variance of the log of a normal sample SD (delta method; e.g.
  Bartlett and Kendall 1946, JRSS Suppl. 8, 128-138, quoted from memory), 1 for one-row groups;
* ``p_above_population``: the probability that the group's SD exceeds the
  population's (``residual_sd``, a typical group's); ranks order the groups by SD
  (rank 1 the largest).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from hierwork.results.rankings import bounds, rank_draws, rank_summary


def own_and_pooled_sd(plan, f) -> tuple[np.ndarray, float]:
    """Each group's own residual SD and the pooled one (least squares with an intercept per group)."""
    onehot = np.zeros((plan.n, f.n_groups))
    onehot[np.arange(plan.n), f.index] = 1.0
    A = np.column_stack([onehot, plan.X[:, 1:]])
    coef, _, rank, _ = np.linalg.lstsq(A, plan.y, rcond=None)
    r2 = (plan.y - A @ coef) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        own = np.sqrt(np.bincount(f.index, r2, f.n_groups) / (f.sizes - 1))
    own[f.sizes < 2] = np.nan
    return own, float(np.sqrt(r2.sum() / max(plan.n - rank, 1)))


def spread_rows(idata, plan, interval: float) -> pd.DataFrame:
    """The ``spread`` rows of every factor with ``spread: varying`` (empty when none)."""
    lo, hi = bounds(interval)
    frames = []
    for f in (g for g in plan.factors if g.spread == "varying"):
        post = idata.posterior
        sd = np.asarray(post[f"{f.name}__spread"].values, dtype=float).reshape(-1, f.n_groups)
        offset = np.asarray(post[f"{f.name}__spread_effect"].values, dtype=float).reshape(-1, f.n_groups)
        scale = np.asarray(post[f"{f.name}__spread_sd"].values, dtype=float).reshape(-1, 1)
        v = np.where(f.sizes > 1, 1.0 / (2.0 * np.maximum(f.sizes - 1, 1)), np.inf)
        weight = np.where(np.isinf(v), 1.0, (v / (v + scale ** 2)).mean(axis=0))
        own, pooled = own_and_pooled_sd(plan, f)
        mean, lower, upper = sd.mean(axis=0), np.quantile(sd, lo, axis=0), np.quantile(sd, hi, axis=0)
        frames.append(pd.DataFrame({
            "factor": f.name, "group": list(f.levels), "term": "spread", "rows": f.sizes,
            "no_pooling": own, "complete_pooling": pooled,
            "partial_mean": mean, "partial_sd": sd.std(axis=0, ddof=1), "lower": lower, "upper": upper,
            "outcome_mean": mean, "outcome_lower": lower, "outcome_upper": upper,
            "no_pooling_outcome": own, "complete_pooling_outcome": pooled, "pooling_weight": weight,
            "p_above_population": (offset > 0).mean(axis=0), "p_beyond_target": np.nan,
            **rank_summary(sd[rank_draws(sd.shape[0], f.n_groups)], plan.estimands.rank_k, interval)}))
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()
