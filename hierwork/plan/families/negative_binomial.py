"""Over-dispersed counts (gamma-Poisson), log link: variance ``mu + mu^2 / dispersion``."""
from __future__ import annotations

import numpy as np
from scipy import optimize, special

from hierwork.plan.families.poisson import Poisson

#: Starting dispersion of the baseline fits.
_START_DISPERSION = 10.0


class NegativeBinomial(Poisson):
    name = "negative_binomial"
    summary = "over-dispersed counts (log link; variance mu + mu^2/dispersion); exposure optional"
    example_params = {"dispersion": 5.0}

    def parameters(self, rows):
        return ("dispersion",)

    def extra_priors(self, rows, spread):
        from hierwork.plan.priors import Prior

        return {"dispersion": Prior("gamma", {"alpha": 2.0, "beta": 0.1}, True, "positive",
                                    "gamma(2, 0.1): dispersion from about 2 to 50 (weakly informative)")}

    def glm_weight(self, mu, state):
        alpha = state.setdefault("dispersion", _START_DISPERSION)
        return mu / (1 + mu / alpha)

    def information(self, eta, rows, params):
        """``mu / (1 + mu / dispersion)``: the Poisson information, reduced by the gamma mixing."""
        return self.glm_weight(self.expected(eta, rows), {"dispersion": params["dispersion"]})

    def glm_update(self, rows, eta, state):
        """Maximum-likelihood dispersion given the means (1-D search on its log)."""
        y, mu = rows.y, np.exp(eta)

        def nll(log_a):
            return -np.sum(_log_pmf(y, mu, np.exp(log_a)))

        state["dispersion"] = float(np.exp(optimize.minimize_scalar(nll, bounds=(-10, 15), method="bounded").x))
        return state

    def likelihood(self, eta, y, rows, params):
        import pymc as pm
        import pytensor.tensor as pt

        pm.NegativeBinomial("y", mu=pt.exp(eta + self.offset(rows)), alpha=params["dispersion"], observed=y)

    def log_density(self, y, eta, rows, params):
        return _log_pmf(y, self.expected(eta, rows), params["dispersion"])

    def simulate(self, rng, eta, rows, params):
        mu = self.expected(eta, rows)
        alpha = np.broadcast_to(params["dispersion"], np.shape(mu))
        return rng.poisson(rng.gamma(alpha, mu / alpha)).astype(float)  # gamma-Poisson mixture

    def reference(self, eta, rows, params):
        from scipy import stats

        alpha = params["dispersion"]
        return stats.nbinom(alpha, alpha / (alpha + self.expected(eta, rows)))


def _log_pmf(y, mu, alpha):
    """Negative binomial log mass with mean ``mu`` and dispersion ``alpha`` (PyMC's parameterisation)."""
    return (special.gammaln(y + alpha) - special.gammaln(alpha) - special.gammaln(y + 1)
            + alpha * np.log(alpha / (alpha + mu)) + y * np.log(mu / (alpha + mu)))
