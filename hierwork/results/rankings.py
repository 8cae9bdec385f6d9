"""Which groups stand out: beyond the target, above the population, ranks, and contrasts.

All from the draws of :mod:`hierwork.results.outcome`, per draw:

* ``p_above_population``: probability that the group's value exceeds the
  population value at the same reference values (a typical group; for a slope
  row, the population slope). The inverse links are increasing, so this is the
  same on the link and on the outcome's scale.
* ``p_beyond_target`` (intercept rows, with ``estimates.target``): probability
  that the group's expected outcome is above (or below) the target value.
* ``rank_median, rank_lower, rank_upper``: the rank of the group among the
  groups of its factor in each draw (1 = highest value on the outcome's
  scale), its median and central interval (of probability ``estimates.interval``;
  ranks are whole numbers, so the bounds are observed ranks: inverse of the
  empirical distribution function). ``p_top``/``p_bottom``: probability of a rank
  among the ``estimates.rank_k`` highest / lowest.
* contrasts (``contrasts.csv``): the difference A - B of two groups' values on
  the outcome's scale, its mean, SD, central interval and ``p_positive`` = P(A - B > 0).

Ranks use every draw up to :data:`RANK_CELLS` draws x groups and evenly spaced
draws above it.
"""
from __future__ import annotations

import numpy as np

from hierwork.results.draws import within_budget

#: Draws x groups ranked at once (int32 ranks); above it, evenly spaced draws (at least 100).
RANK_CELLS = 20_000_000


def bounds(interval: float) -> tuple[float, float]:
    """Quantile levels of the central interval of probability ``interval``."""
    return (1 - interval) / 2, 1 - (1 - interval) / 2


def standing(link: np.ndarray, outcome: np.ndarray, population_link: np.ndarray, estimands,
             is_level: bool) -> dict:
    """``p_above_population`` and ``p_beyond_target`` from draws ``link``, ``outcome`` (D, J) and the population's (D,).

    ``is_level`` marks the intercept row (the group's expected outcome), the only one a target applies to.
    """
    out = {"p_above_population": (link > population_link[:, None]).mean(axis=0)}
    target = estimands.target
    if target is not None and is_level:
        beyond = outcome > target["value"] if target["direction"] == "above" else outcome < target["value"]
        out["p_beyond_target"] = beyond.mean(axis=0)
    else:
        out["p_beyond_target"] = np.full(link.shape[1], np.nan)
    return out


def ranks(values: np.ndarray) -> np.ndarray:
    """Rank of each group in each draw, 1 = highest: (D, J) -> (D, J) int32."""
    order = np.argsort(-values, axis=1, kind="stable")
    out = np.empty(values.shape, dtype=np.int32)
    np.put_along_axis(out, order, np.arange(1, values.shape[1] + 1, dtype=np.int32)[None, :], axis=1)
    return out


def rank_draws(n_draws: int, n_groups: int) -> np.ndarray:
    """Positions of the draws the ranks use: every draw within :data:`RANK_CELLS`, else evenly spaced ones."""
    return within_budget(n_draws, n_groups, RANK_CELLS)


def rank_summary(values: np.ndarray, k: int, interval: float) -> dict:
    """``rank_median, rank_lower, rank_upper, p_top, p_bottom`` of draws ``values`` (D, J) of every group."""
    J = values.shape[1]
    r = ranks(values)
    lo, hi = bounds(interval)
    median, lower, upper = np.quantile(r, [0.5, lo, hi], axis=0, method="inverted_cdf")
    return {"rank_median": median, "rank_lower": lower, "rank_upper": upper,
            "p_top": (r <= k).mean(axis=0), "p_bottom": (r > J - k).mean(axis=0)}


def contrast_rows(factor: str, a: str, b: str, terms, outcome: np.ndarray, interval: float) -> list:
    """Rows of ``contrasts.csv`` for groups ``a`` and ``b``: one per term, from their outcome draws (D, 2, q)."""
    lo, hi = bounds(interval)
    rows = []
    for t, term in enumerate(terms):
        diff = outcome[:, 0, t] - outcome[:, 1, t]
        rows.append({"factor": factor, "group_a": a, "group_b": b, "term": term,
                     "difference": float(diff.mean()), "difference_sd": float(diff.std(ddof=1)),
                     "lower": float(np.quantile(diff, lo)), "upper": float(np.quantile(diff, hi)),
                     "p_positive": float((diff > 0).mean())})
    return rows


#: Columns of ``contrasts.csv``.
CONTRAST_COLUMNS = ("factor", "group_a", "group_b", "term", "difference", "difference_sd", "lower", "upper",
                    "p_positive")
