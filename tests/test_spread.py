"""Varying residual spread (``groups.NAME.spread: varying``; hierwork/model/spread.py, results/spread.py).

Fast checks: the per-row residual SDs of the draws, the baselines against their
closed forms (a group's sample SD with n - 1; the pooled within-group SD with
n - J), the path decision and the default prior. Slow check: simulated per-group
SDs (known values) are recovered with their central intervals covering at about
the nominal rate (simulation recovery, common practice), and the gate, the
tables and ``predict`` carry the new parameters.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import hierwork
from conftest import write_spec
from hierwork.plan.families.base import OutcomeRows
from hierwork.results.draws import Draws, Rows

SPEC = """
format: hierwork/1
name: lines
data: lines.csv
outcome: {{column: width_mm{family}}}
{predictors}
groups:
  line: {{spread: varying}}
sampling: {{chains: 2, warmup: 300, draws: 300, seed: 3}}
gate: {{ess_bulk_min: 100, ess_tail_min: 100}}
"""
LINES, ROWS, TAU_LOG, SIGMA = 30, 20, 0.5, 1.0


def simulate(rng, lines=LINES, rows=ROWS, log_offsets=None):
    """Coating width per production line: own mean and own residual SD per line."""
    offsets = rng.normal(0, TAU_LOG, lines) if log_offsets is None else log_offsets
    means = 5 + rng.normal(0, 1, lines)
    frame = pd.DataFrame({"line": np.repeat([f"L{k:02d}" for k in range(lines)], rows),
                          "speed": rng.uniform(0, 4, lines * rows).round(3)})
    sd = SIGMA * np.exp(offsets)
    frame["width_mm"] = np.repeat(means, rows) + 0.5 * frame["speed"] + rng.normal(0, 1, len(frame)) * np.repeat(sd, rows)
    return frame, sd


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    folder = tmp_path_factory.mktemp("spread")
    frame, sd = simulate(np.random.default_rng(11))
    frame.to_csv(folder / "lines.csv", index=False)
    return folder, frame, sd


def spec_of(folder, predictors="predictors: [speed]", family=""):
    return write_spec(folder, SPEC.format(predictors=predictors, family=family))


def test_check_takes_the_per_row_model_and_says_why(data):
    report = hierwork.check(spec_of(data[0]))
    assert report.path == "plain" and "residual SD varies by line" in report.path_reason
    assert "residual SD: each group its own" in report.text()
    prior = report.plan.priors["line.spread.sd"]
    assert prior.default and prior.dist == "exponential"
    # median ln2 / lam: the documented 0.35 on the log scale
    assert np.log(2) / prior.params["lam"] == pytest.approx(0.35)
    assert report.to_dict()["factors"][0]["spread"] == "varying"


def test_baselines_are_the_closed_form_sds(data):
    from hierwork.results.spread import own_and_pooled_sd

    folder, frame, _ = data
    plan = hierwork.check(spec_of(folder, predictors="")).plan
    f = plan.factor("line")
    own, pooled = own_and_pooled_sd(plan, f)
    by_line = frame.groupby("line", sort=False)["width_mm"]
    np.testing.assert_allclose(own, by_line.std(ddof=1).loc[list(f.levels)].to_numpy(), rtol=1e-10)
    within = ((frame["width_mm"] - by_line.transform("mean")) ** 2).sum()
    assert pooled == pytest.approx(np.sqrt(within / (len(frame) - LINES)), rel=1e-10)


def test_draws_give_each_row_its_groups_residual_sd():
    draws = Draws(b=np.zeros((2, 1)), effects={"line": np.zeros((2, 3, 1))}, gammas={},
                  params={"residual_sd": np.array([1.0, 2.0])}, shape=(1, 2),
                  spreads={"line": np.log(np.array([[1.0, 2.0, 0.5], [1.0, 1.0, 3.0]]))})
    rows = Rows(np.ones((4, 1)), [("line", np.array([0, 1, 2, 2]), [0], None)], OutcomeRows(None))
    np.testing.assert_allclose(draws.family_params(rows)["residual_sd"], [[1, 2, 0.5, 0.5], [2, 2, 6, 6]])
    np.testing.assert_allclose(draws.family_params(rows, slice(1, 3))["residual_sd"], [[2, 0.5], [2, 6]])
    np.testing.assert_allclose(draws.subset(np.array([1])).family_params(rows)["residual_sd"], [[2, 2, 6, 6]])
    assert draws.family_params()["residual_sd"].shape == (2, 1)


@pytest.fixture(scope="module")
def run(data, tmp_path_factory):
    return hierwork.fit(spec_of(data[0]), out=tmp_path_factory.mktemp("fit") / "run")


@pytest.mark.slow
def test_group_sds_are_recovered_with_nominal_coverage(run, data):
    _, _, sd = data
    table = run.group_estimates
    spread = table[table["term"] == "spread"].set_index("group").loc[[f"L{k:02d}" for k in range(LINES)]]
    inside = (spread["lower"] <= sd) & (sd <= spread["upper"])
    # 94% intervals over 30 lines: 28.2 expected; fewer than 25 has probability below 1% (binomial)
    assert inside.sum() >= 25, inside.sum()
    # the posterior means track the truth better than the lines' own SDs do (partial pooling)
    assert np.mean((np.log(spread["partial_mean"]) - np.log(sd)) ** 2) < np.mean((np.log(spread["no_pooling"]) - np.log(sd)) ** 2)
    post = run.posterior.posterior
    lo, hi = np.quantile(post["line__spread_sd"].values, [0.03, 0.97])
    assert lo < TAU_LOG < hi
    assert ((spread["pooling_weight"] > 0) & (spread["pooling_weight"] < 1)).all()
    assert "line.spread.sd" in set(run.summary["parameter"])
    assert "spread" in set(run.pooling["term"])


@pytest.mark.slow
def test_the_gate_sees_the_spread_parameters(run):
    import arviz as az

    from hierwork.inference.gate import _worst

    post = run.posterior.posterior
    assert {"line__spread", "line__spread_sd", "line__spread_effect"} <= set(post.data_vars)
    worst_rhat = float(az.rhat(post[["line__spread"]])["line__spread"].max())
    assert _worst(post)["r_hat"][0] >= worst_rhat - 1e-12


@pytest.mark.slow
def test_predict_uses_each_lines_own_spread(run, data):
    _, frame, sd = data
    quiet, noisy = int(np.argmin(sd)), int(np.argmax(sd))
    new = pd.DataFrame({"line": [f"L{quiet:02d}", f"L{noisy:02d}", "new line"], "speed": 2.0})
    out = hierwork.predict(run, new)
    spread = run.group_estimates.query("term == 'spread'").set_index("group")["partial_mean"]
    # predictive SD of a known line: its residual SD plus the (small) uncertainty of its mean
    for row, line in enumerate(new["line"][:2]):
        assert out["pred_sd"][row] == pytest.approx(spread[line], rel=0.2)
    assert out["pred_sd"][0] < out["pred_sd"][1]
    assert out["group_status"].tolist() == ["known", "known", "new"]


@pytest.mark.slow
def test_pointwise_log_likelihood_with_varying_spreads_matches_pymc(tmp_path):
    """Per-row residual SDs of two nested factors (offsets add on the log scale), Student-t outcome.

    Reference: PyMC's own logp of the observed variable at a few draws (a general-purpose library).
    """
    import predictive_kit as kit
    from test_predictive import NESTED, _ours, _pymc_pointwise

    text = NESTED.replace("FAMILY", "student_t").replace("parameterisation: non_centred}",
                                                         "parameterisation: non_centred, spread: varying}")
    plan = hierwork.check(kit.write(tmp_path, text)).plan
    assert [f.spread for f in plan.factors] == ["varying", "varying"]
    ref, idata = _pymc_pointwise(plan)
    np.testing.assert_allclose(_ours(plan, idata), ref, rtol=0, atol=1e-8)
