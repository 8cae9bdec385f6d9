"""Posterior and prior predictive checks (hierwork/results/predictive.py, prior_predictive.py).

* The numpy linear predictor and log densities against PyMC's own per-row log
  density of the same model (plain path), to 1e-8.
* Calibration: on data simulated from the model itself, the share of rows
  inside the central 50/80/94% posterior predictive intervals matches the
  nominal level (binomial test); rail (Devore 2000; tests/data/SOURCES.md) as a
  real-data sanity check.
* Prior predictive warnings for absurd priors.
"""
from __future__ import annotations

import json

import numpy as np
import pymc as pm
import pytest
from scipy import stats

import predictive_kit as kit
from hierwork.results import loo, predictive
from hierwork.pipeline import check
from hierwork.model.collapsed import add_group_effects
from hierwork.model.rowwise import build_model
from hierwork.results import prior_predictive
from hierwork.results.draws import distinct_rows, draws_of, pointwise_log_likelihood, rows_of

pytestmark = pytest.mark.slow  # every test here fits a model (MCMC)

NESTED = """format: hierwork/1
name: nested
data: DEMO/wheat.csv
outcome: {column: yield_t_ha, family: FAMILY}
predictors: [nitrogen_kg, {column: tillage, reference: conventional}]
groups:
  region: {column: region, parameterisation: non_centred}
  farm: {column: farm, within: region, predictors: [soil_carbon], varying: [intercept, nitrogen_kg],
         parameterisation: non_centred}
sampling: {path: plain}
"""
COUNTS = """format: hierwork/1
name: counts
data: DEMO/line_defects.csv
outcome: {column: defects, family: negative_binomial, exposure: hours_run}
groups: {line: {column: line}}
"""


def _pymc_pointwise(plan, draws=12):
    """PyMC's per-row log density of ``y`` at a few draws, and those draws."""
    model = build_model(plan)
    idata = pm.sample(draws=draws, tune=15, chains=1, model=model, random_seed=3, progressbar=False,
                      compute_convergence_checks=False, idata_kwargs={"include_transformed": True})
    fn = model.compile_fn(model.logp(vars=[model["y"]], sum=False)[0], inputs=model.value_vars,
                          on_unused_input="ignore", point_fn=False)
    post = idata.posterior
    ref = np.array([fn(*[post[v.name].values[0, d] for v in model.value_vars]) for d in range(draws)])
    return ref, idata


def _ours(plan, idata):
    draws = draws_of(idata.posterior, plan.factors, plan.family.parameters(plan.outcome))
    return pointwise_log_likelihood(draws, rows_of(plan), plan.family)


@pytest.mark.parametrize("text, family", [
    (NESTED, "normal"),        # nested factors, correlated slope, group-level predictor
    (NESTED, "student_t"),
    (COUNTS, None),            # negative binomial with exposure offset
], ids=["nested-normal", "nested-student_t", "negative_binomial-exposure"])
def test_pointwise_log_likelihood_matches_pymc(tmp_path, text, family):
    # Reference: PyMC's own logp of the observed variable (a general-purpose library).
    plan = check(kit.write(tmp_path, text.replace("FAMILY", family or ""))).plan
    ref, idata = _pymc_pointwise(plan)
    np.testing.assert_allclose(_ours(plan, idata), ref, rtol=0, atol=1e-8)


def test_pointwise_log_likelihood_matches_pymc_centred_with_predictors(tmp_path):
    plan = check(kit.write(tmp_path, NESTED.replace("FAMILY", "normal")
                           .replace("non_centred}", "centred}", 1))).plan
    assert plan.factors[0].parameterisation == "centred"
    ref, idata = _pymc_pointwise(plan)
    np.testing.assert_allclose(_ours(plan, idata), ref, rtol=0, atol=1e-8)


def test_binomial_log_likelihood_matches_pymc(tmp_path):
    plan, idata, _ = kit.cbpp(str(tmp_path))  # cbpp (Lesnoff et al. 2004), centred herds, no predictors
    ref, small = _pymc_pointwise(plan)
    np.testing.assert_allclose(_ours(plan, small), ref, rtol=0, atol=1e-8)
    assert idata.log_likelihood["y"].shape == (2, 300, plan.n)


SIMULATED = """format: hierwork/1
name: simulated
data: DATA/simulated.csv
outcome: {column: y}
groups: {site: {column: site}}
sampling: {seed: 9}
"""


def test_calibration_near_nominal_on_correct_model(tmp_path):
    # Data simulated from the model (mu 10, site SD 2, residual SD 3, 30 sites x 10 rows). In-sample
    # coverage exceeds nominal only by about p_loo / n (~0.1 / 300 per row); a two-sided binomial
    # test at level 0.001 per interval (scipy.stats.binomtest) then fails by chance rarely.
    kit.simulate_sites(tmp_path / "simulated.csv", seed=4, n_sites=30, per_site=10, mu=10, site_sd=2,
                       resid_sd=3, label="p{}")
    plan, idata = kit.sample(kit.write(tmp_path, SIMULATED.replace("DATA", str(tmp_path))))
    files = kit.augment(idata, plan, 9)
    report = json.loads(files["calibration.json"])
    for level in report["levels"]:
        inside = round(level["coverage"] * level["rows"])
        assert stats.binomtest(inside, level["rows"], level["nominal"]).pvalue > 0.001, level
        assert level["by_factor"]["site"]["groups"] == 30
    assert [lv["nominal"] for lv in report["levels"]] == list(predictive.CALIBRATION_LEVELS)
    assert idata.posterior_predictive["y"].shape == (2, 300, plan.n)
    np.testing.assert_array_equal(idata.observed_data["y"].values, plan.y)


@pytest.fixture(scope="module")
def rail(tmp_path_factory):
    return kit.sample(kit.write(tmp_path_factory.mktemp("rail"), kit.RAIL))


def test_rail_calibration_sanity(rail):
    # rail (Devore 2000, Example 10.10): 18 rows; sanity only (common practice): the 94% intervals
    # hold most rows and the 50% intervals neither none nor all.
    plan, idata = rail
    report = json.loads(kit.augment(idata.copy(), plan, 1)["calibration.json"])
    cover = {lv["nominal"]: lv["coverage"] for lv in report["levels"]}
    assert cover[0.94] >= 0.8 and 0.2 <= cover[0.5] <= 0.9


def test_over_budget_thins_and_falls_back_to_group_loo(rail, monkeypatch):
    plan, idata = rail
    idata = add_group_effects(idata.copy(), plan, 2, group_log_likelihood=True)
    monkeypatch.setattr(predictive, "MAX_CELLS", 2000)  # 600 draws x 18 rows > 2000
    monkeypatch.setattr(loo, "LOO_CELLS", 2000)  # 600 draws x 18 distinct rows > 2000
    files = kit.augment(idata, plan, 1)
    assert idata.posterior_predictive.attrs["thin"] == 6
    assert idata.posterior_predictive["y"].shape == (2, 50, plan.n)
    assert "log_likelihood" not in idata.groups() or "y" not in idata.log_likelihood
    rows = files["predictive_rows.csv"]
    assert len(rows) == plan.n and {"pred_mean", "lower_0.94", "upper_0.94"} <= set(rows.columns)
    report = json.loads(files["loo.json"])
    assert report["unit"].startswith("rail") and report["models"]["partial_pooling"]["n"] == 6


def test_prior_predictive_flags_absurd_priors(tmp_path):
    # Thresholds are common practice (module constants, README "Prior predictive check"); a
    # normal(0, 1e5) intercept on travel times of 26-100 ns is absurd, priors on the data's scale
    # (intercept within about 40 ns of the middle, spreads of a few tens of ns) are not.
    fine = check(kit.write(tmp_path, kit.RAIL + "priors: {intercept: {normal: {mu: 60, sigma: 15}}, "
                           "rail.sd: {half_normal: {sigma: 20}}, residual_sd: {half_normal: {sigma: 10}}}\n")).plan
    summary = prior_predictive.prior_predictive(fine, 1, draws=200)
    assert summary["warnings"] == [] and summary["passed"], summary["checks"]
    assert "every check passed" in prior_predictive.prior_predictive_text(fine, 1, draws=200)
    wide = check(kit.write(tmp_path, kit.RAIL + "priors: {intercept: {normal: {mu: 0, sigma: 100000}}}\n")).plan
    text = prior_predictive.prior_predictive_text(wide, 1, draws=200)
    assert "the priors imply implausible values" in text and "every check passed" not in text
    logit = check(kit.write(tmp_path, kit.CBPP + "priors: {intercept: {normal: {mu: 0, sigma: 20}}}\n")).plan
    summary = prior_predictive.prior_predictive(logit, 1, draws=200)
    assert summary["share_probability_extreme"] > prior_predictive.EXTREME_P_SHARE
    assert any("below 1% or above 99%" in w for w in summary["warnings"])


def test_prior_predictive_fails_far_negative_values_of_a_positive_outcome(tmp_path):
    # The case of issue 13: a quarter of simulated values far below an outcome that is never negative
    # (rail travel times 26-100 ns; an intercept prior of sd 150 ns puts about a third below 0, most of
    # them beyond the observed range by more than its width). Formerly called "plausible" because
    # fewer than 5% lay ten ranges away.
    plan = check(kit.write(tmp_path, kit.RAIL + "priors: {intercept: {normal: {mu: 60, sigma: 150}}, "
                           "rail.sd: {half_normal: {sigma: 20}}, residual_sd: {half_normal: {sigma: 10}}}\n")).plan
    summary = prior_predictive.prior_predictive(plan, 1, draws=200)
    checks = {c["name"]: c for c in summary["checks"]}
    assert summary["share_far_outside"] > prior_predictive.FAR_SHARE and not checks["far_outside"]["passed"]
    assert summary["share_negative"] > prior_predictive.NEGATIVE_SHARE and not checks["negative"]["passed"]
    assert not summary["passed"] and len(summary["warnings"]) == 2


def test_prior_predictive_fails_a_third_of_probabilities_at_the_edges(tmp_path):
    # The other case of issue 13: about a third of row probabilities below 1% or above 99% was
    # formerly under the 50% limit. An intercept of sd 4 on the logit scale (CBPP, 15 herds) puts
    # roughly that share at the edges.
    plan = check(kit.write(tmp_path, kit.CBPP + "priors: {intercept: {normal: {mu: -2, sigma: 4}}}\n")).plan
    summary = prior_predictive.prior_predictive(plan, 1, draws=200)
    assert 0.2 < summary["share_probability_extreme"] < 0.5
    assert not summary["passed"] and "every check passed" not in prior_predictive.prior_predictive_text(plan, 1, 200)


def test_over_work_budget_summaries_use_thinned_draws(rail, monkeypatch):
    plan, idata = rail
    monkeypatch.setattr(predictive, "SUMMARY_CELLS", 18 * 150)  # 600 draws x 6 distinct rows > 2,700
    monkeypatch.setattr(predictive, "MAX_CELLS", 18 * 40)
    idata = idata.copy()
    files = kit.augment(idata, plan, 1)
    per_chain = idata.posterior.sizes["draw"]
    keys = distinct_rows(rows_of(plan), outcome=False)  # rows of one rail share their predictive distribution
    assert keys.rows.n == 6
    step = predictive.summary_thin(2 * per_chain, per_chain, keys.rows.n)
    report = json.loads(files["calibration.json"])
    assert report["draws_used"] == 2 * len(range(0, per_chain, step)) >= predictive.MIN_SUMMARY_DRAWS
    thin = idata.posterior_predictive.attrs["thin"]
    assert thin == -(-2 * per_chain * plan.n // predictive.MAX_CELLS)
    assert idata.posterior_predictive["y"].shape == (2, len(range(0, per_chain, thin)), plan.n)
    cover = {lv["nominal"]: lv["coverage"] for lv in report["levels"]}
    assert cover[0.94] >= 0.8 and 0.2 <= cover[0.5] <= 0.9


def test_type6_intervals_hold_nominal_coverage_with_few_draws():
    # Closed form (order statistics of exchangeable draws): a new draw falls between the i-th and
    # j-th of m draws with probability (j - i) / (m + 1). Type-6 bounds at 3% and 97% of m = 100
    # draws sit at positions 3.03 and 97.97, so coverage is about 94.9/101 = 0.940; R's default
    # type 7 (positions 3.97, 97.03) would give about 0.921.
    rng = np.random.default_rng(11)
    reps, new = rng.standard_normal((100, 200_000)), rng.standard_normal(200_000)
    lo, hi = np.quantile(reps, [0.03, 0.97], axis=0, method="weibull")
    assert abs(np.mean((new >= lo) & (new <= hi)) - 94.94 / 101) < 0.003
