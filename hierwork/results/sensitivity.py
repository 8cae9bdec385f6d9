"""How much the priors matter, without refitting: power-scaling and Pareto-smoothed importance sampling.

Power-scaling (Kallioinen, Paananen, Bürkner and Vehtari 2023, Statistics and
Computing 34:57) perturbs one part of the posterior ``p(theta | y) ~ p(theta)
p(y | theta)`` by raising it to a power ``alpha`` near 1: the prior
(``p(theta)^alpha``: ``alpha > 1`` a more confident prior, ``alpha < 1`` a
vaguer one) or the likelihood (as if there were ``alpha`` times the data). The
perturbed posterior is reached from the existing draws by importance weights
``w_s ~ p(theta_s)^(alpha - 1)`` (likelihood: ``p(y | theta_s)^(alpha - 1)``),
smoothed by PSIS (Vehtari, Simpson, Gelman, Yao and Gabry 2024, JMLR 25:72,
``arviz.psislw``), whose Pareto ``k`` says when the weights cannot be trusted.

Only the top-level priors are scaled (population coefficients, family
parameters, group SDs and correlations, group-level predictor coefficients);
the groups' effects given their SD are part of the model, not of the prior
choice, and stay as they are. All priors are scaled together.

A parameter's **sensitivity** to a part is the rate at which its marginal
posterior moves, as a distance between the base and the perturbed posterior,
per unit of ``log2(alpha)``, estimated from ``alpha = 1/(1 + DELTA)`` and
``1 + DELTA``. The distance is the cumulative Jensen-Shannon distance: the
Jensen-Shannon divergence of the two cumulative distribution functions
(Nguyen and Vreeken 2015, SIAM SDM), integrated over the parameter's range,
divided by its upper bound so that it lies in [0, 1], taken for both tails (the
larger of the CDF and survival-function forms) and square-rooted (which makes
it a metric). It does not depend on the parameter's units.

Diagnosis (as the same paper proposes): a parameter whose posterior moves with
the prior (``prior_sensitivity >= THRESHOLD``) either also moves with the
likelihood (**prior-data conflict**: prior and data pull in different
directions) or not (**likelihood too weak to overrule the prior**: the data say
little about it, so its posterior largely restates the prior).
"""
from __future__ import annotations

from hierwork import runtime  # noqa: F401  (before ArviZ)

import numpy as np
import pandas as pd

from hierwork.plan.plan import ModelPlan

#: Power-scaling step: alpha = 1/(1 + DELTA) and 1 + DELTA.
DELTA = 0.01
#: Sensitivity from which a parameter counts as moved by a part (the paper's suggested cut-off, quoted from memory).
THRESHOLD = 0.05
#: Columns of sensitivity.csv.
COLUMNS = ("parameter", "prior_sensitivity", "likelihood_sensitivity", "diagnosis", "pareto_k")
#: Draws x distinct rows of likelihood evaluations at most; beyond, evenly spaced draws (at least MIN_DRAWS) are used.
LIKELIHOOD_CELLS = 200_000_000
MIN_DRAWS = 1000
#: The words of the diagnosis column.
CONFLICT = "prior-data conflict"
WEAK_LIKELIHOOD = "likelihood too weak to overrule the prior"
NONE = "none"
UNRELIABLE = "not reliable: Pareto k too high, refit with scaled priors instead"


def k_limit(n_draws: int) -> float:
    """Pareto k above which PSIS estimates are unreliable: ``min(1 - 1/log10(S), 0.7)``
    (Vehtari, Simpson, Gelman, Yao and Gabry 2024; quoted from memory)."""
    return float(min(1.0 - 1.0 / np.log10(max(n_draws, 11)), 0.7))


# --------------------------------------------------------------------------- densities per draw

def _flat(da) -> np.ndarray:
    values = np.asarray(da.values, dtype=float)
    return values.reshape((-1,) + values.shape[2:])


def log_prior(idata, plan: ModelPlan) -> np.ndarray:
    """Joint log density of the top-level priors at every draw (D,), from the plan's priors."""
    post = idata.posterior
    b = _flat(post["b"])
    total = np.zeros(b.shape[0])
    for k, term in enumerate(plan.terms):
        total += plan.priors["intercept" if k == 0 else term].logpdf(b[:, k])
    family = plan.family
    for name in family.parameters(plan.outcome):
        variable = family.prior_variable(name)
        if variable in post:
            values = _flat(post[variable]).reshape(b.shape[0], -1)
            for k, p in enumerate(family.prior_names(name, plan.outcome)):
                total += plan.priors[p].logpdf(values[:, k])
    for f in plan.factors:
        sd = _flat(post[f"{f.name}__sd"]).reshape(b.shape[0], -1)
        for t, term in enumerate(f.varying):
            total += plan.priors[f"{f.name}.sd" if t == 0 else f"{f.name}.{term}.sd"].logpdf(sd[:, t])
        if f"{f.name}__corr" in post and f"{f.name}.corr" in plan.priors:
            total += plan.priors[f"{f.name}.corr"].logpdf(_flat(post[f"{f.name}__corr"]))
        if f.predictors:
            gamma = _flat(post[f"{f.name}__gamma"])
            for r, col in enumerate(f.predictors):
                total += plan.priors[f"{f.name}.{col}"].logpdf(gamma[:, r])
    return total


def log_likelihood(idata, plan: ModelPlan, keep: np.ndarray | None = None, distinct=None) -> np.ndarray:
    """Log likelihood of all fitted rows at the draws ``keep`` (flat positions; default all), given the
    groups' effects: once per distinct row (``distinct``, default
    :func:`~hierwork.results.draws.distinct_rows` of the plan's rows) times the rows it stands for,
    streamed over them."""
    from hierwork.results.draws import chunks, distinct_rows, draws_of, linear_predictor, rows_of

    draws = draws_of(idata.posterior, plan.factors, plan.family.parameters(plan.outcome))
    draws = draws if keep is None else draws.subset(keep)
    distinct = distinct_rows(rows_of(plan)) if distinct is None else distinct
    rows = distinct.rows
    total = np.zeros(draws.n)
    for sl in chunks(draws.n, rows.n):
        eta = linear_predictor(draws, rows, sl)
        density = plan.family.log_density(rows.outcome.y[sl], eta, rows.outcome.rows(sl), draws.family_params(rows, sl))
        total += density @ distinct.counts[sl]
    return total


# --------------------------------------------------------------------------- reweighting

def power_weights(log_density: np.ndarray, alpha: float, r_eff: float = 1.0) -> tuple:
    """PSIS weights moving the draws to the posterior with ``log_density`` scaled by ``alpha``.

    Returns
    -------
    (numpy.ndarray, float)
        Normalised weights (D,) summing to one, and the Pareto k of the raw weights.
    """
    import arviz as az

    log_w = (alpha - 1.0) * np.asarray(log_density, dtype=float)
    smoothed, k = az.psislw(log_w - log_w.max(), reff=r_eff)
    smoothed = np.asarray(smoothed, dtype=float)
    weights = np.exp(smoothed - smoothed.max())
    return weights / weights.sum(), float(np.asarray(k))


def weighted_moments(x: np.ndarray, weights: np.ndarray) -> tuple:
    """Mean and SD of draws ``x`` under normalised ``weights``."""
    mean = float(np.sum(weights * x))
    return mean, float(np.sqrt(np.sum(weights * (x - mean) ** 2)))


def _cjs_one_tail(gaps: np.ndarray, cdf_p: np.ndarray, cdf_q: np.ndarray) -> float:
    """Normalised cumulative Jensen-Shannon divergence of two step CDFs on the same sorted points."""
    mid = 0.5 * (cdf_p + cdf_q)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = (np.where(cdf_p > 0, cdf_p * np.log2(cdf_p / mid), 0.0)
                 + np.where(cdf_q > 0, cdf_q * np.log2(cdf_q / mid), 0.0))
    bound = np.sum(gaps * (cdf_p + cdf_q))
    return float(np.sum(gaps * terms) / bound) if bound > 0 else 0.0


def cjs_distance(x: np.ndarray, weights_p: np.ndarray, weights_q: np.ndarray) -> float:
    """Cumulative Jensen-Shannon distance between two weightings of the same draws ``x`` (0 to 1)."""
    order = np.argsort(x, kind="stable")
    xs = x[order]
    gaps = np.diff(xs)
    p, q = weights_p[order], weights_q[order]
    cdf_p, cdf_q = np.cumsum(p)[:-1], np.cumsum(q)[:-1]
    lower = _cjs_one_tail(gaps, cdf_p, cdf_q)
    upper = _cjs_one_tail(gaps, 1.0 - cdf_p, 1.0 - cdf_q)
    return float(np.sqrt(max(lower, upper, 0.0)))


def sensitivities(values: dict, log_density: np.ndarray, r_eff: float = 1.0, delta: float = DELTA) -> tuple:
    """Sensitivity of each parameter to power-scaling ``log_density``, and the worse Pareto k.

    Parameters
    ----------
    values : dict
        Parameter name -> draws (D,).
    log_density : numpy.ndarray
        The part being scaled (log prior or log likelihood) at each draw (D,).

    Returns
    -------
    (dict, float)
        Parameter -> distance moved per unit of ``log2(alpha)``; the larger k of the two scalings.
    """
    n = len(log_density)
    base = np.full(n, 1.0 / n)
    scaled = [power_weights(log_density, alpha, r_eff) for alpha in (1.0 / (1.0 + delta), 1.0 + delta)]
    step = 2.0 * np.log2(1.0 + delta)
    out = {name: sum(cjs_distance(np.asarray(x, dtype=float), base, w) for w, _ in scaled) / step
           for name, x in values.items()}
    return out, max(k for _, k in scaled)


def diagnose(prior: float, likelihood: float, k: float, limit: float, threshold: float = THRESHOLD) -> str:
    """The diagnosis in words (see the module docstring)."""
    if not k <= limit:
        return UNRELIABLE
    if prior >= threshold:
        return CONFLICT if likelihood >= threshold else WEAK_LIKELIHOOD
    return NONE


def reported_parameters(idata, plan: ModelPlan) -> dict:
    """Population coefficients, family parameters and group SDs (summary.csv's names) -> flat draws."""
    from hierwork.results.estimates import parameter_draws

    return {name: np.asarray(v, dtype=float).reshape(-1) for name, v in parameter_draws(idata, plan).items()
            if ".corr[" not in name and not any(name == f"{f.name}.{c}" for f in plan.factors for c in f.predictors)}


def sensitivity_table(idata, plan: ModelPlan) -> pd.DataFrame:
    """``sensitivity.csv``: prior and likelihood sensitivity, diagnosis and Pareto k per parameter.

    Parameters
    ----------
    idata : arviz.InferenceData
        The fit's posterior (every ``F__effect`` included).
    plan : ModelPlan

    Returns
    -------
    pandas.DataFrame
        Columns :data:`COLUMNS`, one row per population coefficient, family
        parameter and group SD; ``pareto_k`` is the largest of the four
        scalings' (prior and likelihood, both directions), shared by every row.
        Above :data:`LIKELIHOOD_CELLS` evaluations (draws x distinct rows), evenly spaced draws are used.
    """
    from hierwork.results.draws import distinct_rows, rows_of, within_budget
    from hierwork.results.loo import relative_efficiency

    lp = log_prior(idata, plan)
    distinct = distinct_rows(rows_of(plan))
    keep = within_budget(len(lp), distinct.rows.n, LIKELIHOOD_CELLS, MIN_DRAWS)
    values = {name: x[keep] for name, x in reported_parameters(idata, plan).items()}
    r_eff = relative_efficiency(idata.posterior[["b"]]) if len(keep) == len(lp) else 1.0
    prior, k_prior = sensitivities(values, lp[keep], r_eff)
    likelihood, k_lik = sensitivities(values, log_likelihood(idata, plan, keep, distinct), r_eff)
    k, limit = max(k_prior, k_lik), k_limit(len(keep))
    rows = [(name, prior[name], likelihood[name], diagnose(prior[name], likelihood[name], k, limit), k)
            for name in values]
    return pd.DataFrame(rows, columns=list(COLUMNS))
