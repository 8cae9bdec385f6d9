"""Posterior predictive draws, per-row summaries and calibration, added to a fit's InferenceData.

Outcomes are replicated with a NumPy generator on the spec's seed
(:mod:`hierwork.inference.seeds`, stream ``posterior_predictive``) by the
family's simulator, and the pointwise log-likelihood comes from its log density.

Memory budget: at most ``MAX_CELLS`` = 2e7 numbers (160 MB as float64) of
draws x rows are kept for any one array (posterior predictive draws, pointwise
log-likelihood); the work itself runs in row chunks
(:data:`hierwork.results.draws.CHUNK_CELLS`). Above the budget the posterior
predictive is thinned to fit (every k-th draw of each chain), the pointwise
log-likelihood is not stored, and per-row summaries are written to
``predictive_rows.csv``. Rows with identical predictors, groups and outcome
columns are summarised once (:func:`~hierwork.results.draws.distinct_rows`):
per-row summaries and calibration use every draw up to ``SUMMARY_CELLS`` = 2e8
draws x distinct rows and evenly thinned draws above it (at least 100; the
number is in ``calibration.json`` as ``draws_used``). Row-level LOO has its own
work budget (:mod:`hierwork.results.loo`).
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

from hierwork.inference import seeds
from hierwork.results.draws import (Draws, Rows, chunks, distinct_rows, draws_of, linear_predictor,
                                    pointwise_log_likelihood, rows_of)

#: Largest draws x rows array kept in memory or on disk (numbers).
MAX_CELLS = 20_000_000
#: Draws x distinct rows summarised (mean, SD, intervals, calibration); above it the
#: summaries use evenly thinned draws, at least ``MIN_SUMMARY_DRAWS`` of them.
SUMMARY_CELLS = 200_000_000
MIN_SUMMARY_DRAWS = 100
#: Nominal levels of the central intervals whose coverage ``calibration.json`` reports.
CALIBRATION_LEVELS = (0.5, 0.8, 0.94)


def _quantile_levels(interval: float) -> tuple:
    levels = sorted(set(CALIBRATION_LEVELS) | {interval})
    return [q for lv in levels for q in ((1 - lv) / 2, 1 - (1 - lv) / 2)], levels


@dataclass
class PosteriorPredictive:
    """Result of :func:`posterior_predictive`.

    ``replicated`` (chains, kept draws, n) and ``thin`` (every ``thin``-th draw
    kept); ``log_lik`` (chains, draws, n) or None above the budget; ``rows`` a
    DataFrame of per-row summaries (mean, sd, and bounds of each central interval)
    over ``summary_draws`` draws.
    """

    replicated: np.ndarray
    thin: int
    log_lik: np.ndarray | None
    rows: pd.DataFrame
    levels: list
    summary_draws: int


def summary_thin(n_draws: int, per_chain: int, n_rows: int) -> int:
    """Every how many draws of each chain the per-row summaries use (1 = all of them).

    Within :data:`SUMMARY_CELLS` draws x rows, but at least :data:`MIN_SUMMARY_DRAWS`
    draws in all (or every draw if there are fewer).
    """
    chains = max(1, n_draws // max(per_chain, 1))
    wanted = math.ceil(n_draws * n_rows / SUMMARY_CELLS)
    floor = max(1, per_chain // math.ceil(MIN_SUMMARY_DRAWS / chains))
    return max(1, min(wanted, floor))


def posterior_predictive(draws: Draws, rows: Rows, family, y, rng: np.random.Generator,
                         interval: float = 0.94, log_lik: bool = True) -> PosteriorPredictive:
    """Replicate the outcome for every draw and row, streaming over row chunks.

    Keeps at most :data:`MAX_CELLS` numbers per array (see the module docstring).
    Rows with identical predictors, groups and outcome columns share one
    predictive distribution (:func:`~hierwork.results.draws.distinct_rows`), so
    the per-row summaries are computed once per such set of rows, from every
    :func:`summary_thin`-th draw of each chain (the budget counts the distinct
    rows), and the log-likelihood once per distinct row and outcome; the stored
    replicated outcomes are drawn for every row independently. Interval bounds
    are type-6 quantiles (Hyndman and Fan 1996), whose central interval holds a
    new exchangeable draw with probability close to nominal whatever the number
    of draws (type 7 would fall short with few draws).
    """
    D, n = draws.n, rows.n
    chains, per_chain = draws.shape
    flat = np.arange(D).reshape(chains, per_chain)
    keys = distinct_rows(rows, outcome=False)
    sub = draws.subset(flat[:, ::summary_thin(D, per_chain, keys.rows.n)].ravel())
    qs, levels = _quantile_levels(interval)
    summary = {"mean": np.empty(keys.rows.n), "sd": np.empty(keys.rows.n), "q": np.empty((len(qs), keys.rows.n))}
    for sl in chunks(sub.n, keys.rows.n):
        rep = family.simulate(rng, linear_predictor(sub, keys.rows, sl), keys.rows.outcome.rows(sl),
                              sub.family_params(keys.rows, sl))
        summary["mean"][sl] = rep.mean(axis=0)
        summary["sd"][sl] = rep.std(axis=0, ddof=1)
        summary["q"][:, sl] = np.quantile(rep, qs, axis=0, method="weibull")
    thin = math.ceil(D * n / MAX_CELLS)
    kept = draws.subset(flat[:, ::thin].ravel())
    eta = linear_predictor(kept, keys.rows)  # (kept draws, distinct rows): within MAX_CELLS
    replicated = np.empty((kept.n, n))
    for sl in chunks(kept.n, n):
        replicated[:, sl] = family.simulate(rng, eta[:, keys.inverse[sl]], rows.outcome.rows(sl),
                                            kept.family_params(rows, sl))
    ll = None
    if log_lik and y is not None and D * n <= MAX_CELLS:
        observed = distinct_rows(rows)
        ll = pointwise_log_likelihood(draws, observed.rows, family)[:, observed.inverse].reshape(chains, per_chain, n)
    table = {"pred_mean": summary["mean"][keys.inverse], "pred_sd": summary["sd"][keys.inverse]}
    for k, lv in enumerate(levels):
        table[f"lower_{lv:g}"] = summary["q"][2 * k][keys.inverse]
        table[f"upper_{lv:g}"] = summary["q"][2 * k + 1][keys.inverse]
    return PosteriorPredictive(replicated.reshape(chains, -1, n), thin, ll, pd.DataFrame(table), levels, sub.n)


def calibration(y, table: pd.DataFrame, factors) -> dict:
    """Coverage of the central posterior predictive intervals, overall and by group.

    For discrete outcomes a central interval of level ``p`` holds at least ``p``
    of the predictive mass, so coverage somewhat above nominal is expected.

    Parameters
    ----------
    y : (n,) observed outcomes
    table : per-row summaries from :func:`posterior_predictive`
    factors : sequence of FactorPlan

    Returns
    -------
    dict
        ``{"levels": [{"nominal", "coverage", "by_factor": {F: {groups, median,
        min, max, worst_group, worst_group_rows}}}], ...}``
    """
    out = []
    for lv in CALIBRATION_LEVELS:
        inside = (y >= table[f"lower_{lv:g}"].to_numpy()) & (y <= table[f"upper_{lv:g}"].to_numpy())
        by_factor = {}
        for f in factors:
            share = np.bincount(f.index, weights=inside, minlength=f.n_groups) / f.sizes
            worst = int(np.argmin(share))
            by_factor[f.name] = {"groups": f.n_groups, "median": float(np.median(share)),
                                 "min": float(share.min()), "max": float(share.max()),
                                 "worst_group": f.levels[worst], "worst_group_rows": int(f.sizes[worst])}
        out.append({"nominal": lv, "coverage": float(inside.mean()), "rows": int(len(y)),
                    "by_factor": by_factor})
    return {"format": "hierwork-calibration/1",
            "what": "share of observed outcomes inside the central posterior predictive interval of each "
                    "nominal level (discrete outcomes: at least nominal is expected)",
            "levels": out}


def augment(idata, plan, seed: int, interval: float) -> dict:
    """Add predictive groups to a fit's InferenceData and return extra run-folder files.

    Adds, in place: ``observed_data`` (``y``, dim ``row``), ``posterior_predictive``
    (``y``, thinned above the memory budget), ``log_likelihood`` (``y``; when within
    the budget) and ``constant_data`` (group-level predictor values per group, which
    ``hierwork predict`` needs; empty without group-level predictors).

    Parameters
    ----------
    idata : arviz.InferenceData
        The run's posterior (every path).
    plan : ModelPlan
    seed : int
        The spec's seed; predictive draws use their own stream under it.
    interval : float
        Level of the central interval of the per-row summaries.

    Returns
    -------
    dict
        File name -> text: ``calibration.json``; and file name -> DataFrame:
        ``predictive_rows.csv`` when the draws were thinned.
    """
    draws = draws_of(idata.posterior, plan.factors, plan.family.parameters(plan.outcome))
    pp = posterior_predictive(draws, rows_of(plan), plan.family, plan.y, seeds.rng(seed, "posterior_predictive"),
                              interval)
    post = idata.posterior
    coords = {"chain": post.chain.values, "draw": post.draw.values[::pp.thin], "row": np.arange(plan.n)}
    predictive = xr.Dataset({"y": (("chain", "draw", "row"), pp.replicated)}, coords=coords)
    predictive.attrs["thin"] = pp.thin
    groups = {"posterior_predictive": predictive,
              "observed_data": xr.Dataset({"y": (("row",), plan.y)}, coords={"row": coords["row"]}),
              "constant_data": constant_data(plan)}
    if pp.log_lik is not None:
        groups["log_likelihood"] = xr.Dataset({"y": (("chain", "draw", "row"), pp.log_lik)},
                                              coords={**coords, "draw": post.draw.values})
    for name, ds in groups.items():
        if name in idata.groups():
            getattr(idata, name).update(ds)
        else:
            idata.add_groups({name: ds})
    report = {**calibration(plan.y, pp.rows, plan.factors), "draws_used": pp.summary_draws}
    files = {"calibration.json": json.dumps(report, indent=2) + "\n"}
    if pp.thin > 1:
        files["predictive_rows.csv"] = pp.rows.rename_axis("row").reset_index()
    return files


def constant_data(plan) -> xr.Dataset:
    """Training facts beyond plan.json: group-level predictor values per group (for ``hierwork predict``)
    and the trials per row of a binomial outcome (the report's predictive check is on proportions)."""
    data = {}
    if plan.trials is not None and np.ndim(plan.trials):
        data["trials"] = xr.DataArray(np.asarray(plan.trials, dtype=float), dims=("row",))
    for f in plan.factors:
        if f.predictors:
            data[f"{f.name}__W"] = xr.DataArray(f.W, dims=(f.name, f"{f.name}__predictor"),
                                                coords={f.name: list(f.levels),
                                                        f"{f.name}__predictor": list(f.predictors)})
    return xr.Dataset(data)
