"""PSIS-LOO across the pooling spectrum: partial, complete and no pooling of one spec.

Expected log predictive density by Pareto-smoothed importance sampling
leave-one-out (Vehtari, Gelman and Gabry 2017, "Practical Bayesian model
evaluation using leave-one-out cross-validation and WAIC", Statistics and
Computing 27, 1413-1432), computed as ``arviz.loo`` does but for every row at
once (:mod:`hierwork.results.psis`) and ranked by ``arviz.compare``. A Pareto
k above 0.7 marks a row whose LOO estimate is unreliable (same paper, §2.1);
ArviZ's sample-size-dependent threshold
``min(1 - 1/log10(S), 0.7)`` is stored beside it.

The three models share family, population terms and default priors:

* **partial pooling**: the run's own posterior;
* **complete pooling**: no grouping factors; group-level predictors enter as
  row predictors (each row gets its group's value), with the priors they had;
* **no pooling**: the factor with the most groups gets its own coefficient per
  group and varying term, each with the population prior of that term and no
  hierarchy (no shared SD); other factors are left out (nested parents are
  absorbed by the group coefficients) and so are group-level predictors of
  that factor and its ancestors (constant within groups, absorbed too); other
  factors' group-level predictors enter as row predictors.

The baselines are fitted with PyMC by NUTS from the spec's sampling settings
with at most 1000 warm-up and 1000 kept draws per chain. This costs two more
(small) fits, so it runs only with ``estimates.compare_pooling: true``; the
partial-pooling LOO alone (no extra fit) is always in ``loo.json``.
"""
from __future__ import annotations

import dataclasses
import io
import json
import warnings

from hierwork import runtime  # noqa: F401  (before ArviZ)

import arviz as az
import numpy as np
import xarray as xr
from scipy import special

from hierwork.inference import seeds
from hierwork.inference.convergence import ess_mean
from hierwork.plan.design import Design, Term
from hierwork.plan.plan import ModelPlan
from hierwork.results.draws import distinct_rows, draws_of, pointwise_log_likelihood, rows_of
from hierwork.results import predictive, psis

#: Pareto k above which a row's PSIS-LOO estimate is unreliable (Vehtari, Gelman and Gabry 2017).
PARETO_K_BAD = 0.7
#: Cap on warm-up and kept draws per chain of the baseline fits.
BASELINE_MAX_DRAWS = 1000
MODELS = ("partial_pooling", "complete_pooling", "no_pooling")


def _row_predictor_priors(plan: ModelPlan, factors) -> tuple:
    """Columns, term names and priors for the group-level predictors of ``factors`` at row level."""
    cols, terms, priors = [], [], {}
    for f in factors:
        for k, col in enumerate(f.predictors):
            term = col if col not in plan.terms else f"{f.name}.{col}"
            cols.append(f.W[f.index, k])
            terms.append(term)
            priors[term] = plan.priors[f"{f.name}.{col}"]
    return cols, terms, priors


def complete_pooling_plan(plan: ModelPlan) -> ModelPlan:
    """The same spec without grouping factors; group-level predictors become row predictors."""
    cols, terms, priors = _row_predictor_priors(plan, plan.factors)
    X = np.column_stack([plan.X] + cols) if cols else plan.X
    return dataclasses.replace(plan, X=X, design=_design(plan.terms + tuple(terms)), factors=(),
                               priors={**plan.priors, **priors})


def no_pooling_plan(plan: ModelPlan) -> ModelPlan:
    """Each group of the finest factor its own coefficients, with the population priors; no hierarchy.

    The model is meant for ``build_model(..., centre=False)``: its first column is
    the first group's intercept indicator, with the population intercept's prior.
    """
    f = max(plan.factors, key=lambda g: g.n_groups)
    absorbed = {f.name}
    node = f
    while node.parent is not None:
        node = plan.factor(node.parent)
        absorbed.add(node.name)
    onehot = np.zeros((plan.n, f.n_groups))
    onehot[np.arange(plan.n), f.index] = 1.0
    cols, terms, priors = [], [], {}
    for t, term in enumerate(f.varying):
        x = plan.X[:, f.varying_cols[t]][:, None]
        cols.append(onehot * x)
        suffix = "" if term == "intercept" else f":{term}"
        terms += [f"{f.name}={g}{suffix}" for g in f.levels]
        priors.update({f"{f.name}={g}{suffix}": plan.priors[term] for g in f.levels})
    kept = [k for k in range(1, len(plan.terms)) if k not in f.varying_cols]
    cols.append(plan.X[:, kept])
    terms += [plan.terms[k] for k in kept]
    priors.update({plan.terms[k]: plan.priors[plan.terms[k]] for k in kept})
    extra_cols, extra_terms, extra_priors = _row_predictor_priors(
        plan, [g for g in plan.factors if g.name not in absorbed])
    priors.update(extra_priors)
    priors["intercept"] = plan.priors["intercept"]  # first column: the first group's intercept
    for name in plan.family.parameters(plan.outcome):
        priors.update({p: plan.priors[p] for p in plan.family.prior_names(name, plan.outcome)})
    X = np.column_stack(cols + extra_cols)
    return dataclasses.replace(plan, X=X, design=_design(tuple(terms + extra_terms)), factors=(), priors=priors)


def _design(names) -> Design:
    """A design naming the columns of a baseline's matrix (built here, never re-evaluated on data)."""
    return Design(tuple(Term(name, "intercept" if k == 0 else "numeric") for k, name in enumerate(names)))


def _fit_baseline(plan: ModelPlan, spec, seed: int, centre: bool):
    from hierwork.inference.sampling import run_sampler
    from hierwork.model.paths import choose_engine, engine_load
    from hierwork.model.rowwise import build_model

    settings = dict(spec.sampling, seed=int(seed),
                    draws=min(spec.sampling["draws"], BASELINE_MAX_DRAWS),
                    warmup=min(spec.sampling["warmup"], BASELINE_MAX_DRAWS))
    engine = choose_engine(settings["engine"],
                           **engine_load(plan, "plain", settings["warmup"] + settings["draws"]))[0]
    return run_sampler(build_model(plan, centre=centre), settings, engine, progress=False)


#: Draws x distinct rows of pointwise log-likelihood evaluated for row-level LOO at most (in chunks
#: of at most :data:`hierwork.results.predictive.MAX_CELLS` numbers); above it row-level LOO is skipped.
LOO_CELLS = 200_000_000


def row_loo(idata, plan: ModelPlan):
    """PSIS-LOO of every row of ``plan`` under ``idata``'s posterior, or None above :data:`LOO_CELLS`.

    Rows with identical predictors, groups and outcome columns
    (:func:`~hierwork.results.draws.distinct_rows`) have identical pointwise
    log-likelihood draws, and PSIS works on each row's draws alone, so their
    Pareto k and ``loo_i`` are identical: both are computed once per distinct
    row (:func:`~hierwork.results.psis.loo_pointwise`) and gathered.

    Returns
    -------
    arviz.ELPDData or None
        As ``arviz.loo(..., pointwise=True)`` on the per-row log-likelihood.
    """
    draws = draws_of(idata.posterior, plan.factors, plan.family.parameters(plan.outcome))
    distinct = distinct_rows(rows_of(plan))
    U = distinct.rows.n
    if draws.n * U > LOO_CELLS:
        return None
    reff = relative_efficiency(idata.posterior)
    loo_u, lppd_u, k_u = np.empty(U), np.empty(U), np.empty(U)
    step = max(1, predictive.MAX_CELLS // draws.n)
    for start in range(0, U, step):
        sl = slice(start, min(start + step, U))
        ll = pointwise_log_likelihood(draws, distinct.rows.subset(sl), plan.family)
        loo_u[sl], k_u[sl] = psis.loo_pointwise(ll, reff)
        lppd_u[sl] = special.logsumexp(ll, axis=0) - np.log(draws.n)
    return _elpd(loo_u, lppd_u, k_u, draws.n, distinct.counts, distinct.inverse)


def _elpd(loo_u, lppd_u, k_u, n_samples: int, counts, inverse):
    """ArviZ's ``ELPDData`` of distinct observations standing for ``counts`` each (``inverse``: one per row).

    ``elpd_loo`` and ``p_loo`` (``lppd - elpd_loo``) are sums over the rows, the
    SE is ``sqrt(n var(loo_i))``, and ``good_k`` is ArviZ's ``min(1 - 1/log10(S), 0.7)``.
    """
    n = int(np.sum(counts))
    elpd = float(counts @ loo_u)
    se = float(np.sqrt(n * np.average((loo_u - elpd / n) ** 2, weights=counts)))
    good_k = min(1 - 1 / np.log10(n_samples), PARETO_K_BAD)
    rows = {"row": np.arange(n)}
    pointwise = [xr.DataArray(loo_u[inverse], dims="row", coords=rows, name="loo_i"),
                 xr.DataArray(k_u[inverse], dims="row", coords=rows)]
    return az.ELPDData(data=[elpd, se, float(counts @ lppd_u) - elpd, n_samples, n, bool((k_u > good_k).any()),
                             *pointwise, "log", good_k],
                       index=["elpd_loo", "se", "p_loo", "n_samples", "n_data_points", "warning", "loo_i",
                              "pareto_k", "scale", "good_k"])


#: Rows with Pareto k above PARETO_K_BAD listed by name in loo.json (highest k first).
MAX_HIGH_K_ROWS = 100


def _loo_record(result, plan: ModelPlan | None = None) -> dict:
    """elpd, SE, p_loo and Pareto k counts; with ``plan`` (row-level LOO) also the rows with k > 0.7."""
    k = np.asarray(result.pareto_k)
    record = {"elpd_loo": float(result.elpd_loo), "se": float(result.se), "p_loo": float(result.p_loo),
              "pareto_k_above_0.7": int((k > PARETO_K_BAD).sum()),
              "pareto_k_threshold_arviz": float(result.good_k),
              "pareto_k_above_arviz_threshold": int((k > result.good_k).sum()),
              "pareto_k_max": float(k.max()), "n": int(k.size)}
    if plan is not None and k.size == plan.n:
        high = [int(i) for i in np.argsort(-k, kind="stable") if k[i] > PARETO_K_BAD][:MAX_HIGH_K_ROWS]
        record["pareto_k_high_rows"] = [
            {"row": i, "pareto_k": float(k[i]), "outcome": float(plan.y[i]),
             "groups": {f.name: str(f.levels[f.index[i]]) for f in plan.factors}} for i in high]
    return record


def _loo(idata, var_name: str):
    """PSIS-LOO of the units of ``idata.log_likelihood[var_name]`` (chain, draw, unit), as ArviZ's ``loo``."""
    values = idata.log_likelihood[var_name].transpose("chain", "draw", ...).values
    ll = values.reshape(values.shape[0] * values.shape[1], -1)
    loo_i, k = psis.loo_pointwise(ll, relative_efficiency(idata.posterior))
    lppd = special.logsumexp(ll, axis=0) - np.log(len(ll))
    return _elpd(loo_i, lppd, k, len(ll), np.ones(len(loo_i)), np.arange(len(loo_i)))


def relative_efficiency(posterior) -> float:
    """Mean ESS of the mean over every posterior element, per draw: PSIS's ``r_eff``.

    The number ArviZ's ``loo`` computes when not given one (one chain: 1), here
    vectorised over parameters (:func:`hierwork.convergence.ess_mean`).
    """
    n_chains, n_draws = posterior.sizes["chain"], posterior.sizes["draw"]
    if n_chains == 1:
        return 1.0
    values = [ess_mean(np.asarray(da.transpose("chain", "draw", ...).values, dtype=float)
                       .reshape(n_chains, n_draws, -1)) for da in posterior.data_vars.values()]
    return float(np.hstack(values).mean() / (n_chains * n_draws))


def pooling_comparison(idata, plan: ModelPlan, spec, seed: int) -> dict:
    """LOO of the run's own posterior and, if the spec asks, of the two baselines.

    Parameters
    ----------
    idata : arviz.InferenceData
        The run's posterior. Row-level LOO (:func:`row_loo`) is computed from its
        draws; above the work budget, leave-one-group-out from
        ``log_likelihood["y_by_<top factor>"]`` when the collapsed path stored it.
    plan : ModelPlan
    spec : Spec
        ``estimates.compare_pooling`` switches the baseline fits on.
    seed : int

    Returns
    -------
    dict
        File name -> text: ``loo.json`` always; ``pooling_comparison.csv`` (``model``
        column, then the expected log predictive density of each model and its
        differences from the best) with the comparison.
    """
    report = {"format": "hierwork-loo/1", "method": "PSIS-LOO (Vehtari, Gelman and Gabry 2017)",
              "pareto_k_bad": PARETO_K_BAD, "models": {}, "notes": []}
    partial = row_loo(idata, plan)
    if partial is None:
        top = next((f for f in plan.factors if f.parent is None), None)
        name = None if top is None else f"y_by_{top.name}"
        ll = getattr(idata, "log_likelihood", None)
        size = idata.posterior.sizes["chain"] * idata.posterior.sizes["draw"] * distinct_rows(rows_of(plan)).rows.n
        why = (f"row-level LOO skipped: draws x distinct rows = {size:,} exceeds the work budget of "
               f"{LOO_CELLS:,} log densities")
        if ll is not None and name in ll:
            report["models"]["partial_pooling"] = _loo_record(_loo(idata, name))
            report["unit"] = f"{top.name} (leave one group out, effects integrated out)"
            report["notes"].append(why + "; leave-one-group-out on the top factor instead, baselines not compared")
        else:
            report["notes"].append(why + "; refit with fewer draws to get it")
        return {"loo.json": json.dumps(report, indent=2) + "\n"}
    report["unit"] = "row"
    results = {"partial_pooling": partial}
    if spec.values["estimates"].get("compare_pooling") and plan.factors:
        cp_seed, np_seed = seeds.child_seeds(seed, "pooling_baselines", 2)
        cp_plan, np_plan = complete_pooling_plan(plan), no_pooling_plan(plan)
        results["complete_pooling"] = row_loo(_fit_baseline(cp_plan, spec, cp_seed, centre=True), cp_plan)
        results["no_pooling"] = row_loo(_fit_baseline(np_plan, spec, np_seed, centre=False), np_plan)
        for name in [name for name, r in results.items() if r is None]:
            del results[name]
            report["notes"].append(f"{name} not compared: its row-level LOO exceeds the work budget")
        report["baseline_draws"] = min(spec.sampling["draws"], BASELINE_MAX_DRAWS)
    report["models"] = {name: _loo_record(r, plan if name == "partial_pooling" else None)
                        for name, r in results.items()}
    files = {}
    if len(results) > 1:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            table = az.compare(results, ic="loo")
        table = table.rename_axis("model").reset_index()
        buf = io.StringIO()
        table.to_csv(buf, index=False)
        files["pooling_comparison.csv"] = buf.getvalue()
    elif plan.factors:
        report["notes"].append("baselines not compared: set estimates.compare_pooling: true "
                               "(two more small fits)")
    files["loo.json"] = json.dumps(report, indent=2, default=_plain) + "\n"
    return files


def _plain(value):
    return value.item() if hasattr(value, "item") else str(value)
