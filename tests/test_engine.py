"""The engine choice: gradient work per path, and the engine predicted to sample fastest.

The work counts are checked against their closed forms on invented crop-trial
data (rows x terms on the per-row path; cells x terms^2 where a cell of normal
sufficient statistics is a quadratic form). The costs per engine are measured
constants (benchmarks/RESULTS.md, "Engine choice"); the tests check what the
rule does with them, not their values.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import hierwork
from hierwork.model import paths


def _check(tmp_path, family="normal", groups=("farm",), n_rows=120, path="auto", chains=2, cores=None):
    rng = np.random.default_rng(7)
    frame = pd.DataFrame({g: [f"{g[0]}{k}" for k in rng.integers(0, 6 + 3 * i, n_rows)]
                          for i, g in enumerate(groups)})
    frame["rain_mm"] = rng.gamma(3.0, 10.0, n_rows).round(5)
    frame["y"] = rng.poisson(3.0, n_rows) if family == "poisson" else rng.normal(40.0, 5.0, n_rows).round(2)
    frame.to_csv(tmp_path / "plots.csv", index=False)
    groups_yaml = ", ".join(f"{g}: {{}}" for g in groups)
    cores_yaml = f", cores: {cores}" if cores else ""
    (tmp_path / "spec.yaml").write_text(f"""format: hierwork/1
name: engine
data: plots.csv
outcome: {{column: y, family: {family}}}
predictors: [rain_mm]
groups: {{{groups_yaml}}}
sampling: {{path: {path}, chains: {chains}, warmup: 500, draws: 700{cores_yaml}}}
""", encoding="utf-8")
    return hierwork.check(tmp_path / "spec.yaml")


def test_plain_path_work_is_rows_times_terms_plus_the_sampled_parameters(tmp_path):
    report = _check(tmp_path, family="poisson")  # numeric predictor: no two rows alike, per row
    plan = report.plan
    assert report.path == "plain"
    p, groups = plan.X.shape[1], plan.factors[0].n_groups
    # closed form: n rows x (2 columns + 1 varying intercept); intercept, slope and one effect per group
    assert paths.sampled_dimension(plan, "plain") == p + groups
    assert paths.gradient_work(plan, "plain") == plan.n * (p + 1) + p + groups


def test_normal_paths_work_is_cells_times_terms_squared(tmp_path):
    report = _check(tmp_path, groups=("farm", "variety"))
    plan = report.plan
    assert report.path == "semi_collapsed"
    farm, variety = plan.factors
    cells = len(set(zip(farm.index, variety.index)))  # closed form: the crossed pairs present
    r = plan.X.shape[1] + 2
    dim = plan.X.shape[1] + farm.n_groups + variety.n_groups
    assert paths.gradient_work(plan, "reduced") == cells * r * r + dim
    # semi-collapsed: the factor with most groups is integrated, so it leaves the sampled dimension
    big = max(plan.factors, key=lambda f: f.n_groups)
    assert paths.sampled_dimension(plan, "semi_collapsed") == dim - big.n_groups
    assert paths.gradient_work(plan, "semi_collapsed") == (int(cells * r * r * paths.PATH_SPEED["semi_collapsed"])
                                                          + dim - big.n_groups)
    # collapsed (one factor): the groups are the cells, nothing but the coefficients sampled
    assert paths.sampled_dimension(plan, "collapsed") == plan.X.shape[1]


def test_a_requested_engine_is_kept():
    assert paths.choose_engine("pymc", 10**12, 10**5) == ("pymc", "set in the spec or on the command line")
    assert paths.choose_engine("nutpie", 1, 1) == ("nutpie", "set in the spec or on the command line")


def test_small_problems_get_pymc_and_large_ones_nutpie(tmp_path):
    # a one-factor collapsed model of 120 rows: compile dominates; 73,000 crossed cells: steps dominate
    small = _check(tmp_path)
    assert small.path == "collapsed" and small.engine == "pymc"
    assert paths.choose_engine("auto", 1_800_000, 4_000)[0] == "nutpie"
    # one crossover in work at fixed dimension: the predicted time grows faster on the slower gradient
    picks = [paths.choose_engine("auto", w, 50)[0] for w in np.geomspace(10, 1e8, 60).astype(int)]
    assert picks[0] != picks[-1] and sum(a != b for a, b in zip(picks, picks[1:])) == 1


def test_the_reason_states_both_predictions_and_the_steps():
    engine, reason = paths.choose_engine("auto", 2_000_000, 4_000, iterations=2_000, rounds=1)
    steps = 2_000 * paths.leapfrog_steps(4_000)
    secs = {e: c.seconds(2_000_000, steps) for e, c in paths.ENGINE_COSTS.items()}
    assert engine == min(secs, key=secs.get)
    other = "pymc" if engine == "nutpie" else "nutpie"
    assert reason == (f"predicted sampling {secs[engine] / 60:.0f} min against {secs[other] / 60:.0f} min on {other}, "
                      f"compile included ({steps / 1e3:,.0f}k leapfrog steps per core, gradient work 2.0M)")


def test_chains_beyond_the_cores_run_in_rounds(tmp_path):
    report = _check(tmp_path, chains=4, cores=2)
    load = paths.engine_load(report.plan, report.path)
    assert load["rounds"] == 2 and load["iterations"] == 1_200
    one_round = paths.choose_engine("auto", load["work"], load["dimension"], load["iterations"], 1)[1]
    assert one_round != report.engine_reason  # twice the steps: a different prediction


def test_check_prints_the_engine_and_its_reason(tmp_path):
    report = _check(tmp_path)
    text = report.text()
    assert report.engine in ("pymc", "nutpie")
    assert "predicted sampling" in report.engine_reason and report.engine_reason in text
    assert report.to_dict()["engine_reason"] == report.engine_reason


@pytest.mark.parametrize("steps", [1.0, 1e3, 1e6])
def test_predicted_seconds_are_compile_plus_steps_times_step_cost(steps):
    cost = paths.EngineCost(compile_s=2.0, step_s=1e-4, work_s=1e-8)
    assert cost.seconds(10_000, steps) == pytest.approx(2.0 + steps * (1e-4 + 1e-4))
