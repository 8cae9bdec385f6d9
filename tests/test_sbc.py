"""Simulation-based calibration of the sampling models, one per family and a correlated-slopes model.

Method: Talts, Betancourt, Simpson, Vehtari and Gelman (2018), "Validating
Bayesian inference algorithms with simulation-based calibration",
arXiv:1804.06788. For each replicate, parameters and outcomes are drawn from
the prior (``build_model(plan, centre=False)`` with
``pm.sample_prior_predictive``), the sampling model is fitted to the simulated
outcome, and the rank of the true value among L = 99 thinned posterior draws is
recorded. If the model and the sampler are right, each rank is uniform on
0..99 (Talts et al. 2018, Theorem 1); we bin the ranks into 10 bins of 10 values
and test uniformity with Pearson's chi-square (scipy.stats.chisquare).

Level: each test (one model) fails when any checked parameter's p-value is
below 0.01 / k, a Bonferroni correction over its k checked parameters, so a
correct model fails a test with probability at most 0.01 (the seeds are fixed,
so the outcome is deterministic; 0.01 keeps false alarms rare over the eight
tests while a shifted or over-/under-dispersed posterior of the size Talts et
al. show still gives p-values far below it at 100 replicates). Replicates
with divergent transitions are kept (dropping them would bias the ranks);
target_accept 0.95 keeps them rare and their count is printed.

Power check (negative control, at no extra cost): the same posterior draws
are also ranked against the true values of the *next* replicate, which the
posterior knows nothing about. Those ranks are not uniform wherever the data
are informative, so every test also asserts that the control is rejected for at
least one parameter: a harness that could not tell a right posterior from a
wrong one fails.

Each model is compiled once with nutpie; replicates swap in the outcome
(``y_data``) with ``with_data``. The collapsed normal model takes the data as
per-group sufficient statistics, so its replicates swap those in instead.
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pymc as pm
import pytensor
import pytest
import yaml
from scipy import stats

import hierwork
from hierwork.model import collapsed
from hierwork.model.rowwise import build_model
from hierwork.model.cells import cell_stats

pytestmark = pytest.mark.slow

N_REPLICATES = 100
N_RANKS = 99                 # posterior draws kept per replicate: ranks 0..99
N_BINS = 10
FAMILY_WISE_LEVEL = 0.01
THIN = 2                     # keep every 2nd draw: autocorrelated draws skew ranks (Talts et al. 2018, §4)
SETTINGS = {"chains": 1, "draws": N_RANKS * THIN, "tune": 200, "progress_bar": False, "target_accept": 0.95}

GROUPS, ROWS = 8, 5
# SBC holds for any proper prior; these are set (not the data-scaled defaults) so the plan does not
# depend on the placeholder outcome, and kept moderate so simulated counts and proportions stay plausible.
LINK_PRIORS = {"intercept": {"normal": {"mu": 0, "sigma": 1}}, "x": {"normal": {"mu": 0, "sigma": 0.5}},
               "g.sd": {"half_normal": {"sigma": 0.7}}}
COUNT_PRIORS = {**LINK_PRIORS, "intercept": {"normal": {"mu": 1, "sigma": 0.5}}}
SCALE_PRIORS = {**LINK_PRIORS, "residual_sd": {"half_normal": {"sigma": 1}}}
EXTRA = {"nu": {"gamma": {"alpha": 2, "beta": 0.1}}, "dispersion": {"gamma": {"alpha": 2, "beta": 0.1}},
         "concentration": {"gamma": {"alpha": 2, "beta": 0.1}}, "zero_inflation": {"beta": {"alpha": 2, "beta": 4}},
         "cv": {"gamma": {"alpha": 4, "beta": 8}}, "log_sd": {"half_normal": {"sigma": 1}}}
#: Ordinal placeholder outcomes are the scores 1..4; the priors of the gaps between its cut-points.
ORDINAL_GAPS = {"cutpoints.gap[2|3]": {"lognormal": {"mu": 0, "sigma": 0.5}},
                "cutpoints.gap[3|4]": {"lognormal": {"mu": 0, "sigma": 0.5}}}
#: Families whose outcome must be positive (the placeholder outcome is 1 or 2 for them, else 0 or 1).
POSITIVE = ("gamma", "lognormal")
#: Families with a number of trials per row.
TRIALS = ("binomial", "beta_binomial")
COMMON = [("b", "intercept"), ("b", "x"), ("g__sd", "intercept"),
          ("g__effect", ("g0", "intercept")), ("g__effect", ("g1", "intercept"))]

# family -> (parameterisation, priors, checked parameters); binomial (10 trials x 5 rows per group, data-rich
# enough) exercises the centred form (hierarchical centring, intercept prior as a potential), the others the
# non-centred one that auto takes for these 8 small groups. Normal outcomes with the centred form on this
# data-poor design fail here (b[intercept] p = 0.0005 at seed 1000, 59 divergences; the non-centred form on the
# same replicates passes): the funnel that auto exists to avoid (Betancourt and Girolami 2013).
CASES = {
    "normal": ("non_centred", SCALE_PRIORS, COMMON + [("residual_sd", None)]),
    "student_t": ("non_centred", {**SCALE_PRIORS, "nu": EXTRA["nu"]}, COMMON + [("residual_sd", None), ("nu", None)]),
    "bernoulli": ("non_centred", LINK_PRIORS, COMMON),
    "binomial": ("centred", LINK_PRIORS, COMMON),
    "poisson": ("non_centred", COUNT_PRIORS, COMMON),
    "negative_binomial": ("non_centred", {**COUNT_PRIORS, "dispersion": EXTRA["dispersion"]},
                          COMMON + [("dispersion", None)]),
    "gamma": ("non_centred", {**LINK_PRIORS, "cv": EXTRA["cv"]}, COMMON + [("cv", None)]),
    "lognormal": ("non_centred", {**LINK_PRIORS, "log_sd": EXTRA["log_sd"]}, COMMON + [("log_sd", None)]),
    "beta_binomial": ("non_centred", {**LINK_PRIORS, "concentration": EXTRA["concentration"]},
                      COMMON + [("concentration", None)]),
    "zero_inflated_poisson": ("non_centred", {**COUNT_PRIORS, "zero_inflation": EXTRA["zero_inflation"]},
                              COMMON + [("zero_inflation", None)]),
    # scores 1..4: the first cut-point is 0, the other two (a vector parameter) are sums of positive gaps
    "ordinal": ("non_centred", {**LINK_PRIORS, **ORDINAL_GAPS},
                COMMON + [("cutpoints", "2|3"), ("cutpoints", "3|4")]),
}


def _plan(folder, family, parameterisation, priors, varying=("intercept",)):
    """Plan of a fixed design (8 groups x 5 rows, one numeric predictor) with placeholder outcomes.

    Every prior is set, so nothing in the plan depends on the placeholder outcome.
    """
    rng = np.random.default_rng(20261202)
    n = GROUPS * ROWS
    frame = pd.DataFrame({"g": np.repeat([f"g{j}" for j in range(GROUPS)], ROWS),
                          "x": np.round(rng.normal(size=n), 3), "trials": 10,
                          "y": rng.integers(1, 5, size=n) if family == "ordinal"
                          else rng.integers(0, 2, size=n) + (family in POSITIVE)})
    frame.to_csv(folder / "data.csv", index=False)
    outcome = {"column": "y", "family": family, **({"trials": "trials"} if family in TRIALS else {})}
    doc = {"format": "hierwork/1", "name": f"sbc_{family}", "data": "data.csv", "outcome": outcome,
           "predictors": ["x"], "priors": priors,
           "groups": {"g": {"column": "g", "varying": list(varying), "parameterisation": parameterisation}}}
    (folder / "spec.yaml").write_text(yaml.safe_dump(doc))
    return hierwork.check(folder / "spec.yaml").plan


def _prior_draws(plan, seed):
    """Parameters and outcomes drawn from the prior, ``N_REPLICATES`` of them."""
    with build_model(plan, centre=False):
        prior = pm.sample_prior_predictive(draws=N_REPLICATES, random_seed=seed)
    return prior.prior.isel(chain=0), prior.prior_predictive["y"].values[0]


def _value(dataset, name, index):
    """One scalar of a posterior or prior dataset (draws along the leading dimensions)."""
    var = dataset[name]
    if index is None:
        return var.values
    dims = [d for d in var.dims if d not in ("chain", "draw")]
    index = index if isinstance(index, tuple) else (index,)
    return var.sel(dict(zip(dims, index))).values


def _uniformity(ranks: dict) -> dict:
    """Chi-square p-value of the binned ranks (0..N_RANKS) of each parameter."""
    edges = np.linspace(0, N_RANKS + 1, N_BINS + 1)
    return {k: float(stats.chisquare(np.histogram(r, bins=edges)[0]).pvalue) for k, r in ranks.items()}


def _sbc(compile_model, fit_data, posterior_of, plan, checked, seed):
    """Run the replicates; returns ({parameter: p-value}, {parameter: control p-value}, divergences)."""
    import nutpie

    truth, ys = _prior_draws(plan, seed)
    compiled = nutpie.compile_pymc_model(compile_model)
    ranks = {k: [] for k in checked}
    control = {k: [] for k in checked}
    divergences = 0
    for i in range(N_REPLICATES):
        idata = nutpie.sample(compiled.with_data(**fit_data(ys[i])), seed=seed + i, **SETTINGS)
        divergences += int(idata.sample_stats["diverging"].sum())
        post = posterior_of(idata, ys[i], i).posterior.isel(chain=0, draw=slice(THIN - 1, None, THIN))
        for name, index in checked:
            draws, true = _value(post, name, index), _value(truth, name, index)
            ranks[(name, index)].append(int(np.sum(draws < true[i])))
            control[(name, index)].append(int(np.sum(draws < true[(i + 1) % N_REPLICATES])))
    return _uniformity(ranks), _uniformity(control), divergences


def _assert_calibrated(pvalues, control, divergences):
    level = FAMILY_WISE_LEVEL / len(pvalues)   # Bonferroni over the checked parameters
    print(f"divergent transitions over {N_REPLICATES} replicates: {divergences}")
    for k, p in pvalues.items():
        print(f"  {k}: p = {p:.3g}   (control, mismatched truth: p = {control[k]:.3g})")
    bad = {k: p for k, p in pvalues.items() if p < level}
    assert not bad, f"ranks not uniform at level {level:.2g}: {bad}"
    assert min(control.values()) < level, "the check cannot tell a mismatched truth from the right one"


def _plain_sbc(plan, checked, seed):
    return _sbc(build_model(plan), lambda y: {"y_data": y}, lambda idata, y, i: idata, plan, checked, seed)


@pytest.mark.parametrize("family", list(CASES))
def test_varying_intercept_calibrated(tmp_path, family):
    parameterisation, priors, checked = CASES[family]
    plan = _plan(tmp_path, family, parameterisation, priors)
    _assert_calibrated(*_plain_sbc(plan, checked, seed=1000 + 100 * list(CASES).index(family)))


def test_correlated_slopes_calibrated(tmp_path):
    priors = {**SCALE_PRIORS, "g.x.sd": {"half_normal": {"sigma": 0.5}}, "g.corr": {"lkj": {"eta": 2}}}
    plan = _plan(tmp_path, "normal", "non_centred", priors, varying=("intercept", "x"))
    checked = [("b", "intercept"), ("b", "x"), ("g__sd", "intercept"), ("g__sd", "x"),
               ("g__corr", ("intercept", "x")), ("g__effect", ("g0", "x")), ("g__effect", ("g1", "intercept")),
               ("residual_sd", None)]
    _assert_calibrated(*_plain_sbc(plan, checked, seed=3000))


def test_collapsed_normal_calibrated(tmp_path):
    """The collapsed path: group effects integrated out, then drawn from their conditionals.

    Its model sees the outcome only through per-group statistics, which are
    made shared variables here so one compiled model serves every replicate.
    """
    plan = _plan(tmp_path, "normal", "centred", SCALE_PRIORS)
    problem = collapsed.collapsed_problem(plan)
    leaf = problem.chain[0]
    swapped = ("xty", "yty", "centre")

    def statistics(y):
        s = cell_stats(y, plan.X, leaf.index, leaf.n_groups, plan.known_sd)  # no group predictors here
        return {name: getattr(s, name) for name in swapped}

    shared = {name: pytensor.shared(value, name=name) for name, value in statistics(plan.y).items()}
    model = collapsed.build_collapsed_model(plan, dataclasses.replace(
        problem, stats=dataclasses.replace(problem.stats, **shared)))

    def with_effects(idata, y, i):
        return collapsed.add_group_effects(idata, dataclasses.replace(plan, outcome=dataclasses.replace(plan.outcome, y=y)), seed=i)

    _assert_calibrated(*_sbc(model, statistics, with_effects, plan, CASES["normal"][2], seed=4000))
