"""Group estimates, pooling weights and reference values on fabricated posterior draws (no MCMC).

Checks against closed forms that hold draw by draw:

* the pooling weight of the normal model is the posterior mean of
  ``v / (v + tau^2)`` with ``v = sigma^2 / n_j`` for a varying intercept; with a
  varying slope, ``sigma^2 / S_xx,j`` for the slope and ``sigma^2 (1/n_j +
  (xbar_j - x_ref)^2 / S_xx,j)`` for the value at the reference, the sampling
  variances of least squares (e.g. Draper and Smith 1998, *Applied Regression
  Analysis*, 3rd ed., sections 3.1-3.2); the between-group variance of the
  value at the reference is ``a' Sigma a`` with ``a = (1, x_ref)``;
* for a nested parent, ``v_parent = 1 / sum_k 1 / (v_k + tau_child^2)`` over its
  children (the variance of a precision-weighted mean of the child means);
* the tables do not depend on how groups are blocked in memory;
* the intercept row is the linear predictor at the reference values.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from arviz import from_dict

import hierwork
from hierwork.results import estimates, pooling
from hierwork.results.baselines import baselines

D_CHAINS, D_DRAWS = 2, 50


def _plan(tmp_path, frame: pd.DataFrame, groups: str, extra: str = ""):
    frame.to_csv(tmp_path / "data.csv", index=False)
    (tmp_path / "spec.yaml").write_text(f"""format: hierwork/1
name: units
data: data.csv
outcome: {{column: y}}
predictors: [x]
groups: {groups}
{extra}""")
    return hierwork.check(tmp_path / "spec.yaml").plan


def _posterior(plan, rng):
    """Draws of every variable the estimates read, named as in posterior.nc."""
    shape = (D_CHAINS, D_DRAWS)
    post = {"b": rng.normal([5.0, 0.3], 0.1, shape + (2,)), "residual_sd": rng.uniform(0.5, 1.5, shape)}
    coords, dims = {"term": list(plan.terms)}, {"b": ["term"]}
    for f in plan.factors:
        q = len(f.varying)
        post[f"{f.name}__sd"] = rng.uniform(0.2, 1.0, shape + (q,))
        post[f"{f.name}__effect"] = rng.normal(0, 0.5, shape + (f.n_groups, q))
        coords.update({f.name: list(f.levels), f"{f.name}__term": list(f.varying)})
        dims.update({f"{f.name}__sd": [f"{f.name}__term"], f"{f.name}__effect": [f.name, f"{f.name}__term"]})
        if q > 1:
            r = rng.uniform(-0.6, 0.6, shape)
            corr = np.stack([np.stack([np.ones(shape), r], -1), np.stack([r, np.ones(shape)], -1)], -2)
            post[f"{f.name}__corr"] = corr
            dims[f"{f.name}__corr"] = [f"{f.name}__term", f"{f.name}__term_bis"]
            coords[f"{f.name}__term_bis"] = list(f.varying)
    return from_dict(posterior=post, coords=coords, dims=dims)


@pytest.fixture
def slopes(tmp_path):
    rng = np.random.default_rng(4)
    sizes = [2, 3, 5, 8, 13, 21]
    frame = pd.DataFrame({"site": np.repeat([f"s{j}" for j in range(6)], sizes)})
    frame["x"] = rng.uniform(0, 10, len(frame)).round(2)
    frame["y"] = rng.normal(5, 1, len(frame))
    plan = _plan(tmp_path, frame, "{site: {varying: [intercept, x]}}", "estimates: {at: {x: 4}}")
    return plan, frame, _posterior(plan, rng)


def test_pooling_weight_of_intercept_and_slope_is_the_least_squares_form(slopes):
    plan, frame, idata = slopes
    weights = pooling.pooling_weights(idata, plan)["site"]
    post = idata.posterior
    sigma2 = post["residual_sd"].values.reshape(-1, 1) ** 2
    sd = post["site__sd"].values.reshape(-1, 2)
    rho = post["site__corr"].values.reshape(-1, 2, 2)[:, 0, 1]
    x_ref = 4.0
    for j, (_, rows) in enumerate(frame.groupby("site", sort=False)):
        n, x = len(rows), rows["x"].to_numpy()
        sxx = float(((x - x.mean()) ** 2).sum())
        v_slope = sigma2[:, 0] / sxx
        v_level = sigma2[:, 0] * (1 / n + (x.mean() - x_ref) ** 2 / sxx)
        tau2_level = sd[:, 0] ** 2 + 2 * rho * sd[:, 0] * sd[:, 1] * x_ref + sd[:, 1] ** 2 * x_ref ** 2
        np.testing.assert_allclose(weights[j, 1], np.mean(v_slope / (v_slope + sd[:, 1] ** 2)), rtol=1e-8)
        np.testing.assert_allclose(weights[j, 0], np.mean(v_level / (v_level + tau2_level)), rtol=1e-8)


def test_nested_parent_weight_adds_the_children_spread(tmp_path):
    rng = np.random.default_rng(5)
    farms = {"north": [2, 4, 6], "south": [3, 9]}
    rows = [(region, f"f{k}", rng.normal()) for region, sizes in farms.items()
            for k, size in enumerate(sizes) for _ in range(size)]
    frame = pd.DataFrame(rows, columns=["region", "farm", "y"]).assign(x=lambda d: rng.normal(size=len(d)))
    plan = _plan(tmp_path, frame, "{region: {}, farm: {within: region}}")
    idata = _posterior(plan, rng)
    weights = pooling.pooling_weights(idata, plan)
    post = idata.posterior
    sigma2 = post["residual_sd"].values.reshape(-1) ** 2
    tau_farm2 = post["farm__sd"].values.reshape(-1) ** 2
    tau_region2 = post["region__sd"].values.reshape(-1) ** 2
    for r, (region, sizes) in enumerate(farms.items()):
        v = 1 / sum(1 / (sigma2 / n + tau_farm2) for n in sizes)
        np.testing.assert_allclose(weights["region"][r, 0], np.mean(v / (v + tau_region2)), rtol=1e-8)
    np.testing.assert_allclose(weights["farm"][0, 0], np.mean((sigma2 / 2) / (sigma2 / 2 + tau_farm2)), rtol=1e-8)


def test_tables_do_not_depend_on_blocks(slopes, monkeypatch):
    plan, _, idata = slopes
    whole = estimates.group_estimates(idata, plan, baselines(plan), 0.9)
    monkeypatch.setattr(estimates, "BLOCK_CELLS", 1)  # one group at a time
    pd.testing.assert_frame_equal(estimates.group_estimates(idata, plan, baselines(plan), 0.9), whole)


def test_intercept_row_is_the_linear_predictor_at_the_reference(slopes):
    plan, _, idata = slopes
    table = estimates.group_estimates(idata, plan, baselines(plan), 0.9).set_index(["group", "term"])
    post = idata.posterior
    eta = (post["b"].sel(term="intercept") + post["site__effect"].sel(site__term="intercept")
           + 4.0 * (post["b"].sel(term="x") + post["site__effect"].sel(site__term="x")))
    np.testing.assert_allclose(table.xs("intercept", level="term").loc[list(plan.factors[0].levels), "outcome_mean"],
                               eta.mean(("chain", "draw")).values, rtol=1e-12)
    # Slope rows keep the slope: the population slope plus the group's offset.
    slope = post["b"].sel(term="x") + post["site__effect"].sel(site__term="x")
    np.testing.assert_allclose(table.xs("x", level="term").loc[list(plan.factors[0].levels), "partial_mean"],
                               slope.mean(("chain", "draw")).values, rtol=1e-12)
