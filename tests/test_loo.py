"""PSIS-LOO across the pooling spectrum (hierwork/loo.py).

External references: cbpp (Lesnoff et al. 2004) and rail (Devore 2000, Example
10.10; Pinheiro and Bates 2000, App. A.26), see tests/data/SOURCES.md; the
no-pooling and complete-pooling posteriors are checked against their closed-form
maximum-likelihood values (group means, grand mean), which wide priors barely move.
"""
from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
import pytest

import predictive_kit as kit
from hierwork.results import loo

pytestmark = pytest.mark.slow  # every test here fits a model (MCMC)


@pytest.fixture(scope="module")
def cbpp(tmp_path_factory):
    return kit.cbpp(str(tmp_path_factory.mktemp("cbpp")))


def test_cbpp_comparison_has_every_model_and_herds_differ(cbpp):
    # cbpp (Lesnoff et al. 2004): herds differ clearly in incidence, so ignoring them
    # (complete pooling) predicts held-out rows worse than partial pooling (PSIS-LOO,
    # Vehtari, Gelman and Gabry 2017); the gap (~13 elpd) is several of its standard errors.
    _, _, files = cbpp
    table = pd.read_csv(io.StringIO(files["pooling_comparison.csv"]))
    assert list(table.columns[:3]) == ["model", "rank", "elpd_loo"]
    assert set(table["model"]) == set(loo.MODELS)
    elpd = table.set_index("model")["elpd_loo"]
    assert np.isfinite(elpd).all()
    assert elpd["partial_pooling"] > elpd["complete_pooling"]


SMALL_GROUPS = """format: hierwork/1
name: small_groups
data: DATA/small_groups.csv
outcome: {column: y}
groups: {site: {column: site}}
sampling: {seed: 5}
estimates: {compare_pooling: true}
"""


def test_partial_pooling_beats_no_pooling_on_small_groups(tmp_path):
    # Simulated: 40 sites x 2 rows, site SD 0.5, residual SD 1 (so a site mean from 2 rows has
    # SD 0.71 > 0.5). Shrinkage then predicts better than separate means for more than 2 groups
    # (James and Stein 1961; Efron and Morris 1975, JASA 70, 311-319): partial pooling must beat
    # no pooling, and by more than 2 standard errors of the difference (dse).
    kit.simulate_sites(tmp_path / "small_groups.csv", seed=2, n_sites=40, per_site=2, mu=3.0, site_sd=0.5,
                       resid_sd=1.0, label="s{:02d}")
    plan, idata = kit.sample(kit.write(tmp_path, SMALL_GROUPS.replace("DATA", str(tmp_path))))
    files = kit.augment(idata, plan, 5)
    table = pd.read_csv(io.StringIO(files["pooling_comparison.csv"])).set_index("model")
    assert table.loc["partial_pooling", "elpd_loo"] > table.loc["no_pooling", "elpd_loo"]
    assert table.loc["no_pooling", "elpd_diff"] > 2 * table.loc["no_pooling", "dse"]


def test_pareto_k_counts_stored_per_model(cbpp):
    plan, _, files = cbpp
    report = json.loads(files["loo.json"])
    assert set(report["models"]) == set(loo.MODELS)
    for record in report["models"].values():
        assert record["n"] == plan.n
        assert 0 <= record["pareto_k_above_0.7"] <= record["pareto_k_above_arviz_threshold"] <= plan.n
        assert (record["pareto_k_above_0.7"] > 0) == (record["pareto_k_max"] > loo.PARETO_K_BAD)
    # The run's own rows with k > 0.7 are named, highest first, with the outcome and groups of the row.
    high = report["models"]["partial_pooling"]["pareto_k_high_rows"]
    assert len(high) == min(report["models"]["partial_pooling"]["pareto_k_above_0.7"], loo.MAX_HIGH_K_ROWS)
    assert [r["pareto_k"] for r in high] == sorted((r["pareto_k"] for r in high), reverse=True)
    herd = plan.factors[0]
    for r in high:
        assert r["pareto_k"] > loo.PARETO_K_BAD and r["outcome"] == plan.y[r["row"]]
        assert r["groups"] == {herd.name: herd.levels[herd.index[r["row"]]]}


@pytest.fixture(scope="module")
def rail(tmp_path_factory):
    from hierwork.pipeline import check

    spec_path = kit.write(tmp_path_factory.mktemp("rail"), kit.RAIL)
    return check(spec_path, kit.SMALL).plan


def test_baseline_models_recover_closed_form_estimates(rail):
    # rail: no pooling -> each rail's mean; complete pooling -> the grand mean 66.5
    # (tests/data/SOURCES.md). Default priors have SD ~ 2.5 x outcome SD (~60 ns) against
    # standard errors of 4.0/sqrt(3) = 2.3 ns per rail, moving the means by < 0.2%;
    # the tolerance 1.0 ns covers that and Monte Carlo error (~0.1 ns).
    data = pd.read_csv(kit.DATA / "rail.csv")
    np_plan = loo.no_pooling_plan(rail)
    post = loo._fit_baseline(np_plan, rail.spec, 3, centre=False).posterior
    means = post["b"].mean(("chain", "draw")).to_series()
    expected = data.groupby(data["rail"].astype(str))["travel_ns"].mean()
    for label, value in expected.items():
        assert means[f"rail={label}"] == pytest.approx(value, abs=1.0)
    cp_plan = loo.complete_pooling_plan(rail)
    assert cp_plan.factors == () and cp_plan.terms == ("intercept",)
    post = loo._fit_baseline(cp_plan, rail.spec, 4, centre=True).posterior
    assert float(post["b"].sel(term="intercept").mean()) == pytest.approx(66.5, abs=1.0)


def test_no_pooling_design_absorbs_parents_and_keeps_other_predictors(tmp_path):
    # Structure only: farm within region with a farm-level predictor -> one intercept and one
    # slope column per farm, no region or soil_carbon column (constant within farms).
    from hierwork.pipeline import check

    spec_path = kit.write(tmp_path, (kit.Path(__file__).parent.parent / "model_specs" / "wheat_slopes.yaml")
                          .read_text().replace("../demo/data", "DEMO"))
    plan = check(spec_path).plan
    farm = plan.factor("farm")
    np_plan = loo.no_pooling_plan(plan)
    assert np_plan.X.shape[1] == 2 * farm.n_groups + 2  # intercept and nitrogen per farm + 2 tillage levels
    assert np_plan.terms[-2:] == ("tillage=none", "tillage=reduced")
    np.testing.assert_allclose(np_plan.X[:, :farm.n_groups].sum(axis=1), 1.0)
    cp_plan = loo.complete_pooling_plan(plan)
    assert cp_plan.terms[-1] == "soil_carbon"
    np.testing.assert_allclose(cp_plan.X[:, -1], farm.W[farm.index, 0])
