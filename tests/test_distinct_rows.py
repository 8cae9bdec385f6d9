"""Per-row results computed once per distinct row (hierwork/results/draws.py ``distinct_rows``).

Rows with identical predictors, groups and outcome columns have identical
pointwise log-likelihood draws and one predictive distribution, so LOO, the
likelihood of sensitivity.csv, the pooling weights and the predictive summaries
are computed once per distinct row and gathered. Each is checked here against
the per-row computation: ``arviz.loo`` on the full per-row log-likelihood
(ArviZ, Vehtari, Gelman and Gabry 2017), ``scipy.stats.bernoulli.logpmf``
summed over rows, the same code with every row its own representative, and the
closed-form predictive mean of a 0/1 outcome (the posterior mean of ``p``).
Data: cbpp (Lesnoff et al. 2004; tests/data/SOURCES.md) expanded to one 0/1 row
per animal (842 rows, 56 herd x period cells); posterior draws are invented
(no MCMC), which every check holds for whatever the draws.
"""
from __future__ import annotations

import warnings
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import special, stats

import hierwork
from hierwork.results import loo, pooling, predictive, sensitivity
from hierwork.results.draws import Distinct, distinct_rows, draws_of, pointwise_log_likelihood, rows_of

DATA = Path(__file__).parent / "data"
CHAINS, DRAWS = 2, 150


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    """A bernoulli plan on cbpp's animals and invented posterior draws in hierwork's layout."""
    folder = tmp_path_factory.mktemp("cbpp")
    cbpp = pd.read_csv(DATA / "cbpp.csv")
    rows = [(h, p, int(i < c)) for h, p, c, n in cbpp[["herd", "period", "incidence", "size"]].itertuples(index=False)
            for i in range(n)]
    pd.DataFrame(rows, columns=["herd", "period", "sick"]).to_csv(folder / "d.csv", index=False)
    (folder / "spec.yaml").write_text("""format: hierwork/1
name: animals
data: d.csv
outcome: {column: sick, family: bernoulli}
predictors: [{column: period, type: categorical}]
groups: {herd: {column: herd}}
""", encoding="utf-8")
    plan = hierwork.check(folder / "spec.yaml").plan
    rng = np.random.default_rng(7)
    f = plan.factors[0]
    b = np.array([-2.0, -1.0, -1.1, -1.5])[: plan.X.shape[1]] + rng.normal(0, 0.15, (CHAINS, DRAWS, plan.X.shape[1]))
    sd = np.abs(0.6 + rng.normal(0, 0.1, (CHAINS, DRAWS, 1)))
    effect = sd[..., None] * (rng.normal(0, 1, (1, 1, f.n_groups, 1)) + rng.normal(0, 0.3, (CHAINS, DRAWS, f.n_groups, 1)))
    posterior = xr.Dataset({"b": (("chain", "draw", "term"), b),
                            "herd__sd": (("chain", "draw", "herd__term"), sd),
                            "herd__effect": (("chain", "draw", "herd", "herd__term"), effect)})
    return plan, az.InferenceData(posterior=posterior)


def _each_row(rows, outcome=True):
    """The per-row computation: every row its own representative."""
    return Distinct(rows, np.arange(rows.n), np.ones(rows.n, dtype=np.int64))


def test_distinct_rows_are_few_and_exact(fitted):
    plan, _ = fitted
    rows = rows_of(plan)
    d = distinct_rows(rows)
    assert d.rows.n <= 2 * 56 < plan.n and d.counts.sum() == plan.n
    np.testing.assert_array_equal(d.rows.X[d.inverse], rows.X)
    np.testing.assert_array_equal(d.rows.outcome.y[d.inverse], plan.y)
    np.testing.assert_array_equal(d.rows.groups[0][1][d.inverse], plan.factors[0].index)
    keys = distinct_rows(rows, outcome=False)  # the predictive distribution does not depend on the outcome
    assert keys.rows.n <= 56 < d.rows.n


def test_row_loo_equals_arviz_on_the_per_row_log_likelihood(fitted):
    plan, idata = fitted
    draws = draws_of(idata.posterior, plan.factors, ())
    ll = pointwise_log_likelihood(draws, rows_of(plan), plan.family).reshape(CHAINS, DRAWS, plan.n)
    full = az.InferenceData(posterior=idata.posterior, log_likelihood=xr.Dataset({"y": (("chain", "draw", "row"), ll)}))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reference = az.loo(full, pointwise=True, reff=loo.relative_efficiency(idata.posterior))
    ours = loo.row_loo(idata, plan)
    np.testing.assert_array_equal(ours.pareto_k.values, reference.pareto_k.values)
    np.testing.assert_allclose(ours.loo_i.values, reference.loo_i.values, rtol=1e-13)
    for key in ("elpd_loo", "se", "p_loo"):
        assert ours[key] == pytest.approx(reference[key], rel=1e-10), key
    for key in ("n_samples", "n_data_points", "warning", "scale", "good_k"):
        assert ours[key] == reference[key], key
    sums = ("elpd_loo", "se", "p_loo")  # compared above; the rest of loo.json's record exactly
    drop = lambda record: {k: v for k, v in record.items() if k not in sums}  # noqa: E731
    assert drop(loo._loo_record(ours, plan)) == drop(loo._loo_record(reference, plan))


def test_row_loo_in_chunks_and_over_budget(fitted, monkeypatch):
    plan, idata = fitted
    whole = loo.row_loo(idata, plan)
    monkeypatch.setattr(predictive, "MAX_CELLS", CHAINS * DRAWS * 7)  # 7 distinct rows per chunk
    chunked = loo.row_loo(idata, plan)
    np.testing.assert_array_equal(chunked.pareto_k.values, whole.pareto_k.values)
    assert chunked["elpd_loo"] == pytest.approx(whole["elpd_loo"], rel=1e-12)
    monkeypatch.setattr(loo, "LOO_CELLS", CHAINS * DRAWS * 10)
    assert loo.row_loo(idata, plan) is None


def test_sensitivity_likelihood_equals_the_sum_over_rows(fitted):
    plan, idata = fitted
    draws = draws_of(idata.posterior, plan.factors, ())
    eta = draws.b @ plan.X.T + draws.effects["herd"][:, plan.factors[0].index, 0]
    reference = stats.bernoulli.logpmf(plan.y, special.expit(eta)).sum(axis=1)  # scipy, per row
    np.testing.assert_allclose(sensitivity.log_likelihood(idata, plan), reference, rtol=1e-11)
    keep = np.array([0, 5, 299])
    np.testing.assert_allclose(sensitivity.log_likelihood(idata, plan, keep), reference[keep], rtol=1e-11)


def test_pooling_weights_equal_the_per_row_computation(fitted, monkeypatch):
    plan, idata = fitted
    ours = pooling.pooling_weights(idata, plan)
    monkeypatch.setattr(pooling, "distinct_rows", _each_row)
    per_row = pooling.pooling_weights(idata, plan)
    np.testing.assert_allclose(ours["herd"], per_row["herd"], rtol=1e-12)


def test_predictive_summaries_once_per_distinct_row(fitted):
    plan, idata = fitted
    draws = draws_of(idata.posterior, plan.factors, ())
    pp = predictive.posterior_predictive(draws, rows_of(plan), plan.family, plan.y, np.random.default_rng(3))
    keys = distinct_rows(rows_of(plan), outcome=False)
    assert pp.rows.groupby(keys.inverse).nunique().to_numpy().max() == 1  # one summary per key
    # Closed form: the predictive probability of a 1 is the posterior mean of p; 300 draws per key.
    eta = draws.b @ keys.rows.X.T + draws.effects["herd"][:, keys.rows.groups[0][1], 0]
    p = special.expit(eta).mean(axis=0)
    se = np.sqrt(p * (1 - p) / draws.n)
    first = np.unique(keys.inverse, return_index=True)[1]
    z = (pp.rows["pred_mean"].to_numpy()[first] - p[keys.inverse[first]]) / se[keys.inverse[first]]
    assert np.abs(z).max() < 4.5
    # Stored outcomes: one independent draw per row and kept draw, 0/1, with the per-row log-likelihood.
    assert pp.replicated.shape == (CHAINS, DRAWS, plan.n) and set(np.unique(pp.replicated)) <= {0.0, 1.0}
    np.testing.assert_allclose(pp.log_lik.reshape(draws.n, -1),
                               pointwise_log_likelihood(draws, rows_of(plan), plan.family), rtol=1e-13)
    same_key = keys.inverse == keys.inverse[0]
    assert same_key.sum() > 5 and 0 < pp.replicated[..., same_key].mean(axis=(0, 1)).std()  # rows drawn apart
