"""Power-scaling sensitivity on exact posterior draws of the conjugate normal model (no MCMC).

Closed form (Gelman et al., Bayesian Data Analysis, 3rd ed., 2013, section
2.5): with ``y_i ~ normal(mu, s)``, ``n`` rows and prior ``mu ~ normal(m0,
t0)``, the posterior of ``mu`` is normal with precision ``1/t0^2 + n/s^2`` and
mean ``(m0/t0^2 + n ybar/s^2) / precision``. Raising the prior to the power
``alpha`` multiplies its precision by ``alpha``; raising the likelihood to
``alpha`` multiplies ``n`` by ``alpha``. So the reweighted draws must give the
closed-form mean and SD at every ``alpha``, within Monte Carlo error.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from hierwork.results import sensitivity as S

N_DRAWS = 8000


def _posterior(m0, t0, ybar, se, prior_power=1.0, likelihood_power=1.0):
    precision = prior_power / t0 ** 2 + likelihood_power / se ** 2
    return (prior_power * m0 / t0 ** 2 + likelihood_power * ybar / se ** 2) / precision, precision ** -0.5


def _draws(m0, t0, ybar, se, seed=1):
    """Exact posterior draws of mu and, per draw, the log prior and log likelihood (``ybar`` summarises the rows)."""
    mean, sd = _posterior(m0, t0, ybar, se)
    mu = np.random.default_rng(seed).normal(mean, sd, N_DRAWS)
    return mu, stats.norm(m0, t0).logpdf(mu), stats.norm(mu, se).logpdf(ybar)


@pytest.mark.parametrize("alpha", [0.5, 0.8, 1.25, 2.0])
@pytest.mark.parametrize("part", ["prior", "likelihood"])
def test_reweighting_reaches_the_closed_form_posterior(alpha, part):
    m0, t0, ybar, se = 0.0, 1.0, 1.5, 0.8
    mu, log_prior, log_lik = _draws(m0, t0, ybar, se)
    weights, k = S.power_weights(log_prior if part == "prior" else log_lik, alpha)
    assert k < S.k_limit(N_DRAWS)
    mean, sd = S.weighted_moments(mu, weights)
    want_mean, want_sd = _posterior(m0, t0, ybar, se, **{f"{part}_power": alpha})
    n_eff = 1.0 / np.sum(weights ** 2)
    assert abs(mean - want_mean) < 4 * want_sd / np.sqrt(n_eff)
    assert abs(sd - want_sd) < 4 * want_sd / np.sqrt(2 * n_eff)
    # Not vacuous: the scaled posterior is farther from the base than the tolerance.
    assert abs(want_mean - _posterior(m0, t0, ybar, se)[0]) > 8 * want_sd / np.sqrt(n_eff)


def test_diagnosis_in_the_three_regimes():
    cases = {  # (prior sd, standard error of the data, prior mean far from the data?)
        "data dominate": ((10.0, 0.1, False), S.NONE),
        "prior dominates": ((0.1, 10.0, False), S.WEAK_LIKELIHOOD),
        "equal and apart": ((1.0, 1.0, True), S.CONFLICT),
    }
    for name, ((t0, se, apart), want) in cases.items():
        mu, log_prior, log_lik = _draws(3.0 if apart else 0.0, t0, 0.0, se, seed=5)
        prior, k_prior = S.sensitivities({"mu": mu}, log_prior)
        lik, k_lik = S.sensitivities({"mu": mu}, log_lik)
        got = S.diagnose(prior["mu"], lik["mu"], max(k_prior, k_lik), S.k_limit(N_DRAWS))
        assert got == want, (name, prior, lik)


def test_unreliable_weights_are_said_so():
    assert S.diagnose(0.5, 0.5, 0.9, S.k_limit(4000)) == S.UNRELIABLE
    assert S.diagnose(0.5, 0.5, float("nan"), S.k_limit(4000)) == S.UNRELIABLE
    # Vehtari et al. (2024): min(1 - 1/log10(S), 0.7).
    assert S.k_limit(100) == pytest.approx(0.5) and S.k_limit(10 ** 6) == 0.7


def test_distance_is_a_unit_free_size_of_the_shift():
    x = np.random.default_rng(2).normal(0, 1, 20000)
    base = np.full(x.size, 1 / x.size)

    def shifted(delta):  # weights moving N(0, 1) to N(delta, 1)
        w = np.exp(delta * x - delta ** 2 / 2)
        return w / w.sum()

    assert S.cjs_distance(x, base, base) == 0.0
    small, large = S.cjs_distance(x, base, shifted(0.05)), S.cjs_distance(x, base, shifted(0.2))
    assert 0 < small < large < 1
    assert large / small == pytest.approx(4, rel=0.1)  # linear in a small shift
    assert S.cjs_distance(3 * x + 7, base, shifted(0.2)) == pytest.approx(large)  # the parameter's units drop out
    assert S.cjs_distance(-x, base, shifted(0.2)) == pytest.approx(large)  # both tails count alike
