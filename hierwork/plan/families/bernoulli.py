"""0/1 outcomes, logit link: a binomial with one trial per row."""
from __future__ import annotations

import numpy as np
from scipy import special

from hierwork.plan.families.binomial import Binomial


class Bernoulli(Binomial):
    name = "bernoulli"
    columns = ()
    required = ()
    exact_cells = True
    summary = "0/1 outcome (logit link)"

    def trials(self, rows):
        return np.ones_like(rows.y) if rows.y is not None else 1.0

    def check_data(self, rows, fail):
        bad = ~np.isin(rows.y, (0.0, 1.0))
        if bad.any():
            fail(bad, "outcome", "must be 0 or 1 for family bernoulli",
                 "code the outcome as 0/1, or use binomial with a trials column")

    def likelihood(self, eta, y, rows, params):
        import pymc as pm

        pm.Bernoulli("y", logit_p=eta, observed=y)

    def log_density(self, y, eta, rows, params):
        return y * special.log_expit(eta) + (1 - y) * special.log_expit(-eta)

    def simulate(self, rng, eta, rows, params):
        return (rng.random(np.shape(eta)) < special.expit(eta)).astype(float)

    def reference(self, eta, rows, params):
        from scipy import stats

        return stats.bernoulli(special.expit(eta))
