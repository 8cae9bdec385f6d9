"""Prior sensitivity and post-stratification on a real data set with few groups (statistical tier).

Data: machines (Milliken and Johnson 1992, Analysis of Messy Data I, p. 285;
tests/data/SOURCES.md): 6 workers x 3 machines x 3 repeats, fitted as
a normal model of score on machine with intercepts varying by worker. Six workers leave the worker SD shaped by
its prior; 54 rows pin down the machine coefficients and the residual SD.

External checks:

* power-scaling against a refit: raising a ``normal(mu, sigma)`` prior to the
  power ``alpha`` gives ``normal(mu, sigma / sqrt(alpha))`` and an
  ``exponential(lam)`` prior ``exponential(alpha lam)`` (closed forms of the
  densities), so the posterior under priors scaled by ``alpha`` is that of a
  refit with those priors; the reweighted draws must match the refit within
  Monte Carlo error.
* post-stratification on the sample itself: for a normal model, the
  posterior mean of the fitted values satisfies Henderson's mixed-model
  equations, whose rows for the population terms say ``X' (y - fitted) = 0``
  (Henderson 1975, Biometrics 31:423; exact with a flat prior on the
  coefficients, and the default priors here are 15 to 17 units wide against
  standard errors near 1). With every row a cell of count 1, the estimate for
  the whole population and for each machine is therefore the sample mean of
  the scores.
* hand computation: a table of two cells is the count-weighted mean of the two
  cells' posterior draws, computed here from ``b`` and ``worker__effect``.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import hierwork
from hierwork.cli import main
from hierwork.pipeline import check, sample_posterior
from hierwork.results import sensitivity as S

from conftest import DATA

pytestmark = pytest.mark.slow  # fits models (MCMC)

SPEC = """format: hierwork/1
name: machines_sensitivity
data: {data}
outcome: {{column: score}}
predictors: [machine]
groups: {{worker: {{column: worker}}}}
{priors}sampling: {{chains: 2, draws: 1000, warmup: 500, seed: 17}}
"""
ALPHA = 2.0


def _scaled(prior, alpha: float) -> dict:
    """The prior raised to the power ``alpha``, as a spec entry (closed forms of the two densities)."""
    if prior.dist == "normal":
        return {"normal": {"mu": float(prior.params["mu"]), "sigma": float(prior.params["sigma"] / np.sqrt(alpha))}}
    assert prior.dist == "exponential", prior.dist
    return {"exponential": {"lam": float(prior.params["lam"] * alpha)}}


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    folder = tmp_path_factory.mktemp("machines_sens")
    spec = folder / "spec.yaml"
    spec.write_text(SPEC.format(data=DATA / "machines.csv", priors=""), encoding="utf-8")
    run = hierwork.fit(spec, out=folder / "run", progress=False)
    plan = check(folder / "run" / "spec.yaml").plan
    import yaml

    scaled = yaml.safe_dump({"priors": {k: _scaled(p, ALPHA) for k, p in plan.priors.items()}})
    refit_spec = folder / "refit.yaml"
    refit_spec.write_text(SPEC.format(data=DATA / "machines.csv", priors=scaled), encoding="utf-8")
    refit = sample_posterior(check(refit_spec), progress=False)
    return folder, run, plan, refit


def _mcse(x, weights=None) -> float:
    """Monte Carlo SE of a (weighted) mean, from the ESS of the draws (ArviZ) scaled by the weights' efficiency."""
    import arviz as az

    ess = float(az.ess(x.reshape(2, -1)))
    efficiency = 1.0 if weights is None else 1.0 / (len(x) * np.sum(weights ** 2))
    return float(np.std(x) / np.sqrt(ess * efficiency))


def test_sensitivity_csv_flags_the_worker_sd_only(fitted):
    _, run, _, _ = fitted
    table = run.sensitivity.set_index("parameter")
    assert list(run.sensitivity.columns) == list(S.COLUMNS)
    assert set(table.index) == {"intercept", "machine=B", "machine=C", "residual_sd", "worker.sd"}
    assert table.loc["worker.sd", "prior_sensitivity"] >= S.THRESHOLD
    assert table.loc["worker.sd", "diagnosis"] in (S.WEAK_LIKELIHOOD, S.CONFLICT)
    for name in ("machine=B", "machine=C", "residual_sd"):
        assert table.loc[name, "prior_sensitivity"] < S.THRESHOLD and table.loc[name, "diagnosis"] == S.NONE
        assert table.loc[name, "likelihood_sensitivity"] >= S.THRESHOLD  # the data inform them
    assert (table["pareto_k"] < S.k_limit(2000)).all()
    assert "How much the priors matter" in (run.path / "report.html").read_text(encoding="utf-8")


def test_reweighted_posterior_matches_refit_with_scaled_priors(fitted):
    _, run, plan, refit = fitted
    weights, k = S.power_weights(S.log_prior(run.posterior, plan), ALPHA)
    assert k < 0.5
    for name, base_draws, refit_draws in (
            ("worker.sd", run.posterior.posterior["worker__sd"].values.reshape(-1),
             refit.posterior["worker__sd"].values.reshape(-1)),
            ("intercept", run.posterior.posterior["b"].values[..., 0].reshape(-1),
             refit.posterior["b"].values[..., 0].reshape(-1))):
        mean, sd = S.weighted_moments(base_draws, weights)
        error = np.hypot(_mcse(base_draws, weights), _mcse(refit_draws))
        assert abs(mean - refit_draws.mean()) < 4 * error, (name, mean, refit_draws.mean(), error)
        # Variances: the Monte Carlo error of a mean of squared deviations, by the same rule.
        error = np.hypot(_mcse((base_draws - mean) ** 2, weights), _mcse((refit_draws - refit_draws.mean()) ** 2))
        assert abs(sd ** 2 - refit_draws.var()) < 4 * error, (name, sd ** 2, refit_draws.var(), error)
    # The worker SD really moved (a stronger exponential prior pulls it down), so the match is not vacuous.
    base = run.posterior.posterior["worker__sd"].values.reshape(-1)
    assert refit.posterior["worker__sd"].values.mean() < base.mean() - 4 * _mcse(base)


def test_sample_as_population_gives_the_sample_means(fitted):
    _, run, _, _ = fitted
    data = pd.read_csv(DATA / "machines.csv").assign(count=1)
    table = hierwork.poststratify(run, data, by=["machine", "worker"]).set_index(["by", "area"])
    draws = run.posterior.posterior
    mcse = float(np.std(draws["b"].values[..., 0]) / np.sqrt(2000))  # a bound: ESS here is above 1000
    assert abs(table.loc[("all", "all"), "mean"] - data["score"].mean()) < 5 * mcse
    for level, scores in data.groupby("machine")["score"]:
        assert abs(table.loc[("machine", level), "mean"] - scores.mean()) < 5 * mcse, level
    # A worker's cells average its fitted values: its intercept row plus the machine mix (all balanced).
    estimates = run.group_estimates.set_index("group")
    machine_shift = draws["b"].values[..., 1:].mean(axis=(0, 1)).sum() / 3
    for worker in estimates.index:
        assert table.loc[("worker", worker), "mean"] == pytest.approx(
            estimates.loc[worker, "outcome_mean"] + machine_shift, abs=1e-9)
    assert table.loc[("all", "all"), "count"] == len(data)


def test_two_cells_by_hand(fitted):
    _, run, _, _ = fitted
    post = run.posterior.posterior
    cells = pd.DataFrame({"worker": [1, 4], "machine": ["A", "C"], "units": [30, 10]})
    table = hierwork.poststratify(run, cells, count="units").set_index("area")
    workers = [str(v) for v in post["worker"].values]
    b, effect = post["b"].values.reshape(-1, 3), post["worker__effect"].values.reshape(-1, 6)
    first = b[:, 0] + effect[:, workers.index("1")]
    second = b[:, 0] + b[:, 2] + effect[:, workers.index("4")]
    theta = (30 * first + 10 * second) / 40
    assert table.loc["all", "mean"] == pytest.approx(theta.mean(), rel=1e-10)
    assert table.loc["all", "sd"] == pytest.approx(theta.std(ddof=1), rel=1e-10)
    assert table.loc["all", "lower"] == pytest.approx(np.quantile(theta, 0.03), rel=1e-10)


def test_unseen_worker_takes_the_population_spread(fitted):
    _, run, _, _ = fitted
    post = run.posterior.posterior
    cells = pd.DataFrame({"worker": ["new"], "machine": ["A"], "count": [5]})
    row = hierwork.poststratify(run, cells, seed=3).iloc[-1]
    b0, sd = post["b"].values[..., 0].reshape(-1), post["worker__sd"].values.reshape(-1)
    assert row["mean"] == pytest.approx(b0.mean(), abs=4 * np.sqrt(np.mean(sd ** 2) / 2000) + 0.1)
    assert row["sd"] == pytest.approx(np.sqrt(b0.var() + np.mean(sd ** 2)), rel=0.1)


def test_cli_writes_the_table(fitted, capsys):
    folder, run, _, _ = fitted
    population = folder / "population.csv"
    pd.DataFrame({"worker": [1, 2, 3, "new"], "machine": ["A", "B", "C", "A"],
                  "staff": [12, 30, 8, 20]}).to_csv(population, index=False)
    out = folder / "areas.csv"
    code = main(["poststratify", str(run.path), str(population), "--by", "machine", "--count", "staff",
                 "--out", str(out)])
    assert code == 0 and "3 areas" in capsys.readouterr().out
    table = pd.read_csv(out)
    assert list(table.columns) == ["by", "area", "count", "mean", "sd", "lower", "upper"]
    assert list(table["area"]) == ["A", "B", "C", "all"] and table["count"].iloc[-1] == 70


@pytest.mark.parametrize("rows, argv, message", [
    ({"worker": [1], "count": [3]}, [], "missing column 'machine'"),
    ({"worker": [1], "machine": ["D"], "count": [3]}, [], "'D'"),
    ({"worker": [1, 2], "machine": ["A", "B"], "count": [3, -1]}, [], "is negative"),
    ({"worker": [1], "machine": ["A"], "count": ["many"]}, [], "is not a number"),
    ({"worker": [1], "machine": ["A"], "n": [3]}, [], "no count column 'count'"),
    ({"worker": [1], "machine": ["A"], "count": [0]}, [], "sums to 0"),
    ({"worker": [1], "machine": ["A"], "count": [3]}, ["--by", "shift"], "neither a factor of the run"),
])
def test_bad_population_tables_exit_2_and_write_nothing(fitted, tmp_path, capsys, rows, argv, message):
    _, run, _, _ = fitted
    population = tmp_path / "population.csv"
    pd.DataFrame(rows).to_csv(population, index=False)
    out = tmp_path / "out.csv"
    code = main(["poststratify", str(run.path), str(population), "--out", str(out), *argv])
    err = capsys.readouterr().err.strip()
    assert code == 2 and message in err and len(err.splitlines()) == 1 and "Traceback" not in err, err
    assert not out.exists()


def test_not_a_run_folder_exits_2(tmp_path, capsys):
    (tmp_path / "population.csv").write_text("worker,machine,count\n1,A,3\n")
    code = main(["poststratify", str(tmp_path), str(tmp_path / "population.csv"), "--out", str(tmp_path / "o.csv")])
    assert code == 2 and "not a run folder" in capsys.readouterr().err
    assert not (tmp_path / "o.csv").exists()
