"""Priors: the names a spec may set, and weakly informative defaults scaled to the data.

Default rule (documented in the README, printed by ``hierwork check``): let
``s_y`` be the outcome's spread on the scale of the linear predictor (the
outcome's SD for normal and Student-t outcomes, 1 on the logit and log scales)
and ``s_x`` the SD of a numeric predictor. Then

* coefficient of a numeric predictor: ``normal(0, 2.5 s_y / s_x)``; of a
  categorical level: ``normal(0, 2.5 s_y)``;
* intercept: ``normal(m_y, 2.5 s_y + sum_k 2.5 s_y |mean x_k| / s_x_k)``, where
  ``m_y`` is the outcome's mean on the link scale: wide enough to reach it from
  ``x = 0`` with any slope the slope priors allow;
* residual SD and the SD of varying intercepts: ``half_normal(s_y)``; SD of a
  varying slope: ``half_normal(s_y / s_x)``;
* correlations of varying terms: ``lkj(eta=2)``;
* Student-t degrees of freedom ``nu``: ``gamma(2, 0.1)`` (Juárez and Steel 2010);
  negative-binomial ``dispersion`` (PyMC's ``alpha``; variance ``mu + mu^2/alpha``):
  ``gamma(2, 0.1)``.

The 2.5 scaling is common practice for weakly informative priors (Gelman et al.
2008, "A weakly informative default prior distribution for logistic and other
regression models", Ann. Appl. Stat. 2, 1360-1383).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import SpecError, choices_hint

REAL = ("normal", "student_t", "cauchy", "uniform")
POSITIVE = ("half_normal", "half_student_t", "half_cauchy", "exponential", "gamma", "uniform")


@dataclass(frozen=True)
class Prior:
    """A resolved prior: distribution, parameters, and whether it is a default."""

    dist: str
    params: dict
    default: bool
    support: str  # "real", "positive" or "correlation"

    def text(self) -> str:
        """Readable form, e.g. ``normal(mu=0, sigma=2.5)``."""
        args = ", ".join(f"{k}={_fmt(v)}" for k, v in self.params.items())
        return f"{self.dist}({args})"


def _fmt(v: float) -> str:
    return f"{v:.4g}"


def link_scale_outcome(family: str, y: np.ndarray, trials, exposure) -> tuple[float, float]:
    """Centre and spread of the outcome on the linear predictor's scale."""
    if family in ("normal", "student_t"):
        sd = float(np.std(y, ddof=1)) if len(y) > 1 else 1.0
        return float(np.mean(y)), sd if sd > 0 else 1.0
    if family in ("bernoulli", "binomial"):
        p = float(np.sum(y) / (np.sum(trials) if trials is not None else len(y)))
        p = min(max(p, 0.01), 0.99)
        return float(np.log(p / (1 - p))), 1.0
    rate = float(np.sum(y) / (np.sum(exposure) if exposure is not None else len(y)))
    return float(np.log(max(rate, 1e-3))), 1.0


def default_priors(family, terms, x_stats, y_centre, y_spread, factors, known_sd: bool = False) -> dict:
    """Default priors for every parameter of a plan.

    Parameters
    ----------
    family : str
    terms : sequence of str
        Population terms, ``"intercept"`` first.
    x_stats : dict
        Term -> (mean, sd, kind) for non-intercept terms (kind numeric/categorical).
    y_centre, y_spread : float
        From :func:`link_scale_outcome`.
    factors : sequence of (name, varying terms, group-level predictor stats dict)
    known_sd : bool
        Normal outcome with known per-row SDs: no residual SD to put a prior on.

    Returns
    -------
    dict
        Parameter name -> :class:`Prior`, in display order.
    """
    out = {}
    reach = 2.5 * y_spread
    for term in terms[1:]:
        mean, sd, kind = x_stats[term]
        if kind == "numeric":
            reach += 2.5 * y_spread * abs(mean) / sd
    out["intercept"] = Prior("normal", {"mu": y_centre, "sigma": reach}, True, "real")
    for term in terms[1:]:
        mean, sd, kind = x_stats[term]
        scale = 2.5 * y_spread / (sd if kind == "numeric" else 1.0)
        out[term] = Prior("normal", {"mu": 0.0, "sigma": scale}, True, "real")
    if family == "student_t" or (family == "normal" and not known_sd):
        out["residual_sd"] = Prior("half_normal", {"sigma": y_spread}, True, "positive")
    if family == "student_t":
        out["nu"] = Prior("gamma", {"alpha": 2.0, "beta": 0.1}, True, "positive")
    if family == "negative_binomial":
        out["dispersion"] = Prior("gamma", {"alpha": 2.0, "beta": 0.1}, True, "positive")
    for name, varying, gp_stats in factors:
        out[f"{name}.sd"] = Prior("half_normal", {"sigma": y_spread}, True, "positive")
        for term in varying[1:]:
            out[f"{name}.{term}.sd"] = Prior("half_normal", {"sigma": y_spread / x_stats[term][1]}, True,
                                             "positive")
        if len(varying) > 1:
            out[f"{name}.corr"] = Prior("lkj", {"eta": 2.0}, True, "correlation")
        for col, (mean, sd) in gp_stats.items():
            out[f"{name}.{col}"] = Prior("normal", {"mu": 0.0, "sigma": 2.5 * y_spread / sd}, True, "real")
    return out


def apply_user_priors(defaults: dict, spec, categorical_terms: dict) -> dict:
    """Replace defaults by the spec's priors, checking names and supports.

    ``categorical_terms`` maps a categorical column to its level terms, so that
    a prior set on the column applies to every level.
    """
    out = dict(defaults)
    for key, ps in spec.priors.items():
        targets = categorical_terms.get(key, [key])
        if targets[0] not in defaults:
            raise SpecError(f"no parameter called {key!r} in this model", where=spec.where(f"priors.{key}"),
                            hint=choices_hint(key, list(defaults) + list(categorical_terms)))
        for target in targets:
            support = defaults[target].support
            allowed = {"real": REAL, "positive": POSITIVE, "correlation": ("lkj",)}[support]
            if ps.dist not in allowed:
                raise SpecError(f"{ps.dist!r} cannot be the prior of {key!r}, which is "
                                f"{'a correlation matrix' if support == 'correlation' else support}",
                                where=spec.where(f"priors.{key}"), hint=f"use one of: {', '.join(allowed)}")
            if support == "positive" and ps.dist == "uniform" and ps.params["lower"] < 0:
                raise SpecError(f"uniform prior of {key!r} must have lower >= 0", where=spec.where(f"priors.{key}"))
            out[target] = Prior(ps.dist, dict(ps.params), False, support)
    return out


def check_lkj_keys(spec) -> None:
    """An LKJ prior needs a factor with at least two varying terms."""
    for key in spec.priors:
        if key.endswith(".corr"):
            name = key[: -len(".corr")]
            factor = next((f for f in spec.factors if f.name == name), None)
            if factor is not None and len(factor.varying) < 2:
                raise SpecError(f"{key!r}: factor {name!r} has one varying term, so there is no correlation "
                                "to put a prior on", where=spec.where(f"priors.{key}"),
                                hint=f"add a slope to groups.{name}.varying, or remove this prior")
