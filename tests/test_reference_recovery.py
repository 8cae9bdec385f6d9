"""Recovery: data simulated from known parameters, nested and crossed.

A calibrated posterior covers the true values at the nominal rate of its
intervals (Cook, Gelman and Rubin 2006, JCGS 15, 675-692, on which simulation
based checks build). Each test simulates one data set with a fixed seed, fits
it, and counts how many true group effects fall inside their central 94%
and 50% posterior intervals; each count is compared with Binomial(k, level) by
an exact two-sided binomial test at level 0.001, so intervals that are too
narrow (94%) and too wide (50%: 100% coverage there is far from nominal) both fail. The group effects of one fit share
their hyperparameters, so coverage indicators are positively correlated and
the binomial spread understates the true one: the low level keeps the check
from failing by chance, while a systematic error (for instance effects of the
nested factor measured from the wrong parent, or intervals too narrow) still
fails it.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import hierwork

LEVELS = (0.94, 0.5)
ALPHA = 0.001


def _coverage(run, truth: dict[str, pd.Series]) -> list[tuple[float, int, int]]:
    """Per level: the number of true group offsets inside their central intervals, and of offsets."""
    post = run.posterior.posterior
    out = []
    for level in LEVELS:
        inside = total = 0
        for factor, values in truth.items():
            draws = post[f"{factor}__effect"].sel({f"{factor}__term": "intercept"})
            low = draws.quantile((1 - level) / 2, dim=("chain", "draw")).to_series()
            high = draws.quantile((1 + level) / 2, dim=("chain", "draw")).to_series()
            values = values.loc[low.index]
            inside += int(((low <= values) & (values <= high)).sum())
            total += len(values)
        out.append((level, inside, total))
    return out


def _fit(tmp_path, data: pd.DataFrame, groups_yaml: str, overrides=None):
    data.to_csv(tmp_path / "sim.csv", index=False)
    spec = tmp_path / "sim.yaml"
    spec.write_text(f"""format: hierwork/1
name: recovery
data: sim.csv
outcome: {{column: y, family: normal}}
predictors: [x]
groups:
{groups_yaml}
sampling: {{chains: 2, warmup: 500, draws: 1000, seed: 4}}
""", encoding="utf-8")
    return hierwork.fit(spec, out=tmp_path / "run", progress=False, overrides=overrides)


def _assert_nominal(coverage):
    for level, inside, total in coverage:
        p_value = stats.binomtest(inside, total, level).pvalue
        assert p_value > ALPHA, f"{inside} of {total} inside the {level:.0%} intervals (p = {p_value:.2g})"


@pytest.mark.slow
def test_nested_recovery(tmp_path):
    # 12 regions x 6 farms, farm labels 1..6 repeated in every region.
    rng = np.random.default_rng(1935)
    regions = [f"r{i}" for i in range(12)]
    region_effect = pd.Series(rng.normal(0, 1.0, 12), index=regions)
    farm_effect = {(r, f): rng.normal(0, 0.7) for r in regions for f in range(1, 7)}
    rows = [(r, f, rng.normal()) for (r, f) in farm_effect for _ in range(rng.integers(2, 9))]
    data = pd.DataFrame(rows, columns=["region", "farm", "x"])
    data["y"] = (10 + 0.5 * data["x"] + data["region"].map(region_effect)
                 + [farm_effect[(r, f)] for r, f in zip(data["region"], data["farm"])]
                 + rng.normal(0, 1.0, len(data)))
    run = _fit(tmp_path, data, "  region: {column: region}\n  farm: {column: farm, within: region}")
    # Farm effects are offsets from their own region's value; labels "region/farm".
    truth = {"region": region_effect,
             "farm": pd.Series({f"{r}/{f}": v for (r, f), v in farm_effect.items()})}
    _assert_nominal(_coverage(run, truth))
    assert run.passed, run.diagnostics


@pytest.mark.slow
def test_crossed_recovery(tmp_path):
    # 15 workers x 8 machines, every pair observed 1 to 3 times.
    rng = np.random.default_rng(1992)
    workers = pd.Series(rng.normal(0, 1.2, 15), index=[f"w{i}" for i in range(15)])
    machines = pd.Series(rng.normal(0, 0.8, 8), index=[f"m{i}" for i in range(8)])
    rows = [(w, m, rng.normal()) for w in workers.index for m in machines.index for _ in range(rng.integers(1, 4))]
    data = pd.DataFrame(rows, columns=["worker", "machine", "x"])
    data["y"] = (5 - 0.3 * data["x"] + data["worker"].map(workers) + data["machine"].map(machines)
                 + rng.normal(0, 1.0, len(data)))
    # Crossed intercepts trade off with the population intercept (a ridge the
    # sampler follows slowly): 2 x 1000 draws gave bulk ESS about 200 for
    # b[intercept], so run longer, as the gate's advice says.
    run = _fit(tmp_path, data, "  worker: {column: worker}\n  machine: {column: machine}",
               {"sampling.chains": 4, "sampling.draws": 1500})
    _assert_nominal(_coverage(run, {"worker": workers, "machine": machines}))
    assert run.passed, run.diagnostics
