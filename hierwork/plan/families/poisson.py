"""Counts, log link; optionally per unit of an exposure (log offset)."""
from __future__ import annotations

import numpy as np
from scipy import special

from hierwork.plan.families.base import LINK_SPREAD, Family, OutcomeRows


class Poisson(Family):
    name = "poisson"
    link = "log"
    link_scale = "log rate"
    outcome_scale = "rate"
    columns = ("exposure",)
    discrete = True
    exact_cells = True
    summary = "counts (log link); exposure for counts per unit of time, area, ..."

    def check_data(self, rows, fail):
        self.check_counts(rows, fail, self.name)
        super().check_data(rows, fail)

    def exposure(self, rows: OutcomeRows):
        """Exposure per row (1 without an exposure column)."""
        return rows.exposure if rows.exposure is not None else 1.0

    def offset(self, rows):
        return np.log(rows.exposure) if rows.exposure is not None else 0.0

    def link_centre_spread(self, rows):
        total = np.sum(rows.exposure) if rows.exposure is not None else len(rows.y)
        return float(np.log(max(float(np.sum(rows.y) / total), 1e-3))), LINK_SPREAD

    def working_response(self, rows):
        return np.log((rows.y + 0.5) / self.exposure(rows)), 1.0 / (rows.y + 0.5)

    def boundary(self, rows, index, n_groups):
        return np.bincount(index, rows.y, n_groups) == 0

    def glm_start(self, rows):
        return np.log(rows.y + 0.5)

    def glm_weight(self, mu, state):
        """IRLS weight of a count with mean ``mu``."""
        return mu

    def glm_working(self, rows, eta, state):
        mu = np.exp(eta)
        w = np.maximum(self.glm_weight(mu, state), 1e-12)
        return eta - self.offset(rows) + (rows.y - mu) / mu, w

    def expected(self, eta, rows):
        """Expected count of each row: rate times exposure."""
        return np.exp(eta + self.offset(rows))

    def cells_of(self, rows, cell, n_cells):
        """Counts and exposures summed per cell: a sum of Poissons with one rate is Poisson."""
        exposure = np.bincount(cell, np.broadcast_to(self.exposure(rows), rows.y.shape), n_cells)
        return Poisson(), OutcomeRows(np.bincount(cell, rows.y, n_cells), exposure=exposure)

    def likelihood(self, eta, y, rows, params):
        import pymc as pm
        import pytensor.tensor as pt

        pm.Poisson("y", mu=pt.exp(eta + self.offset(rows)), observed=y)

    def log_density(self, y, eta, rows, params):
        log_mu = eta + self.offset(rows)
        return y * log_mu - np.exp(log_mu) - special.gammaln(y + 1)

    def simulate(self, rng, eta, rows, params):
        return rng.poisson(self.expected(eta, rows)).astype(float)

    def reference(self, eta, rows, params):
        from scipy import stats

        return stats.poisson(self.expected(eta, rows))
