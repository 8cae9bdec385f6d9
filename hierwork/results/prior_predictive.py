"""Prior predictive check: outcomes simulated from the priors alone, and whether they are plausible.

Uses the generative form of the model (``build_model(plan, centre=False)``:
uncentred, every factor non-centred, so every variable has a proper prior) with
``pymc.sample_prior_predictive`` on its own seed stream
(:mod:`hierwork.inference.seeds`, ``prior_predictive``).
"""
from __future__ import annotations

import numpy as np
from scipy import special

from hierwork.inference import seeds
from hierwork.results.draws import draws_of, linear_predictor, rows_of
from hierwork.results.predictive import MAX_CELLS

#: Warning thresholds of the prior predictive summary (common practice; cf. Gabry et al. 2019,
#: "Visualization in Bayesian workflow", JRSS A 182, 389-402, on judging priors by the data they imply).
FAR_FACTOR, FAR_SHARE, EXTREME_P_SHARE, HUGE_COUNT, HUGE_SHARE = 10.0, 0.05, 0.5, 1e6, 0.01


def prior_predictive(plan, seed: int, draws: int = 500) -> dict:
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
        or above 0.99; counts with a log link: share above 1e6), and ``warnings``
        (plain-language sentences; empty when nothing looks absurd).
    """
    import pymc as pm

    from hierwork.model.rowwise import build_model

    draws = int(max(1, min(draws, MAX_CELLS // max(plan.n, 1))))
    prior = pm.sample_prior_predictive(draws=draws, model=build_model(plan, centre=False),
                                       random_seed=seeds.rng(seed, "prior_predictive"))
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
    if plan.family.link in ("logit", "log"):
        eta = linear_predictor(draws_of(prior.prior, plan.factors, ()), rows_of(plan))
        if plan.family.link == "logit":
            p = special.expit(eta)
            extreme = float(np.mean((p < 0.01) | (p > 0.99)))
            out["share_probability_extreme"] = extreme
            if extreme > EXTREME_P_SHARE:
                out["warnings"].append(
                    f"the priors put {extreme:.0%} of row probabilities below 1% or above 99%: on the logit "
                    "scale an SD above about 3 already means 'almost always 0 or 1'; narrow the priors")
        elif plan.family.discrete:  # counts; a positive amount (gamma, lognormal) may well exceed a million
            huge = float(np.mean(y_sim > HUGE_COUNT))
            out["share_count_above_1e6"] = huge
            if huge > HUGE_SHARE:
                out["warnings"].append(
                    f"the priors imply counts above a million in {huge:.1%} of simulated rows (log link: "
                    "a prior SD of a few units multiplies counts by e^SD); narrow the priors")
    return out


def prior_predictive_text(plan, seed: int, draws: int = 500) -> str:
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
