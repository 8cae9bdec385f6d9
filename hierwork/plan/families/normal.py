"""Normal outcomes, identity link; optionally with known per-row standard errors (meta-analysis)."""
from __future__ import annotations

import numpy as np

from hierwork.plan.families.base import Family, OutcomeRows, sigma_of

_LOG_2PI = float(np.log(2 * np.pi))


class Normal(Family):
    name = "normal"
    link = "identity"
    link_scale = "outcome units"
    columns = ("known_sd",)
    exact_normal = True
    glm_one_step = True
    summary = "continuous outcome, normal errors (identity link); known_sd for known standard errors"
    example_params = {"residual_sd": 1.0}

    def parameters(self, rows: OutcomeRows) -> tuple:
        return () if rows.known_sd is not None else ("residual_sd",)

    def link_centre_spread(self, rows):
        return outcome_centre_spread(rows.y)

    def extra_priors(self, rows, spread):
        from hierwork.plan.priors import residual_sd_prior

        return {} if rows.known_sd is not None else {"residual_sd": residual_sd_prior(spread)}

    def working_response(self, rows):
        return rows.y, (rows.known_sd ** 2 if rows.known_sd is not None else None)

    def glm_start(self, rows):
        return rows.y

    def glm_working(self, rows, eta, state):
        w = np.ones(rows.n) if rows.known_sd is None else 1.0 / rows.known_sd ** 2
        return rows.y, w

    def information(self, eta, rows, params):
        """``1 / sigma^2`` per row (the known SDs, else ``residual_sd``), whatever ``eta``."""
        return 1.0 / sigma_of(rows, params) ** 2

    def likelihood(self, eta, y, rows, params):
        import pymc as pm

        pm.Normal("y", mu=eta, sigma=sigma_of(rows, params), observed=y)

    def log_density(self, y, eta, rows, params):
        sigma = sigma_of(rows, params)
        return -0.5 * (_LOG_2PI + 2 * np.log(sigma) + ((y - eta) / sigma) ** 2)

    def simulate(self, rng, eta, rows, params):
        return eta + rng.standard_normal(np.shape(eta)) * sigma_of(rows, params)

    def reference(self, eta, rows, params):
        from scipy import stats

        return stats.norm(eta, sigma_of(rows, params))


def outcome_centre_spread(y) -> tuple[float, float]:
    """Mean and SD of a continuous outcome (SD 1 when it cannot be estimated)."""
    sd = float(np.std(y, ddof=1)) if len(y) > 1 else 1.0
    return float(np.mean(y)), sd if sd > 0 else 1.0
