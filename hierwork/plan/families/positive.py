"""What the families of positive continuous outcomes (gamma, lognormal) share.

Both model a positive, right-skewed amount (a cost, a duration, a
concentration) through its logarithm: the linear predictor is on the log scale
and the outcome's scale is the mean in the outcome's own units. Because
``log y`` is observed, the reference spread of the default priors is its SD,
exactly as the outcome's SD is for normal outcomes (``plan/priors.py``).
"""
from __future__ import annotations

import numpy as np

from hierwork.plan.families.base import Family, OutcomeRows


class PositiveOutcome(Family):
    """Base of the families of positive amounts (log link; the mean is on the outcome's scale)."""

    link = "log"
    outcome_scale = "outcome units"

    def check_data(self, rows, fail):
        bad = rows.y <= 0
        if bad.any():
            fail(bad, "outcome", f"must be positive for family {self.name}",
                 f"{self.name} models positive amounts (costs, durations); correct or remove the rows "
                 "with 0 or less, or choose another family")

    @staticmethod
    def log_spread(rows: OutcomeRows) -> float:
        """SD of ``log y`` (1 when it cannot be estimated): the reference spread ``S`` of the default priors."""
        log_y = np.log(rows.y)
        sd = float(np.std(log_y, ddof=1)) if len(log_y) > 1 else 1.0
        return sd if sd > 0 else 1.0

    def working_response(self, rows):
        return np.log(rows.y), None

    def glm_start(self, rows):
        return np.log(rows.y)
