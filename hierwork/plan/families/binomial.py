"""Successes out of a number of trials, logit link."""
from __future__ import annotations

import numpy as np
from scipy import special

from hierwork.plan.families.base import LINK_SPREAD, Family, OutcomeRows


class Binomial(Family):
    name = "binomial"
    link = "logit"
    link_scale = "log-odds"
    outcome_scale = "probability"
    columns = ("trials",)
    required = ("trials",)
    discrete = True
    exact_cells = True
    summary = "successes out of trials (logit link); needs outcome.trials"

    def trials(self, rows: OutcomeRows):
        """Trials per row (1 for 0/1 outcomes)."""
        return rows.trials

    def check_data(self, rows, fail):
        self.check_counts(rows, fail, self.name)
        super().check_data(rows, fail)

    def link_centre_spread(self, rows):
        p = float(np.sum(rows.y) / np.sum(self.trials(rows)))
        p = min(max(p, 0.01), 0.99)
        return float(np.log(p / (1 - p))), LINK_SPREAD

    def working_response(self, rows):
        y, n = rows.y, self.trials(rows)
        return np.log((y + 0.5) / (n - y + 0.5)), 1.0 / (y + 0.5) + 1.0 / (n - y + 0.5)

    def boundary(self, rows, index, n_groups):
        total = np.bincount(index, rows.y, n_groups)
        trials = np.bincount(index, np.broadcast_to(self.trials(rows), rows.y.shape), n_groups)
        return (total == 0) | (total == trials)

    def glm_start(self, rows):
        p0 = (rows.y + 0.5) / (self.trials(rows) + 1.0)
        return np.log(p0 / (1 - p0))

    def glm_working(self, rows, eta, state):
        n = self.trials(rows)
        p = special.expit(eta)
        w = np.maximum(n * p * (1 - p), 1e-12)
        return eta + (rows.y - n * p) / w, w

    def cells_of(self, rows, cell, n_cells):
        """Successes and trials summed per cell: a sum of binomials with one ``p`` is binomial."""
        trials = np.bincount(cell, np.broadcast_to(self.trials(rows), rows.y.shape), n_cells)
        return Binomial(), OutcomeRows(np.bincount(cell, rows.y, n_cells), trials=trials)

    def likelihood(self, eta, y, rows, params):
        import pymc as pm

        pm.Binomial("y", n=rows.trials, logit_p=eta, observed=y)

    def log_density(self, y, eta, rows, params):
        n = self.trials(rows)
        # log C(n, y) + y log p + (n - y) log(1 - p), with p = expit(eta) kept accurate in the tails
        log_choose = special.gammaln(n + 1) - special.gammaln(y + 1) - special.gammaln(n - y + 1)
        return log_choose + y * special.log_expit(eta) + (n - y) * special.log_expit(-eta)

    def simulate(self, rng, eta, rows, params):
        n = np.asarray(self.trials(rows)).astype(np.int64)
        return rng.binomial(n, special.expit(eta)).astype(float)

    def reference(self, eta, rows, params):
        from scipy import stats

        return stats.binom(self.trials(rows), special.expit(eta))
