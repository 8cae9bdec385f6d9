"""Counts with more zeros than a Poisson allows: a share of structural zeros, log link.

A row is a structural zero with probability ``zero_inflation`` (one population
parameter), otherwise a Poisson count with mean ``exp(eta)`` times its exposure
(Lambert 1992, Technometrics 34, 1-14). The outcome's scale is the expected
count per unit of exposure, zeros included: ``(1 - zero_inflation) exp(eta)``.
"""
from __future__ import annotations

import numpy as np
from scipy import optimize, special

from hierwork.plan.families.poisson import Poisson

#: Starting share of structural zeros of the baseline fits.
_START_ZERO_INFLATION = 0.2


class ZeroInflatedPoisson(Poisson):
    name = "zero_inflated_poisson"
    link_scale = "log rate (counting rows)"
    summary = "counts with excess zeros: a share of structural zeros and a Poisson count (log link); exposure optional"
    example_params = {"zero_inflation": 0.3}

    def parameters(self, rows):
        return ("zero_inflation",)

    def extra_priors(self, rows, spread):
        from hierwork.plan.priors import Prior

        return {"zero_inflation": Prior("beta", {"alpha": 1.0, "beta": 1.0}, True, "probability",
                                        "beta(1, 1): every share of structural zeros equally likely a priori; "
                                        "the zeros beyond the Poisson's tell it apart")}

    def glm_working(self, rows, eta, state):
        """Fisher scoring for the Poisson part at the current share of structural zeros."""
        pi = state.setdefault("zero_inflation", _START_ZERO_INFLATION)
        mu = np.exp(eta)
        w = np.maximum(_information(mu, pi), 1e-12)
        return eta - self.offset(rows) + _score(rows.y, mu, pi) / w, w

    def glm_update(self, rows, eta, state):
        """Maximum-likelihood share of structural zeros given the means (1-D search on its logit)."""
        y, mu = rows.y, np.exp(eta)

        def nll(logit_pi):
            return -np.sum(_log_pmf(y, mu, special.expit(logit_pi)))

        state["zero_inflation"] = float(special.expit(
            optimize.minimize_scalar(nll, bounds=(-15, 10), method="bounded").x))
        return state

    def information(self, eta, rows, params):
        """``(1 - pi)(mu - mu^2 e^-mu) + (1 - pi)^2 mu^2 e^-2mu / P(y = 0)``: the score's variance
        (the Poisson's ``mu`` at ``pi = 0``)."""
        return _information(self.expected(eta, rows), params["zero_inflation"])

    def mean(self, eta, params):
        return (1 - params["zero_inflation"]) * np.exp(eta)

    def likelihood(self, eta, y, rows, params):
        import pymc as pm
        import pytensor.tensor as pt

        pm.ZeroInflatedPoisson("y", psi=1 - params["zero_inflation"], mu=pt.exp(eta + self.offset(rows)),
                               observed=y)

    def log_density(self, y, eta, rows, params):
        return _log_pmf(y, self.expected(eta, rows), params["zero_inflation"])

    def simulate(self, rng, eta, rows, params):
        mu = self.expected(eta, rows)
        shape = np.broadcast_shapes(np.shape(mu), np.shape(params["zero_inflation"]))
        counting = rng.random(shape) >= params["zero_inflation"]
        return np.where(counting, rng.poisson(np.broadcast_to(mu, shape)), 0).astype(float)

    def reference(self, eta, rows, params):
        from scipy import stats

        return ZeroInflated(stats.poisson(self.expected(eta, rows)), params["zero_inflation"])


class ZeroInflated:
    """A frozen scipy.stats count distribution with a share ``pi`` of extra zeros (scipy has none)."""

    def __init__(self, counts, pi):
        self.counts, self.pi = counts, pi

    def logpmf(self, y):
        y = np.asarray(y)
        inflated = np.log(self.pi + (1 - self.pi) * self.counts.pmf(0))
        return np.where(y == 0, inflated, np.log1p(-self.pi) + self.counts.logpmf(y))

    def mean(self):
        return (1 - self.pi) * self.counts.mean()

    def var(self):
        m = self.counts.mean()
        return (1 - self.pi) * (self.counts.var() + m * m) - self.mean() ** 2


def _log_pmf(y, mu, pi):
    """``log(pi + (1 - pi) e^-mu)`` at 0, ``log(1 - pi) + y log mu - mu - log y!`` above."""
    zero = np.logaddexp(np.log(pi), np.log1p(-pi) - mu)
    return np.where(y == 0, zero, np.log1p(-pi) + special.xlogy(y, mu) - mu - special.gammaln(y + 1))


def _score(y, mu, pi):
    """``d log p(y) / d eta``: ``y - mu`` for a count above 0, ``-(1 - pi) mu e^-mu / P(0)`` at 0."""
    at_zero = -(1 - pi) * mu * np.exp(-mu) / (pi + (1 - pi) * np.exp(-mu))
    return np.where(y == 0, at_zero, y - mu)


def _information(mu, pi):
    """Fisher information about ``eta`` (see :meth:`ZeroInflatedPoisson.information`)."""
    e = np.exp(-mu)
    return (1 - pi) * (mu - mu * mu * e) + (1 - pi) ** 2 * mu * mu * e * e / (pi + (1 - pi) * e)
