"""Positive amounts with a gamma distribution, log link: SD proportional to the mean (``cv`` times it)."""
from __future__ import annotations

import numpy as np
from scipy import special

from hierwork.plan.families.positive import PositiveOutcome


class Gamma(PositiveOutcome):
    """Gamma outcome with mean ``mu = exp(eta)`` and coefficient of variation ``cv``.

    Shape ``1 / cv^2`` and rate ``1 / (cv^2 mu)``: the SD is ``cv`` times the
    mean in every row, the usual picture of costs and durations. The coefficient
    of variation is unit-free and reads directly ("costs vary by about 40%
    around a depot's mean").
    """

    name = "gamma"
    link_scale = "log mean"
    summary = "positive amounts (costs, durations) with SD proportional to the mean: gamma (log link)"
    example_params = {"cv": 0.5}

    def parameters(self, rows):
        return ("cv",)

    def link_centre_spread(self, rows):
        return float(np.log(np.mean(rows.y))), self.log_spread(rows)

    def extra_priors(self, rows, spread):
        from hierwork.plan.priors import residual_sd_prior

        return {"cv": residual_sd_prior(spread, "the SD of log outcome (about a gamma's coefficient of variation)")}

    def glm_working(self, rows, eta, state):
        """Gamma IRLS with log link: working response ``eta + (y - mu) / mu``, equal weights
        (variance ``mu^2`` times ``(d mu / d eta)^{-2} = mu^{-2}``; McCullagh and Nelder 1989, §8.3)."""
        mu = np.exp(eta)
        return eta + (rows.y - mu) / mu, np.ones(rows.n)

    def information(self, eta, rows, params):
        """``1 / cv^2`` (the shape) per row, whatever ``eta``: the score is ``shape (y / mu - 1)``."""
        return 1.0 / params["cv"] ** 2

    def likelihood(self, eta, y, rows, params):
        import pymc as pm
        import pytensor.tensor as pt

        shape = 1.0 / params["cv"] ** 2
        pm.Gamma("y", alpha=shape, beta=shape * pt.exp(-eta), observed=y)

    def log_density(self, y, eta, rows, params):
        shape = 1.0 / params["cv"] ** 2
        log_rate = np.log(shape) - eta
        return shape * log_rate - special.gammaln(shape) + (shape - 1) * np.log(y) - np.exp(log_rate) * y

    def simulate(self, rng, eta, rows, params):
        shape = np.broadcast_to(1.0 / params["cv"] ** 2, np.shape(eta))
        return rng.gamma(shape, np.exp(eta) / shape)

    def reference(self, eta, rows, params):
        from scipy import stats

        shape = 1.0 / params["cv"] ** 2
        return stats.gamma(shape, scale=np.exp(eta) / shape)
