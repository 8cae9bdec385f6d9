"""The outcome's scale, where groups stand, contrasts, pooling weights and predict, on real fits.

Checks:

* ``outcome_*``, ``p_above_population``, ``p_beyond_target``, ranks, ``p_top``,
  ``p_bottom`` and ``contrasts.csv`` equal the same quantities computed here,
  independently, from the draws in ``posterior.nc`` (the inverse logit and exp
  applied draw by draw; ranks by ``scipy.stats.rankdata``), on a binomial and
  a Poisson example;
* for the largest group the expected outcome lies within one standard error of
  the group's raw rate (``sqrt(p (1 - p) / n)`` for a share; ``sqrt(events) /
  exposure`` for a Poisson rate): with that much data the estimate is its own;
* against the truth of the simulation: groups found beyond the target are
  truly beyond it and the clearly beyond ones are all found; the rank intervals
  cover the true ranks at their nominal rate (binomial test at level 0.01, as
  in tests/test_recovery.py);
* on every demo run: ``pooling_weight`` lies in [0, 1]; it falls as groups grow
  (strictly for the normal wheat model, where ``v_j = sigma^2 / n_j``); and
  ``hierwork predict`` works without ``--seed``, also on a run whose spec has a
  ``sampling`` block without a seed (the seed then comes from provenance.json).

The examples are simulated here (invented production lines and workshops).
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import yaml
from scipy import special, stats

import hierwork
from hierwork.cli import main
from hierwork.pipeline import demo_specs_folder, run_demo

pytestmark = pytest.mark.slow  # every test here fits models (MCMC)

SMALL = {"sampling.chains": 2, "sampling.warmup": 400, "sampling.draws": 500}
INTERVAL = 0.94
LO, HI = (1 - INTERVAL) / 2, 1 - (1 - INTERVAL) / 2


def _fit(folder, frame, spec: dict):
    frame.to_csv(folder / "data.csv", index=False)
    spec = {"format": "hierwork/1", "name": folder.name, "data": "data.csv", **spec}
    (folder / "spec.yaml").write_text(yaml.safe_dump(spec, sort_keys=False))
    return hierwork.fit(folder / "spec.yaml", out=folder / "run", overrides=SMALL, progress=False)


# --------------------------------------------------------------------------- simulated examples

TRUE_LOGIT_MEAN, TRUE_LOGIT_SD, TARGET = -2.4, 0.6, 0.10


@pytest.fixture(scope="module")
def lines(tmp_path_factory):
    """Defective items out of items inspected on 30 production lines of very unequal output."""
    rng = np.random.default_rng(2024)
    J = 30
    inspected = np.geomspace(40, 8000, J).round().astype(int)
    true_p = special.expit(TRUE_LOGIT_MEAN + rng.normal(0, TRUE_LOGIT_SD, J))
    batches = rng.integers(2, 9, J)
    rows = []
    for j in range(J):
        sizes = rng.multinomial(inspected[j] - batches[j], np.ones(batches[j]) / batches[j]) + 1
        for size in sizes:
            rows.append({"line": f"L{j:02d}", "inspected": int(size), "defective": int(rng.binomial(size, true_p[j]))})
    frame = pd.DataFrame(rows)
    large = inspected >= 1000  # the contrast: the truly highest and lowest of the large lines
    top = f"L{np.flatnonzero(large)[np.argmax(true_p[large])]:02d}"
    bottom = f"L{np.flatnonzero(large)[np.argmin(true_p[large])]:02d}"
    run = _fit(tmp_path_factory.mktemp("lines"), frame, {
        "outcome": {"column": "defective", "family": "binomial", "trials": "inspected"},
        "groups": {"line": {"column": "line"}},
        "estimates": {"target": {"value": TARGET, "direction": "above"}, "rank_k": 5,
                      "contrasts": [{"factor": "line", "groups": [top, bottom]}]}})
    truth = pd.Series(true_p, index=[f"L{j:02d}" for j in range(J)])
    return run, frame, truth


@pytest.fixture(scope="module")
def workshops(tmp_path_factory):
    """Breakdowns over machine hours in 15 workshops; rates per 1,000 hours."""
    rng = np.random.default_rng(77)
    J = 15
    true_rate = np.exp(np.log(0.004) + rng.normal(0, 0.5, J))  # per hour
    rows = []
    for j in range(J):
        for _ in range(int(rng.integers(3, 25))):
            hours = float(rng.uniform(50, 400) * (1 + 20 * (j == J - 1)))  # the last workshop runs far more
            rows.append({"workshop": f"W{j:02d}", "hours": round(hours, 1),
                         "breakdowns": int(rng.poisson(true_rate[j] * hours))})
    frame = pd.DataFrame(rows)
    run = _fit(tmp_path_factory.mktemp("workshops"), frame, {
        "outcome": {"column": "breakdowns", "family": "poisson", "exposure": "hours"},
        "groups": {"workshop": {"column": "workshop"}},
        "estimates": {"rate_per": 1000, "target": {"value": 3.0, "direction": "below"},
                      "contrasts": [{"factor": "workshop", "groups": ["W00", "W01"]}]}})
    return run, frame, pd.Series(true_rate * 1000, index=[f"W{j:02d}" for j in range(J)])


def _draws(run, factor: str, inverse, scale: float) -> tuple[np.ndarray, np.ndarray, list]:
    """Per-draw expected outcome of every group and of the population, from posterior.nc alone."""
    post = run.posterior.posterior
    eta = (post["b"].sel(term="intercept") + post[f"{factor}__effect"].sel({f"{factor}__term": "intercept"}))
    eta = eta.transpose("chain", "draw", factor)
    groups = [str(g) for g in eta[factor].values]
    flat = eta.values.reshape(-1, len(groups))
    return inverse(flat) * scale, inverse(post["b"].sel(term="intercept").values.ravel()) * scale, groups


@pytest.mark.parametrize("case, factor, inverse, scale", [
    ("lines", "line", special.expit, 1.0), ("workshops", "workshop", np.exp, 1000.0)])
def test_tables_equal_the_draws_of_posterior_nc(case, factor, inverse, scale, request):
    run, _, _ = request.getfixturevalue(case)
    values, population, groups = _draws(run, factor, inverse, scale)
    table = run.group_estimates.set_index("group").loc[groups]
    np.testing.assert_allclose(table["outcome_mean"], values.mean(axis=0), rtol=1e-10)
    np.testing.assert_allclose(table["outcome_lower"], np.quantile(values, LO, axis=0), rtol=1e-10)
    np.testing.assert_allclose(table["outcome_upper"], np.quantile(values, HI, axis=0), rtol=1e-10)
    # The mean of the transformed draws, not the transform of the mean (they differ for a curved link).
    link_mean = table["partial_mean"].to_numpy()
    assert np.all(np.abs(inverse(link_mean) * scale - table["outcome_mean"].to_numpy()) > 0)
    np.testing.assert_allclose(table["p_above_population"], (values > population[:, None]).mean(axis=0))
    target = run.plan["estimands"]["target"]
    beyond = values > target["value"] if target["direction"] == "above" else values < target["value"]
    np.testing.assert_allclose(table["p_beyond_target"], beyond.mean(axis=0))
    ranks = stats.rankdata(-values, axis=1)
    k = run.plan["estimands"]["rank_k"]
    np.testing.assert_array_equal(table["rank_median"], np.quantile(ranks, 0.5, axis=0, method="inverted_cdf"))
    np.testing.assert_array_equal(table["rank_lower"], np.quantile(ranks, LO, axis=0, method="inverted_cdf"))
    np.testing.assert_array_equal(table["rank_upper"], np.quantile(ranks, HI, axis=0, method="inverted_cdf"))
    np.testing.assert_allclose(table["p_top"], (ranks <= k).mean(axis=0))
    np.testing.assert_allclose(table["p_bottom"], (ranks > len(groups) - k).mean(axis=0))
    # summary.csv: the population on the outcome's scale.
    summary = run.summary.set_index("parameter").loc["outcome"]
    np.testing.assert_allclose(summary["mean"], population.mean(), rtol=1e-10)
    # contrasts.csv: A - B draw by draw.
    contrast = run.contrasts.iloc[0]
    diff = values[:, groups.index(contrast["group_a"])] - values[:, groups.index(contrast["group_b"])]
    np.testing.assert_allclose([contrast["difference"], contrast["difference_sd"], contrast["lower"],
                                contrast["upper"], contrast["p_positive"]],
                               [diff.mean(), diff.std(ddof=1), np.quantile(diff, LO), np.quantile(diff, HI),
                                (diff > 0).mean()], rtol=1e-10)


def test_largest_line_is_within_a_standard_error_of_its_raw_share(lines):
    run, frame, _ = lines
    totals = frame.groupby("line")[["defective", "inspected"]].sum()
    largest = totals["inspected"].idxmax()
    raw = totals.loc[largest, "defective"] / totals.loc[largest, "inspected"]
    se = np.sqrt(raw * (1 - raw) / totals.loc[largest, "inspected"])  # binomial standard error of a share
    row = run.group_estimates.set_index("group").loc[largest]
    assert row["trials"] == totals.loc[largest, "inspected"] and row["events"] == totals.loc[largest, "defective"]
    assert abs(row["outcome_mean"] - raw) < se, (row["outcome_mean"], raw, se)
    np.testing.assert_allclose(row["no_pooling_outcome"], raw, rtol=1e-8)  # no predictors: the raw share


def test_largest_workshop_is_within_a_standard_error_of_its_raw_rate(workshops):
    run, frame, _ = workshops
    totals = frame.groupby("workshop")[["breakdowns", "hours"]].sum()
    largest = totals["hours"].idxmax()
    raw = 1000 * totals.loc[largest, "breakdowns"] / totals.loc[largest, "hours"]
    se = 1000 * np.sqrt(totals.loc[largest, "breakdowns"]) / totals.loc[largest, "hours"]  # Poisson
    row = run.group_estimates.set_index("group").loc[largest]
    np.testing.assert_allclose(row["exposure"], totals.loc[largest, "hours"])
    assert abs(row["outcome_mean"] - raw) < se, (row["outcome_mean"], raw, se)
    assert run.plan["estimands"]["label"] == "breakdowns per 1,000 hours"


def test_groups_beyond_the_target_are_found(lines):
    run, _, truth = lines
    table = run.group_estimates.set_index("group").loc[truth.index]
    flagged = table.index[table["p_beyond_target"] > 0.9]
    # Every flagged line is truly above the target (at probability 0.9 a false flag is possible, not likely).
    assert len(flagged) >= 2 and (truth[flagged] > TARGET).all(), (list(flagged), truth[flagged])
    # Lines clearly above the target with a lot of data are all found.
    clear = truth.index[(truth > 1.3 * TARGET) & (table["trials"] >= 500)]
    assert len(clear) and set(clear) <= set(flagged), (list(clear), list(flagged))
    # And lines clearly below are not.
    assert not set(truth.index[truth < 0.7 * TARGET]) & set(flagged)


def test_rank_intervals_cover_the_true_ranks(lines, workshops):
    inside = []
    for (run, _, truth) in (lines, workshops):
        table = run.group_estimates.set_index("group").loc[truth.index]
        true_rank = truth.rank(ascending=False)
        inside += list((table["rank_lower"] <= true_rank) & (true_rank <= table["rank_upper"]))
    # Two-sided binomial test against the nominal 94% at level 0.01 (as tests/test_recovery.py).
    assert stats.binomtest(int(sum(inside)), len(inside), INTERVAL).pvalue >= 0.01, (sum(inside), len(inside))


def test_contrast_of_the_truly_highest_and_lowest_large_line(lines):
    run, frame, truth = lines
    contrast = run.contrasts.iloc[0]
    large = truth[frame.groupby("line")["inspected"].sum().loc[truth.index] >= 1000]
    assert (contrast["group_a"], contrast["group_b"]) == (large.idxmax(), large.idxmin())
    assert contrast["lower"] <= large.max() - large.min() <= contrast["upper"]
    assert contrast["p_positive"] > 0.99


def test_binomial_report_leads_with_the_outcome_scale(lines):
    from test_report_fixture import Page

    run, _, _ = lines
    html = (run.path / "report.html").read_text()
    page = Page(html)
    ids = [a.get("id") for t, a, _ in page.elements if t == "section"]
    assert ids[:4] == ["verdict", "standout", "estimates", "pooling"]
    standout = page.find("section", id="standout")[0][2]
    table = run.group_estimates
    beyond = table[table["p_beyond_target"] > 0.9]
    assert f"{len(beyond)} of 30 groups are above the target of 10% with probability above 0.9" in standout
    population = run.summary.set_index("parameter").loc["outcome", "mean"]
    assert f"Population value (a typical group): {100 * population:.3g}%" in standout
    assert "probability that" in standout and "is higher" in standout  # the contrast
    # A group is named as different exactly when the table's P(above population) says so at the run's level.
    level = run.interval
    lines_ = table[table["term"] == "intercept"]
    away = ((lines_["p_above_population"] > 1 - (1 - level) / 2) | (lines_["p_above_population"] < (1 - level) / 2))
    if away.any():
        assert f"{int(away.sum())} of 30 groups differ from the population value" in standout
        below = lines_[lines_["p_above_population"] < (1 - level) / 2].sort_values("outcome_mean")
        if len(below):  # named from the farthest: the lowest first
            assert f"below it: {below['group'].iloc[0]} (" in standout
    else:
        assert "no group differs clearly from the population value" in standout
    # The link scale is one click away.
    details = page.find("details")
    assert len(details) == 1 and "log-odds" in details[0][2] and "open" not in details[0][1]
    # Every figure of the page is also in figures/ as SVG and PNG, with the same SVG.
    figures = [a["id"] for t, a, _ in page.elements if t == "figure"]
    assert {"ranked-line-intercept", "funnel-line", "pooling-line-intercept"} <= set(figures)
    for key in figures:
        svg = (run.path / "figures" / f"{key}.svg").read_text()
        img = page.find("figure", id=key)
        assert svg and img and (run.path / "figures" / f"{key}.png").read_bytes()[:4] == b"\x89PNG"
    summary = (run.path / "summary.md").read_text()
    assert summary.index("## What stands out") < summary.index("## Group estimates") < summary.index("<details>")


# --------------------------------------------------------------------------- every demo run

@pytest.fixture(scope="module")
def demo_runs(tmp_path_factory):
    # Bounds and predict on every demo spec need draws, not convergence: the shortest runs that sample.
    # The bounds and the fall of the pooling weight with group size hold in every draw (wheat) or for
    # the posterior mean of each depot's share (depot_delays), so 2 x 100 draws after 100 of warmup
    # suffice.
    return run_demo(tmp_path_factory.mktemp("demo"), overrides={**SMALL, "sampling.warmup": 100,
                                                                 "sampling.draws": 100})


def test_every_demo_spec_is_fitted(demo_runs):
    assert sorted(demo_runs) == sorted(p.stem for p in demo_specs_folder().glob("*.yaml"))


def test_pooling_weight_is_bounded_on_every_demo_run(demo_runs):
    for name, run in demo_runs.items():
        weight = run.group_estimates["pooling_weight"]
        assert weight.notna().all() and weight.between(0, 1).all(), (name, weight.describe())


def test_pooling_weight_falls_as_groups_grow(demo_runs):
    # wheat: one factor, normal outcome, v_j = sigma^2 / n_j in every draw, so the weight falls strictly with n_j.
    farms = demo_runs["wheat"].group_estimates.sort_values("rows")
    by_size = farms.groupby("rows")["pooling_weight"].agg(["min", "max"])
    assert (by_size["max"] - by_size["min"] < 1e-12).all()          # equal sizes, equal weights
    assert (np.diff(by_size["min"].to_numpy()) < 0).all()           # larger groups, smaller weights
    # depot_delays (binomial): v_j = 1 / sum n p (1 - p) depends on the group's share too; the
    # weight still falls with the trials, almost in rank order.
    depots = demo_runs["depot_delays"].group_estimates
    assert stats.spearmanr(depots["trials"], depots["pooling_weight"]).statistic < -0.8


def _new_rows(run) -> pd.DataFrame:
    """Five fitted rows of the run's data, plus one row in groups never seen."""
    data = pd.read_csv(run.spec["data"])
    rows = data.head(5).copy()
    unseen = data.head(1).copy()
    for factor in run.plan["factors"]:
        unseen[factor["column"]] = "never_seen"
    return pd.concat([rows, unseen], ignore_index=True)


def test_predict_works_on_every_demo_run_without_seed(demo_runs, tmp_path):
    for name, run in demo_runs.items():
        new = tmp_path / f"{name}.csv"
        _new_rows(run).to_csv(new, index=False)
        out = tmp_path / f"{name}_pred.csv"
        assert main(["predict", str(run.path), str(new), "--out", str(out)]) == 0, name
        table = pd.read_csv(out)
        assert table[["outcome_mean", "outcome_lower", "outcome_upper"]].notna().all().all()
        assert (table["outcome_lower"] <= table["outcome_mean"]).all() and (
            table["outcome_mean"] <= table["outcome_upper"]).all()
        if run.plan["estimands"]["kind"] == "probability":
            assert table["outcome_upper"].between(0, 1).all()


def test_predict_without_a_seed_in_the_spec_takes_it_from_provenance(tmp_path, capsys):
    spec = yaml.safe_load((demo_specs_folder() / "depot_delays.yaml").read_text())
    spec["data"] = str((demo_specs_folder() / spec["data"]).resolve())
    spec["sampling"] = {"warmup": 300, "draws": 300}         # a sampling block without a seed
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump(spec))
    out = tmp_path / "run"
    assert main(["fit", str(tmp_path / "spec.yaml"), "--out", str(out), "--chains", "2", "--quiet"]) in (0, 3)
    as_run = yaml.safe_load((out / "spec.yaml").read_text())
    assert "seed" not in as_run["sampling"]
    recorded = json.loads((out / "provenance.json").read_text())["seed"]
    assert hierwork.Run.load(out).seed == recorded
    new = tmp_path / "new.csv"
    pd.read_csv(spec["data"]).head(3).to_csv(new, index=False)
    capsys.readouterr()
    assert main(["predict", str(out), str(new), "--out", str(tmp_path / "pred.csv")]) == 0
    first = pd.read_csv(tmp_path / "pred.csv")
    assert main(["predict", str(out), str(new), "--out", str(tmp_path / "again.csv"), "--seed", str(recorded)]) == 0
    pd.testing.assert_frame_equal(first, pd.read_csv(tmp_path / "again.csv"))  # the same seed was used
