"""Prior predictive check: outcomes simulated from the priors alone, and whether they are plausible.

Uses the generative form of the model (``build_model(plan, centre=False)``:
uncentred, every factor non-centred, so every variable has a proper prior) with
``pymc.sample_prior_predictive`` on its own seed stream
(:mod:`hierwork.inference.seeds`, ``prior_predictive``).
"""
from __future__ import annotations

import numpy as np
from scipy import special

from hierwork.formatting import number, share
from hierwork.inference import seeds
from hierwork.results.draws import draws_of, linear_predictor, rows_of
from hierwork.results.predictive import MAX_CELLS

#: Thresholds of the prior predictive check (common practice; cf. Gabry et al. 2019, "Visualization in
#: Bayesian workflow", JRSS A 182, 389-402, on judging priors by the data they imply). A simulated value is
#: *far outside* when it lies beyond the observed range by more than the range's width (FAR_FACTOR widths);
#: the check fails when more than FAR_SHARE of them are. A non-negative outcome (every observed value >= 0)
#: fails when more than NEGATIVE_SHARE of simulated values are negative: a quarter, since a normal outcome's
#: weakly informative priors are stated in spreads, not bounds, and put some mass below 0 whenever the mean is
#: a few SDs above it (the wheat demo: about 15%); a quarter below a bound the data never cross says the
#: scale itself is wrong (the rail case of tests/test_predictive.py). A logit link fails when more than
#: EXTREME_P_SHARE of the row probabilities lie below 1% or above 99% (the band widens to a fifth of the
#: observed share when that is itself nearer the edge); a log link when more than HUGE_SHARE of simulated
#: counts exceed HUGE_COUNT.
FAR_FACTOR, FAR_SHARE, NEGATIVE_SHARE, EXTREME_P_SHARE, HUGE_COUNT, HUGE_SHARE = 1.0, 0.15, 0.25, 0.2, 1e6, 0.01


def _check(name: str, value: float, threshold: float, found: str, advice: str) -> dict:
    return {"name": name, "value": value, "threshold": threshold, "passed": bool(value <= threshold),
            "found": found, "advice": advice}


def prior_predictive(plan, seed: int, draws: int = 500) -> dict:
    """Simulate outcomes from the priors and judge them against the observed data.

    Uses ``build_model(plan, centre=False)`` (every variable has a proper prior)
    with ``pymc.sample_prior_predictive``; draws are capped so that draws x rows
    stays within :data:`MAX_CELLS`.

    Returns
    -------
    dict
        ``draws``, observed range, quantiles of the simulated outcomes,
        ``checks`` (each: ``name``, ``value`` (a share), ``threshold``,
        ``passed``, ``found`` in words, ``advice``): far outside the observed
        range (not for 0/1 and binomial outcomes, bounded by their trials),
        negative values of a non-negative outcome (families that can simulate
        them), extreme probabilities (logit link) and huge counts (log link);
        ``warnings``, one sentence per failed check (empty only when every
        check passed), and ``passed``.
    """
    import pymc as pm

    from hierwork.model.rowwise import build_model

    draws = int(max(1, min(draws, MAX_CELLS // max(plan.n, 1))))
    prior = pm.sample_prior_predictive(draws=draws, model=build_model(plan, centre=False),
                                       random_seed=seeds.rng(seed, "prior_predictive"))
    y_sim = np.asarray(prior.prior_predictive["y"].values, dtype=float).reshape(-1)
    lo, hi = float(plan.y.min()), float(plan.y.max())
    span = hi - lo if hi > lo else max(abs(hi), 1.0)
    what = f"outcome {plan.spec.outcome.column!r}"
    qs = (0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99)
    far = float(np.mean((y_sim < lo - FAR_FACTOR * span) | (y_sim > hi + FAR_FACTOR * span)))
    out = {"draws": draws, "observed": {"min": lo, "max": hi},
           "simulated_quantiles": {f"{q:g}": float(v) for q, v in zip(qs, np.quantile(y_sim, qs))},
           "share_far_outside": far, "far_factor": FAR_FACTOR, "checks": []}
    checks = out["checks"]
    below, above = lo - FAR_FACTOR * span, hi + FAR_FACTOR * span
    if plan.family.link != "logit":
        checks.append(_check(
            "far_outside", far, FAR_SHARE,
            f"{far:.0%} of simulated values of {what} lie beyond the observed range ({number(lo)} to {number(hi)}) "
            f"by more than its width, below {number(below)} or above {number(above)} (limit {FAR_SHARE:.0%})",
            "narrow the priors of the intercept, slopes or SDs (in the data's units)"))
    if lo >= 0 and not plan.family.discrete:
        negative = float(np.mean(y_sim < 0))
        out["share_negative"] = negative
        checks.append(_check(
            "negative", negative, NEGATIVE_SHARE,
            f"{negative:.0%} of simulated values of {what} are negative, though every observed value is at least 0 "
            f"(limit {NEGATIVE_SHARE:.0%})",
            "narrow the priors, or model the outcome on a scale that cannot go below 0"))
    if plan.family.link in ("logit", "log"):
        eta = linear_predictor(draws_of(prior.prior, plan.factors, ()), rows_of(plan))
        if plan.family.link == "logit":
            p = special.expit(eta)
            trials = getattr(plan.family, "trials", None)
            # ordinal (positions 1..K): the linear predictor is the log-odds of a level above the first
            observed = (float(np.sum(plan.y) / np.sum(np.broadcast_to(trials(plan.outcome), plan.y.shape)))
                        if trials is not None else float(np.mean(plan.y > 1)))
            low, high = min(0.01, observed / 5), max(0.99, 1 - (1 - observed) / 5)
            extreme = float(np.mean((p < low) | (p > high)))
            out["share_probability_extreme"] = extreme
            checks.append(_check(
                "extreme_probability", extreme, EXTREME_P_SHARE,
                f"the priors put {extreme:.0%} of row probabilities below {share(low)} or above {share(high)} "
                f"(observed share {share(observed)}; limit {EXTREME_P_SHARE:.0%})",
                "narrow the priors: on the logit scale an SD above about 3 already means 'almost always 0 or 1'"))
        elif plan.family.discrete:  # counts; a positive amount (gamma, lognormal) may well exceed a million
            huge = float(np.mean(y_sim > HUGE_COUNT))
            out["share_count_above_1e6"] = huge
            checks.append(_check(
                "huge_count", huge, HUGE_SHARE,
                f"{huge:.1%} of simulated counts exceed a million (limit {HUGE_SHARE:.0%})",
                "narrow the priors: on a log link a prior SD of a few units multiplies counts by e^SD"))
    out["warnings"] = [f"{c['found']}: the priors imply implausible values; {c['advice']}"
                       for c in checks if not c["passed"]]
    out["passed"] = not out["warnings"]
    return out


def prior_predictive_text(plan, seed: int, draws: int = 500) -> str:
    """:func:`prior_predictive` as lines for ``hierwork check --prior-predictive``."""
    s = prior_predictive(plan, seed, draws)
    q = s["simulated_quantiles"]
    lines = [f"prior predictive ({s['draws']} draws from the priors)",
             f"  observed     {number(s['observed']['min'])} to {number(s['observed']['max'])}",
             f"  simulated    1%: {number(q['0.01'])}  25%: {number(q['0.25'])}  median: {number(q['0.5'])}  "
             f"75%: {number(q['0.75'])}  99%: {number(q['0.99'])}"]
    lines += [f"  {'ok  ' if c['passed'] else 'FAIL'} {c['found']}" for c in s["checks"]]
    lines += [f"  warning: {w}" for w in s["warnings"]] or [
        "  every check passed: the priors imply outcomes on the scale of the data"]
    return "\n".join(lines)
