"""Vectorised PSIS-LOO against ArviZ's ``psislw`` and ``loo`` (the reference implementation).

The log-likelihood matrices are test inputs only: a normal model's pointwise
log densities at draws of its parameters, with a few outlying observations
whose Pareto k is large, ties, and so few draws that the tail is too short to
fit (the cases passed to ArviZ itself).
"""
import warnings

import arviz as az
import numpy as np
import pytest
import xarray as xr
from scipy import stats

from hierwork.results.psis import loo_pointwise, psis_log_weights


def _log_lik(n_draws=1000, n_obs=300, seed=3):
    rng = np.random.default_rng(seed)
    y = rng.standard_t(3, n_obs) * 2.0
    y[:3] = [15.0, -18.0, 25.0]  # influential rows: large Pareto k
    mu = rng.normal(y.mean(), 0.15, n_draws)
    sd = np.exp(rng.normal(np.log(y.std()), 0.1, n_draws))
    return stats.norm.logpdf(y[None, :], mu[:, None], sd[:, None])


def _arviz_loo(ll, reff, chains=2):
    data = az.InferenceData(log_likelihood=xr.Dataset(
        {"y": (("chain", "draw", "row"), ll.reshape(chains, -1, ll.shape[1]))}))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return az.loo(data, pointwise=True, reff=reff)


@pytest.mark.parametrize("reff", [1.0, 0.4])
def test_log_weights_and_k_equal_arviz(reff):
    ll = _log_lik()
    weights, k = psis_log_weights(-ll, reff)
    ref_w, ref_k = az.psislw(-ll.T, reff=reff)
    np.testing.assert_allclose(k, ref_k, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(weights, ref_w.T, rtol=1e-9, atol=1e-9)
    assert k[:3].min() > 0.7 > np.median(k)  # the outlying rows do have heavy tails


def test_loo_pointwise_equals_arviz_loo():
    ll = _log_lik()
    loo_i, k = loo_pointwise(ll, 0.8)
    ref = _arviz_loo(ll, 0.8)
    np.testing.assert_allclose(loo_i, ref.loo_i.values, rtol=1e-10)
    np.testing.assert_allclose(k, ref.pareto_k.values, rtol=1e-9)


def test_irregular_rows_are_passed_to_arviz():
    ll = _log_lik(n_draws=400, n_obs=40)
    ll[:, 5] = np.round(ll[:, 5], 1)  # ties at the cut-off
    ll[:, 6] = -3.0                     # constant: no tail to fit
    weights, k = psis_log_weights(-ll, 1.0)
    ref_w, ref_k = az.psislw(-ll.T, reff=1.0)
    np.testing.assert_allclose(k, ref_k, rtol=1e-9)
    np.testing.assert_allclose(weights, ref_w.T, rtol=1e-9, atol=1e-9)
    short = _log_lik(n_draws=20, n_obs=5)  # tail of 4 draws: ArviZ's k = inf
    _, k_short = psis_log_weights(-short, 1.0)
    assert np.isinf(k_short).all()
