"""The same contract checks on every registered outcome family (hierwork/plan/families/).

A family added to the registry is checked here with no other edit:

* its log density, written from its formula, equals the same distribution in
  scipy.stats (its ``reference``), and the PyMC likelihood the model uses gives
  the same numbers (so the fit and everything computed after it agree);
* its simulator reproduces the reference distribution's mean and variance, and
  its mean on the outcome's scale is the reference's mean per trial or unit of exposure;
* its Fisher information about the linear predictor (used by the pooling
  weight) equals the variance of the score, ``E[(d log p / d eta)^2]``
  (Fisher's identity, e.g. Casella and Berger 2002, Lemma 7.3.11), estimated by
  simulation with the score taken by central differences of the log density;
* its maximum-likelihood baselines equal a general-purpose library's GLM fit
  (statsmodels) where statsmodels has the model (:data:`STATSMODELS`);
* a small fit through the public API recovers the population intercept and
  the group SD of data simulated from the family, two-sided: the truth is inside
  the 99% interval and the data have narrowed the prior substantially.
"""
from __future__ import annotations

import dataclasses
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pymc as pm
import pytensor.tensor as pt
import pytest
import scipy.sparse as sp
import statsmodels.api as sm
import yaml

import hierwork
from hierwork.plan.families import FAMILY_NAMES, get_family
from hierwork.results.baselines import fit_glm

FAMILIES = [get_family(name) for name in FAMILY_NAMES]
IDS = list(FAMILY_NAMES)


def _case(family, n=400, seed=0):
    """Rows, a linear predictor around 0.5 and the family's example parameters, with outcomes."""
    rng = np.random.default_rng(seed)
    rows = family.example_rows(rng, n)
    x = rng.normal(size=n)
    eta = 0.5 + 0.4 * x
    params = _params(family)
    y = family.simulate(rng, eta, rows, params)
    return dataclasses.replace(rows, y=y), x, eta, params


def _params(family, draws=None):
    """The family's example parameters; with ``draws``, repeated as ``(draws, 1)`` to broadcast over rows
    (a vector parameter's elements on a last axis: ``(draws, 1, k)``)."""
    values = {k: np.asarray(v, dtype=float) for k, v in family.example_params.items()}
    return values if draws is None else {k: np.broadcast_to(v, (draws, 1) + v.shape) for k, v in values.items()}


def _logpdf(dist, y):
    return dist.logpmf(y) if hasattr(dist, "logpmf") else dist.logpdf(y)


@pytest.mark.parametrize("family", FAMILIES, ids=IDS)
def test_log_density_matches_scipy_and_pymc(family):
    rows, _, eta, params = _case(family, n=60)
    ours = family.log_density(rows.y, eta, rows, params)
    np.testing.assert_allclose(ours, _logpdf(family.reference(eta, rows, params), rows.y), rtol=1e-9, atol=1e-9)
    with pm.Model() as model:
        family.likelihood(pt.as_tensor(eta), pm.Data("y_data", rows.y), rows,
                          {k: pt.as_tensor(v) for k, v in params.items()})
    pymc_logp = model.compile_fn(model.logp(vars=[model["y"]], sum=False)[0], inputs=[], point_fn=False)()
    np.testing.assert_allclose(pymc_logp, ours, rtol=1e-8, atol=1e-8)


@pytest.mark.parametrize("family", FAMILIES, ids=IDS)
def test_simulator_moments_match_reference(family):
    rows, _, eta, params = _case(family, n=3)
    rng = np.random.default_rng(1)
    draws = 40_000
    sims = family.simulate(rng, np.broadcast_to(eta, (draws, 3)), rows, _params(family, draws))
    ref = family.reference(eta, rows, params)
    mean, var = np.asarray(ref.mean()), np.asarray(ref.var())
    # Five standard errors of the sample mean and (roughly, via the fourth moment bound) of the variance.
    np.testing.assert_array_less(np.abs(sims.mean(axis=0) - mean), 5 * np.sqrt(var / draws) + 1e-12)
    assert np.all(np.abs(sims.var(axis=0) / var - 1) < 0.1)


@pytest.mark.parametrize("family", FAMILIES, ids=IDS)
def test_mean_is_the_reference_mean_per_unit(family):
    # Results on the outcome's scale are Family.mean: the expected outcome per trial or per unit of
    # exposure, which must be the scipy distribution's mean divided by the trials or the exposure.
    rows, _, eta, params = _case(family, n=50)
    volume = rows.trials if rows.trials is not None else rows.exposure if rows.exposure is not None else 1.0
    np.testing.assert_allclose(family.mean(eta, params) * volume, family.reference(eta, rows, params).mean(),
                               rtol=1e-10)


@pytest.mark.parametrize("family", FAMILIES, ids=IDS)
def test_information_is_the_variance_of_the_score(family):
    rows, _, eta, params = _case(family, n=4)
    params = {k: 1.7 * v for k, v in params.items()}  # away from 1, so that a missing scale shows
    rng = np.random.default_rng(2)
    draws, h = 100_000, 1e-5
    sims = family.simulate(rng, np.broadcast_to(eta, (draws, 4)), rows,
                           {k: np.broadcast_to(v, (draws, 1) + v.shape) for k, v in params.items()})
    score = (family.log_density(sims, eta + h, rows, params) - family.log_density(sims, eta - h, rows, params)) / (2 * h)
    squares = score ** 2
    expected = np.broadcast_to(family.information(eta, rows, params), eta.shape)
    # Five Monte Carlo standard errors of the mean of the squared scores.
    np.testing.assert_array_less(np.abs(squares.mean(axis=0) - expected), 5 * squares.std(axis=0) / np.sqrt(draws))
    assert np.all(expected > 0)


def _sm_binomial(rows, X):
    endog = np.column_stack([rows.y, rows.trials - rows.y]) if rows.trials is not None else rows.y
    return sm.GLM(endog, X, family=sm.families.Binomial()).fit().params


def _sm_nb(rows, X):
    res = sm.NegativeBinomial(rows.y, X, exposure=rows.exposure, loglike_method="nb2").fit(disp=0, maxiter=200)
    return res.params[:-1]


def _sm_zip(rows, X):
    model = sm.ZeroInflatedPoisson(rows.y, X, exog_infl=np.ones((len(rows.y), 1)), exposure=rows.exposure,
                                   inflation="logit")
    return model.fit(method="newton", maxiter=200, disp=0).params[1:]   # params[0]: the inflation's logit


def _scipy_beta_binomial(rows, X):
    """statsmodels has no beta-binomial regression: maximise scipy.stats.betabinom's log mass directly."""
    from scipy import optimize, special, stats

    def nll(theta):
        p, phi = special.expit(X @ theta[:-1]), np.exp(theta[-1])
        return -np.sum(stats.betabinom.logpmf(rows.y, rows.trials, p * phi, (1 - p) * phi))

    start = np.r_[sm.GLM(np.column_stack([rows.y, rows.trials - rows.y]), X,
                         family=sm.families.Binomial()).fit().params, np.log(10.0)]
    return optimize.minimize(nll, start, method="BFGS", options={"gtol": 1e-9}).x[:-1]


def _sm_ordinal(rows, X):
    """statsmodels' OrderedModel (distr='logit') has no intercept and free thresholds ``t_k``, ``P(y > k) =
    expit(x b - t_k)``; ours fixes the first cut-point at 0 and keeps the intercept: ``b0 = -t_1``."""
    from statsmodels.miscmodels.ordinal_model import OrderedModel

    res = OrderedModel(rows.y, X[:, 1:], distr="logit").fit(method="newton", maxiter=200, disp=0)
    slopes = res.params[: X.shape[1] - 1]
    return np.r_[-res.params[X.shape[1] - 1], slopes]


#: Family -> the same maximum-likelihood fit in statsmodels (a general-purpose reference library), or for a
#: model statsmodels lacks, scipy.optimize on the scipy.stats distribution.
STATSMODELS = {
    "normal": lambda rows, X: sm.OLS(rows.y, X).fit().params,
    "bernoulli": _sm_binomial,
    "binomial": _sm_binomial,
    "poisson": lambda rows, X: sm.GLM(rows.y, X, family=sm.families.Poisson(), exposure=rows.exposure).fit().params,
    "negative_binomial": _sm_nb,
    "gamma": lambda rows, X: sm.GLM(rows.y, X, family=sm.families.Gamma(sm.families.links.Log())).fit().params,
    "lognormal": lambda rows, X: sm.OLS(np.log(rows.y), X).fit().params,   # lognormal ML = least squares on log y
    "beta_binomial": _scipy_beta_binomial,
    "zero_inflated_poisson": _sm_zip,
    "ordinal": _sm_ordinal,
}


@pytest.mark.parametrize("family", FAMILIES, ids=IDS)
def test_baselines_match_statsmodels(family):
    if family.name not in STATSMODELS:
        pytest.skip(f"no reference fit of {family.name} with the same likelihood")
    rows, x, _, _ = _case(family, n=500, seed=3)
    X = np.column_stack([np.ones_like(x), x])
    ours = fit_glm(SimpleNamespace(family=family, outcome=rows), sp.csr_matrix(X), np.ones(len(x), bool))
    np.testing.assert_allclose(ours, STATSMODELS[family.name](rows, X), rtol=1e-4, atol=1e-5)


@pytest.mark.slow
@pytest.mark.parametrize("family", FAMILIES, ids=IDS)
def test_small_fit_recovers_intercept_and_group_sd(family, tmp_path):
    rng = np.random.default_rng(11)
    groups, per_group, intercept, group_sd = 12, 25, 0.5, 0.4
    n = groups * per_group
    site = np.repeat(np.arange(groups), per_group)
    rows = family.example_rows(rng, n)
    eta = intercept + rng.normal(0, group_sd, groups)[site]
    params = _params(family)
    frame = pd.DataFrame({"site": [f"s{j:02d}" for j in site], "y": family.simulate(rng, eta, rows, params)})
    outcome = {"column": "y", "family": family.name}
    for key in ("trials", "exposure"):
        if getattr(rows, key) is not None:
            frame[key] = getattr(rows, key)
            outcome[key] = key
    frame.to_csv(tmp_path / "data.csv", index=False)
    spec = {"format": "hierwork/1", "name": "recovery", "data": "data.csv", "outcome": outcome,
            "groups": {"site": {"column": "site"}}}
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump(spec))
    run = hierwork.fit(tmp_path / "spec.yaml", out=tmp_path / "run", progress=False,
                       overrides={"sampling.chains": 2, "sampling.draws": 400, "sampling.warmup": 400,
                                  "sampling.seed": 5, "estimates.interval": 0.99})
    summary = run.summary.set_index("parameter")
    prior_sd = run.plan["priors"]["intercept"]["params"]["sigma"]
    for name, truth in (("intercept", intercept), ("site.sd", group_sd)):
        row = summary.loc[name]
        assert row["lower"] <= truth <= row["upper"], (name, row.to_dict())
    assert summary.loc["intercept", "sd"] < prior_sd / 4


@pytest.mark.parametrize("prior", [{"beta": {"alpha": 2, "beta": 5}}, {"uniform": {"lower": 0, "upper": 0.5}}])
def test_a_probability_takes_a_beta_or_a_bounded_uniform_prior(prior, tmp_path):
    # zero_inflation is a probability: the spec's prior replaces the default beta(1, 1), and its log
    # density is scipy's (beta: scipy.stats.beta; uniform: 1 / 0.5 inside the bounds).
    rng = np.random.default_rng(4)
    pd.DataFrame({"site": np.repeat(["a", "b", "c"], 10), "y": rng.poisson(2, 30)}).to_csv(tmp_path / "d.csv",
                                                                                       index=False)
    spec = {"format": "hierwork/1", "name": "zi", "data": "d.csv", "priors": {"zero_inflation": prior},
            "outcome": {"column": "y", "family": "zero_inflated_poisson"}, "groups": {"site": {"column": "site"}}}
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump(spec))
    chosen = hierwork.check(tmp_path / "spec.yaml").plan.priors["zero_inflation"]
    assert not chosen.default and chosen.dist == next(iter(prior))
    expected = np.log(30 * 0.2 ** 1 * 0.8 ** 4) if chosen.dist == "beta" else np.log(2.0)  # B(2, 5) = 1/30
    np.testing.assert_allclose(chosen.logpdf(0.2), expected, rtol=1e-12)
