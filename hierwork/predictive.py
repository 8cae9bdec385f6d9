"""Posterior and prior predictive draws, calibration and pointwise log-likelihood.

Every path (plain, reduced, collapsed) stores the same posterior variables, so
the linear predictor of any draw is computed here once, in numpy, the same way
for all of them (``F__effect`` is the offset from the population value, also for
the factor that carries the population values on the centred path)::

    eta = X b + sum_F (effect_F[index_F] * X[:, varying_F]).sum(-1) + (W_F gamma_F)[index_F]

(+ log exposure for counts). Outcomes are then drawn with a numpy Generator
seeded from the spec's seed, and log densities come from scipy.

Memory budget: at most ``MAX_CELLS`` = 2e7 numbers (160 MB as float64) of
draws x rows are kept for any one array (posterior predictive draws, pointwise
log-likelihood); the work itself runs in row chunks of ``CHUNK_CELLS`` numbers.
Above the budget the posterior predictive is thinned to fit (every k-th draw of
each chain) and per-row summaries are written to ``predictive_rows.csv``.
Per-row summaries and calibration use every draw up to ``SUMMARY_CELLS`` = 2e8
draws x rows and evenly thinned draws above it (at least 100; the number is in
``calibration.json`` as ``draws_used``);
row-level LOO is then replaced by leave-one-group-out on the top factor when
the collapsed path stored ``log_likelihood["y_by_<factor>"]``, or skipped with
the reason in ``loo.json``.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr
from scipy import special, stats

from .plan import ModelPlan

#: Largest draws x rows array kept in memory or on disk (numbers).
MAX_CELLS = 20_000_000
#: Draws x rows summarised per row (mean, SD, intervals, calibration); above it the
#: summaries use evenly thinned draws, at least ``MIN_SUMMARY_DRAWS`` of them.
SUMMARY_CELLS = 200_000_000
MIN_SUMMARY_DRAWS = 100
#: Draws x rows handled at once while streaming over rows.
CHUNK_CELLS = 2_000_000
#: Nominal levels of the central intervals whose coverage ``calibration.json`` reports.
CALIBRATION_LEVELS = (0.5, 0.8, 0.94)
# Independent random streams under the spec's seed (numpy SeedSequence entropy).
STREAM_POSTERIOR, STREAM_PRIOR, STREAM_PREDICT = 101, 102, 103


# --------------------------------------------------------------------------- draws and rows

@dataclass
class Draws:
    """Posterior (or prior) draws flattened over chains: ``D`` draws.

    ``effects[F]`` (D, J, q), ``gammas[F]`` (D, r), ``extras`` residual_sd / nu /
    dispersion (D,).
    """

    b: np.ndarray
    effects: dict
    gammas: dict
    extras: dict
    shape: tuple  # (chains, draws per chain)

    @property
    def n(self) -> int:
        return self.b.shape[0]

    def subset(self, index: np.ndarray) -> Draws:
        """The draws at ``index`` (flat positions), as one chain unless all are kept."""
        if len(index) == self.n:
            return self
        return Draws(self.b[index], {k: v[index] for k, v in self.effects.items()},
                     {k: v[index] for k, v in self.gammas.items()},
                     {k: v[index] for k, v in self.extras.items()}, (1, len(index)))


def draws_of(group, plan_factors) -> Draws:
    """Flatten an InferenceData group (posterior or prior) into :class:`Draws`.

    ``plan_factors`` are objects with ``name`` and ``predictors`` (FactorPlan, or
    factor entries of plan.json).
    """
    def flat(name):
        v = np.asarray(group[name].values, dtype=float)
        return v.reshape((-1,) + v.shape[2:])

    names = [f.name if hasattr(f, "name") else f["name"] for f in plan_factors]
    preds = [f.predictors if hasattr(f, "predictors") else f["predictors"] for f in plan_factors]
    return Draws(b=flat("b"),
                 effects={n: flat(f"{n}__effect") for n in names},
                 gammas={n: flat(f"{n}__gamma") for n, p in zip(names, preds) if p},
                 extras={k: flat(k) for k in ("residual_sd", "nu", "dispersion") if k in group},
                 shape=(group.sizes["chain"], group.sizes["draw"]))


@dataclass
class Rows:
    """The rows to predict: design, group of each row per factor, family columns.

    ``groups`` is a list of ``(factor name, index (n,), varying columns of X,
    W (J, r) or None)``; indices point into the draws' effect arrays.
    """

    X: np.ndarray
    groups: list
    trials: np.ndarray | None = None
    exposure: np.ndarray | None = None
    known_sd: np.ndarray | None = None

    @property
    def n(self) -> int:
        return self.X.shape[0]


def rows_of(plan: ModelPlan) -> Rows:
    """The fitted rows of a plan."""
    return Rows(plan.X, [(f.name, f.index, list(f.varying_cols), f.W if f.predictors else None)
                         for f in plan.factors], plan.trials, plan.exposure, plan.known_sd)


def linear_predictor(draws: Draws, rows: Rows, sl: slice = slice(None)) -> np.ndarray:
    """``eta`` (D, m) of the rows ``sl`` for every draw (without exposure offset)."""
    X = rows.X[sl]
    eta = draws.b @ X.T
    for name, index, cols, W in rows.groups:
        idx = index[sl]
        eta += np.einsum("dmq,mq->dm", draws.effects[name][:, idx, :], X[:, cols])
        if W is not None:
            eta += (draws.gammas[name] @ W.T)[:, idx]
    return eta


def _chunks(n_draws: int, n_rows: int):
    step = max(1, CHUNK_CELLS // max(n_draws, 1))
    for start in range(0, n_rows, step):
        yield slice(start, min(start + step, n_rows))


# --------------------------------------------------------------------------- families

def _mean_param(family: str, eta, rows: Rows, sl):
    """Mean-scale parameter: identity, probability (logit) or expected count (log, with exposure)."""
    if family in ("bernoulli", "binomial"):
        return special.expit(eta)
    if family in ("poisson", "negative_binomial"):
        offset = 0.0 if rows.exposure is None else np.log(rows.exposure[sl])
        return np.exp(eta + offset)
    return eta


def _extra(draws: Draws, name):
    return draws.extras[name][:, None]


def _sigma(draws: Draws, rows: Rows, sl):
    return rows.known_sd[sl][None, :] if rows.known_sd is not None else _extra(draws, "residual_sd")


def log_density(family: str, y, eta, draws: Draws, rows: Rows, sl) -> np.ndarray:
    """Pointwise log-likelihood (D, m) of observed ``y`` (m,) given ``eta`` (D, m)."""
    if family == "normal":
        return stats.norm.logpdf(y, eta, _sigma(draws, rows, sl))
    if family == "student_t":
        return stats.t.logpdf(y, _extra(draws, "nu"), eta, _extra(draws, "residual_sd"))
    if family in ("bernoulli", "binomial"):
        n = 1.0 if rows.trials is None else rows.trials[sl]
        # log C(n, y) + y log p + (n - y) log(1 - p), with p = expit(eta) kept accurate in the tails
        log_choose = special.gammaln(n + 1) - special.gammaln(y + 1) - special.gammaln(n - y + 1)
        return log_choose + y * special.log_expit(eta) + (n - y) * special.log_expit(-eta)
    mu = _mean_param(family, eta, rows, sl)
    if family == "poisson":
        return stats.poisson.logpmf(y, mu)
    alpha = _extra(draws, "dispersion")  # PyMC's NegativeBinomial(mu, alpha): var = mu + mu^2/alpha
    return stats.nbinom.logpmf(y, alpha, alpha / (alpha + mu))


def simulate(family: str, rng: np.random.Generator, eta, draws: Draws, rows: Rows, sl) -> np.ndarray:
    """One outcome (D, m) per draw and row."""
    if family == "normal":
        return eta + rng.standard_normal(eta.shape) * _sigma(draws, rows, sl)
    if family == "student_t":
        return eta + rng.standard_t(np.broadcast_to(_extra(draws, "nu"), eta.shape)) * _extra(draws, "residual_sd")
    mu = _mean_param(family, eta, rows, sl)
    if family in ("bernoulli", "binomial"):
        n = 1 if rows.trials is None else rows.trials[sl].astype(np.int64)
        return rng.binomial(n, mu).astype(float)
    if family == "poisson":
        return rng.poisson(mu).astype(float)
    alpha = np.broadcast_to(_extra(draws, "dispersion"), mu.shape)
    return rng.poisson(rng.gamma(alpha, mu / alpha)).astype(float)  # gamma-Poisson mixture


# --------------------------------------------------------------------------- posterior predictive

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


def posterior_predictive(draws: Draws, rows: Rows, family: str, y, rng: np.random.Generator,
                         interval: float = 0.94, log_lik: bool = True) -> PosteriorPredictive:
    """Replicate the outcome for every draw and row, streaming over row chunks.

    Keeps at most :data:`MAX_CELLS` numbers per array (see the module docstring).
    Per-row summaries use every :func:`summary_thin`-th draw of each chain; their
    interval bounds are type-6 quantiles (Hyndman and Fan 1996), whose central
    interval holds a new exchangeable draw with probability close to nominal
    whatever the number of draws (type 7 would fall short with few draws).
    """
    D, n = draws.n, rows.n
    chains, per_chain = draws.shape
    step = summary_thin(D, per_chain, n)
    thin = step * math.ceil(math.ceil(D * n / MAX_CELLS) / step)  # stored draws are among the summarised
    used = np.arange(D).reshape(chains, per_chain)[:, ::step]
    keep = np.isin(used.ravel(), np.arange(D).reshape(chains, per_chain)[:, ::thin].ravel())
    sub = draws.subset(used.ravel())
    replicated = np.empty((chains, -(-per_chain // thin), n))
    keep_ll = log_lik and y is not None and D * n <= MAX_CELLS
    ll = np.empty((D, n)) if keep_ll else None
    qs, levels = _quantile_levels(interval)
    summary = {"mean": np.empty(n), "sd": np.empty(n), "q": np.empty((len(qs), n))}
    for sl in _chunks(sub.n, n):
        eta = linear_predictor(sub, rows, sl)
        rep = simulate(family, rng, eta, sub, rows, sl)
        replicated[..., sl] = rep[keep].reshape(replicated.shape[:2] + (-1,))
        summary["mean"][sl] = rep.mean(axis=0)
        summary["sd"][sl] = rep.std(axis=0, ddof=1)
        summary["q"][:, sl] = np.quantile(rep, qs, axis=0, method="weibull")
        if keep_ll:
            ll[:, sl] = log_density(family, y[sl], eta, sub, rows, sl)
    table = {"pred_mean": summary["mean"], "pred_sd": summary["sd"]}
    for k, lv in enumerate(levels):
        table[f"lower_{lv:g}"], table[f"upper_{lv:g}"] = summary["q"][2 * k], summary["q"][2 * k + 1]
    return PosteriorPredictive(replicated, thin, None if ll is None else ll.reshape(chains, per_chain, n),
                               pd.DataFrame(table), levels, sub.n)


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


def augment(idata, plan: ModelPlan, spec, seed: int) -> dict:
    """Add predictive groups to a fit's InferenceData and return extra run-folder files.

    Adds, in place: ``observed_data`` (``y``, dim ``row``), ``posterior_predictive``
    (``y``, thinned above the memory budget), ``log_likelihood`` (``y``; when within
    the budget) and ``constant_data`` (what ``hierwork predict`` needs: categorical
    levels, group-level predictor values per group).

    Parameters
    ----------
    idata : arviz.InferenceData
        The run's posterior (every path).
    plan : ModelPlan
    spec : Spec
    seed : int
        The spec's seed; predictive draws use their own stream under it.

    Returns
    -------
    dict
        File name -> text: ``calibration.json``, ``loo.json`` and, with
        ``estimates.compare_pooling``, ``loo_compare.csv``; and file name ->
        DataFrame: ``predictive_rows.csv`` when the draws were thinned.
    """
    from . import loo

    draws = draws_of(idata.posterior, plan.factors)
    rows = rows_of(plan)
    rng = np.random.default_rng([int(seed), STREAM_POSTERIOR])
    pp = posterior_predictive(draws, rows, plan.family, plan.y, rng, spec.interval)
    post = idata.posterior
    coords = {"chain": post.chain.values, "draw": post.draw.values[::pp.thin], "row": np.arange(plan.n)}
    predictive = xr.Dataset({"y": (("chain", "draw", "row"), pp.replicated)}, coords=coords)
    predictive.attrs["thin"] = pp.thin
    groups = {"posterior_predictive": predictive,
              "observed_data": xr.Dataset({"y": (("row",), plan.y)}, coords={"row": coords["row"]}),
              "constant_data": constant_data(plan, spec)}
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
    files.update(loo.pooling_comparison(idata, plan, spec, seed))
    return files


def constant_data(plan: ModelPlan, spec) -> xr.Dataset:
    """Training facts ``hierwork predict`` needs: categorical levels and group-level predictor values."""
    from .data import load_dataset

    data = {}
    for column, levels in load_dataset(spec).categorical.items():
        data[f"levels__{column}"] = xr.DataArray(np.asarray(levels, dtype=str), dims=(f"{column}__level",))
    for f in plan.factors:
        if f.predictors:
            data[f"{f.name}__W"] = xr.DataArray(f.W, dims=(f.name, f"{f.name}__predictor"),
                                                coords={f.name: list(f.levels),
                                                        f"{f.name}__predictor": list(f.predictors)})
    return xr.Dataset(data)


# --------------------------------------------------------------------------- prior predictive

#: Warning thresholds of the prior predictive summary (common practice; cf. Gabry et al. 2019,
#: "Visualization in Bayesian workflow", JRSS A 182, 389-402, on judging priors by the data they imply).
FAR_FACTOR, FAR_SHARE, EXTREME_P_SHARE, HUGE_COUNT, HUGE_SHARE = 10.0, 0.05, 0.5, 1e6, 0.01


def prior_predictive(plan: ModelPlan, seed: int, draws: int = 500) -> dict:
    """Simulate outcomes from the priors and summarise what they imply.

    Uses ``build_model(plan, centre=False)`` (every variable has a proper prior)
    with ``pymc.sample_prior_predictive``; draws are capped so that draws x rows
    stays within :data:`MAX_CELLS`.

    Returns
    -------
    dict
        ``draws``, observed range, quantiles of the simulated outcomes, share of
        simulated values more than ``FAR_FACTOR`` observed ranges beyond the
        observed values, family checks (logit: share of probabilities below 0.01
        or above 0.99; log link: share of counts above 1e6), and ``warnings``
        (plain-language sentences; empty when nothing looks absurd).
    """
    import pymc as pm

    from .model import build_model

    draws = int(max(1, min(draws, MAX_CELLS // max(plan.n, 1))))
    prior = pm.sample_prior_predictive(draws=draws, model=build_model(plan, centre=False),
                                       random_seed=np.random.default_rng([int(seed), STREAM_PRIOR]))
    y_sim = np.asarray(prior.prior_predictive["y"].values, dtype=float).reshape(-1)
    lo, hi = float(plan.y.min()), float(plan.y.max())
    span = hi - lo if hi > lo else max(abs(hi), 1.0)
    far = float(np.mean((y_sim < lo - FAR_FACTOR * span) | (y_sim > hi + FAR_FACTOR * span)))
    qs = (0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99)
    out = {"draws": draws, "observed": {"min": lo, "max": hi},
           "simulated_quantiles": {f"{q:g}": float(v) for q, v in zip(qs, np.quantile(y_sim, qs))},
           "share_far_outside": far, "far_factor": FAR_FACTOR, "warnings": []}
    what = f"outcome {plan.spec.outcome.column!r}"
    if far > FAR_SHARE:
        out["warnings"].append(
            f"the priors imply implausible values of {what}: {far:.0%} of simulated values lie more than "
            f"{FAR_FACTOR:g} times the observed range ({lo:g} to {hi:g}) outside it; narrow the priors of "
            "the intercept, slopes or SDs (in the data's units)")
    if plan.family in ("bernoulli", "binomial", "poisson", "negative_binomial"):
        eta = linear_predictor(draws_of(prior.prior, plan.factors), rows_of(plan))
        if plan.family in ("bernoulli", "binomial"):
            p = special.expit(eta)
            extreme = float(np.mean((p < 0.01) | (p > 0.99)))
            out["share_probability_extreme"] = extreme
            if extreme > EXTREME_P_SHARE:
                out["warnings"].append(
                    f"the priors put {extreme:.0%} of row probabilities below 1% or above 99%: on the logit "
                    "scale an SD above about 3 already means 'almost always 0 or 1'; narrow the priors")
        else:
            huge = float(np.mean(y_sim > HUGE_COUNT))
            out["share_count_above_1e6"] = huge
            if huge > HUGE_SHARE:
                out["warnings"].append(
                    f"the priors imply counts above a million in {huge:.1%} of simulated rows (log link: "
                    "a prior SD of a few units multiplies counts by e^SD); narrow the priors")
    return out


def prior_predictive_text(plan: ModelPlan, seed: int, draws: int = 500) -> str:
    """:func:`prior_predictive` as lines for ``hierwork check --prior-predictive``."""
    s = prior_predictive(plan, seed, draws)
    q = s["simulated_quantiles"]
    lines = [f"prior predictive ({s['draws']} draws from the priors)",
             f"  observed     {s['observed']['min']:g} to {s['observed']['max']:g}",
             f"  simulated    1%: {q['0.01']:.4g}  25%: {q['0.25']:.4g}  median: {q['0.5']:.4g}  "
             f"75%: {q['0.75']:.4g}  99%: {q['0.99']:.4g}",
             f"  far outside  {s['share_far_outside']:.1%} of simulated values beyond "
             f"{s['far_factor']:g}x the observed range"]
    if "share_probability_extreme" in s:
        lines.append(f"  extreme p    {s['share_probability_extreme']:.1%} of probabilities < 0.01 or > 0.99")
    if "share_count_above_1e6" in s:
        lines.append(f"  huge counts  {s['share_count_above_1e6']:.2%} of counts > 1e6")
    lines += [f"  warning: {w}" for w in s["warnings"]] or ["  the priors imply outcomes on a plausible scale"]
    return "\n".join(lines)
