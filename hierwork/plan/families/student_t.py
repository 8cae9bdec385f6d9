"""Continuous outcomes with heavy-tailed (Student-t) errors, identity link."""
from __future__ import annotations

import numpy as np
from scipy import special

from hierwork.plan.families.base import Family
from hierwork.plan.families.normal import outcome_centre_spread

#: Degrees of freedom of the robust maximum-likelihood baselines (a common robust choice).
BASELINE_NU = 4.0


class StudentT(Family):
    name = "student_t"
    link = "identity"
    link_scale = "outcome units"
    summary = "continuous outcome with occasional outliers: Student-t errors (identity link)"
    example_params = {"residual_sd": 1.0, "nu": 5.0}

    def parameters(self, rows):
        return ("residual_sd", "nu")

    def link_centre_spread(self, rows):
        return outcome_centre_spread(rows.y)

    def extra_priors(self, rows, spread):
        from hierwork.plan.priors import Prior, residual_sd_prior

        return {"residual_sd": residual_sd_prior(spread),
                "nu": Prior("gamma", {"alpha": 2.0, "beta": 0.1}, True, "positive",
                            "gamma(2, 0.1) (Juarez and Steel 2010)")}

    def working_response(self, rows):
        return rows.y, None

    def glm_start(self, rows):
        return rows.y

    def glm_working(self, rows, eta, state):
        """EM weights of Lange, Little and Taylor (1989, JASA 84, 881-896), ``nu`` fixed at 4."""
        if not state.get("weighted"):
            state["weighted"] = True
            return rows.y, np.ones(rows.n)
        r = rows.y - eta
        s2 = max(float(np.sum(r * r) / rows.n), 1e-300)
        return rows.y, (BASELINE_NU + 1) / (BASELINE_NU + r * r / s2)

    def information(self, eta, rows, params):
        """``(nu + 1) / ((nu + 3) sigma^2)`` per row: the location information of a Student-t
        (Lange, Little and Taylor 1989, JASA 84, 881-896, section 3), whatever ``eta``."""
        nu = params["nu"]
        return (nu + 1) / ((nu + 3) * params["residual_sd"] ** 2)

    def likelihood(self, eta, y, rows, params):
        import pymc as pm

        pm.StudentT("y", nu=params["nu"], mu=eta, sigma=params["residual_sd"], observed=y)

    def log_density(self, y, eta, rows, params):
        nu, sigma = params["nu"], params["residual_sd"]
        z = (y - eta) / sigma
        return (special.gammaln((nu + 1) / 2) - special.gammaln(nu / 2) - 0.5 * np.log(nu * np.pi)
                - np.log(sigma) - (nu + 1) / 2 * np.log1p(z * z / nu))

    def simulate(self, rng, eta, rows, params):
        nu = np.broadcast_to(params["nu"], np.shape(eta))
        return eta + rng.standard_t(nu) * params["residual_sd"]

    def reference(self, eta, rows, params):
        from scipy import stats

        return stats.t(params["nu"], eta, params["residual_sd"])
