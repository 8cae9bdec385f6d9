"""Control limits of a funnel plot: where a group's own estimate would fall by chance alone.

If every group had the population value ``theta`` (a probability per trial, or
a rate per unit of exposure), a group with volume ``V`` (trials, or exposure)
would show a count ``R`` from Binomial(V, theta) or Poisson(V theta), and its
own estimate ``R / V`` would fall between the limits at probability ``p`` and
``1 - p``. The limits follow Spiegelhalter, D. J. (2005), "Funnel plots for
comparing institutional performance", *Statistics in Medicine* 24, 1185-1202,
appendix: with ``r_p`` the ``p`` quantile of the count (the smallest ``r``
with ``P(R <= r) >= p``) and ``alpha = (P(R <= r_p) - p) / P(R = r_p)``, the
limit is ``(r_p - alpha) / V``, a continuous interpolation of the discrete
quantile (formula quoted from memory of the paper; the tests check it against
the normal approximation ``theta +- z sqrt(theta (1 - theta) / V)``, which it
approaches for large volumes). The usual two pairs are 95% and 99.8%
(``p`` = 0.025 and 0.001).
"""
from __future__ import annotations

import numpy as np
from scipy import stats

#: Two-sided coverage of the limits drawn in the report.
LEVELS = (0.95, 0.998)
#: Count distributions by the family's ``outcome_scale``.
_COUNTS = {"probability": lambda volume, theta: stats.binom(np.round(volume).astype(np.int64), theta),
           "rate": lambda volume, theta: stats.poisson(volume * theta)}


def applies(kind: str) -> bool:
    """Whether funnel limits exist for an outcome scale (``probability`` or ``rate``)."""
    return kind in _COUNTS


def limits(kind: str, theta: float, volume, p: float) -> np.ndarray:
    """The ``p`` limit of a group's own estimate at each ``volume`` (same units as ``theta``).

    Parameters
    ----------
    kind : str
        ``probability`` (binomial counts out of ``volume`` trials) or ``rate``
        (Poisson counts over ``volume`` units of exposure).
    theta : float
        The population value per trial or per unit of exposure.
    volume : array_like
        Trials or exposure (positive).
    p : float
        Lower-tail probability (0.025 for the lower 95% limit, 0.975 for the upper one).
    """
    volume = np.asarray(volume, dtype=float)
    dist = _COUNTS[kind](volume, theta)
    r = dist.ppf(p)
    at, below = dist.cdf(r), dist.cdf(r - 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        alpha = np.where(at > below, (at - p) / (at - below), 0.0)
    return np.clip((r - alpha) / volume, 0.0, None)
