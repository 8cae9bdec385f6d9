"""Positive amounts whose logarithm is normal: the mean is ``exp(eta + log_sd^2 / 2)``."""
from __future__ import annotations

import numpy as np

from hierwork.plan.families.positive import PositiveOutcome

_LOG_2PI = float(np.log(2 * np.pi))


class Lognormal(PositiveOutcome):
    """``log y`` normal with mean ``eta`` and SD ``log_sd``.

    The linear predictor is the mean of ``log y`` (the log of the median); the
    outcome's scale is the mean, ``exp(eta + log_sd^2 / 2)``, so results depend
    on the spread as well (draw by draw).
    """

    name = "lognormal"
    link_scale = "log outcome"
    glm_one_step = True
    summary = "positive amounts whose logarithm is normal: lognormal (log scale; results as the mean)"
    example_params = {"log_sd": 0.6}

    def parameters(self, rows):
        return ("log_sd",)

    def link_centre_spread(self, rows):
        return float(np.mean(np.log(rows.y))), self.log_spread(rows)

    def extra_priors(self, rows, spread):
        from hierwork.plan.priors import residual_sd_prior

        return {"log_sd": residual_sd_prior(spread, "the SD of log outcome")}

    def glm_working(self, rows, eta, state):
        """Least squares on ``log y``: the maximum-likelihood coefficients of a lognormal."""
        return np.log(rows.y), np.ones(rows.n)

    def information(self, eta, rows, params):
        """``1 / log_sd^2`` per row, whatever ``eta`` (a normal location on the log scale)."""
        return 1.0 / params["log_sd"] ** 2

    def mean(self, eta, params):
        return np.exp(eta + 0.5 * params["log_sd"] ** 2)

    def likelihood(self, eta, y, rows, params):
        import pymc as pm

        pm.LogNormal("y", mu=eta, sigma=params["log_sd"], observed=y)

    def log_density(self, y, eta, rows, params):
        sigma = params["log_sd"]
        log_y = np.log(y)
        return -log_y - 0.5 * (_LOG_2PI + 2 * np.log(sigma) + ((log_y - eta) / sigma) ** 2)

    def simulate(self, rng, eta, rows, params):
        return np.exp(eta + rng.standard_normal(np.shape(eta)) * params["log_sd"])

    def reference(self, eta, rows, params):
        from scipy import stats

        return stats.lognorm(params["log_sd"], scale=np.exp(eta))
