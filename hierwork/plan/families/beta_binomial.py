"""Successes out of trials with overdispersion (beta-binomial), logit link.

Each row's success probability varies around ``p = expit(eta)`` as a beta
distribution with ``alpha = p phi`` and ``beta = (1 - p) phi``, ``phi`` the
``concentration``: the variance is ``n p (1 - p) (1 + (n - 1) / (phi + 1))``, the
binomial's inflated by the intraclass correlation ``1 / (phi + 1)``. A large
concentration is a binomial; a small one, rows that are nearly all or nothing.
"""
from __future__ import annotations

import numpy as np
from scipy import optimize, special

from hierwork.plan.families.binomial import Binomial

#: Starting concentration of the baseline fits.
_START_CONCENTRATION = 10.0


class BetaBinomial(Binomial):
    name = "beta_binomial"
    summary = "successes out of trials with overdispersion between rows: beta-binomial (logit link); needs outcome.trials"
    example_params = {"concentration": 8.0}

    def parameters(self, rows):
        return ("concentration",)

    def extra_priors(self, rows, spread):
        """``exponential`` with median the median number of trials (see the module docstring of ``priors``)."""
        from hierwork.formatting import number
        from hierwork.plan.priors import Prior

        median = max(float(np.median(rows.trials)), 1.0)
        return {"concentration": Prior(
            "exponential", {"lam": np.log(2.0) / median}, True, "positive",
            f"median {number(median)}, the median number of trials: a typical row's binomial variance about "
            "doubled a priori, from nearly binomial to nearly all-or-nothing rows")}

    def glm_working(self, rows, eta, state):
        """Fisher scoring: working response ``eta + score / information``, weights the information."""
        phi = state.setdefault("concentration", _START_CONCENTRATION)
        p = special.expit(eta)
        w = np.maximum(_information(p, rows.trials, phi), 1e-12)
        return eta + _score(rows.y, p, rows.trials, phi) / w, w

    def glm_update(self, rows, eta, state):
        """Maximum-likelihood concentration given the means (1-D search on its log)."""
        y, n, p = rows.y, rows.trials, special.expit(eta)

        def nll(log_phi):
            return -np.sum(_log_pmf(y, n, p, np.exp(log_phi)))

        state["concentration"] = float(np.exp(optimize.minimize_scalar(nll, bounds=(-8, 15), method="bounded").x))
        return state

    def information(self, eta, rows, params):
        """``E[score^2]`` summed exactly over the outcomes 0..n of each row (no closed form)."""
        return _information(special.expit(eta), rows.trials, params["concentration"])

    def likelihood(self, eta, y, rows, params):
        import pymc as pm
        import pytensor.tensor as pt

        p, phi = pt.sigmoid(eta), params["concentration"]
        pm.BetaBinomial("y", alpha=p * phi, beta=(1 - p) * phi, n=rows.trials, observed=y)

    def log_density(self, y, eta, rows, params):
        return _log_pmf(y, rows.trials, special.expit(eta), params["concentration"])

    def simulate(self, rng, eta, rows, params):
        p, phi = special.expit(eta), params["concentration"]
        shape = np.broadcast_shapes(np.shape(p), np.shape(phi))
        row_p = rng.beta(np.broadcast_to(p * phi, shape), np.broadcast_to((1 - p) * phi, shape))
        return rng.binomial(np.asarray(rows.trials).astype(np.int64), row_p).astype(float)

    def reference(self, eta, rows, params):
        from scipy import stats

        p, phi = special.expit(eta), params["concentration"]
        return stats.betabinom(rows.trials, p * phi, (1 - p) * phi)


def _log_pmf(y, n, p, phi):
    """Beta-binomial log mass: ``log C(n, y) + log B(y + a, n - y + b) - log B(a, b)``."""
    a, b = p * phi, (1 - p) * phi
    return (special.gammaln(n + 1) - special.gammaln(y + 1) - special.gammaln(n - y + 1)
            + special.betaln(y + a, n - y + b) - special.betaln(a, b))


def _score(y, p, n, phi):
    """``d log p(y) / d eta``: ``p (1 - p) phi [psi(y + a) - psi(n - y + b) - psi(a) + psi(b)]``."""
    a, b = p * phi, (1 - p) * phi
    return p * (1 - p) * phi * (special.digamma(y + a) - special.digamma(n - y + b)
                                - special.digamma(a) + special.digamma(b))


def _information(p, n, phi):
    """Fisher information about ``eta``: the score's variance, summed over the support of each row."""
    n = np.asarray(n, dtype=float)
    total = 0.0
    for k in range(int(np.max(n)) + 1):
        inside = k <= n
        kk = np.where(inside, k, 0.0)
        mass = np.where(inside, np.exp(_log_pmf(kk, n, p, phi)), 0.0)
        total = total + mass * _score(kk, p, n, phi) ** 2
    return total
