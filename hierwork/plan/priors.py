"""Priors: the one table of prior distributions, and the default rule scaled to the data.

Distributions (:data:`DISTRIBUTIONS`) are PyMC's, named in snake case with PyMC's
parameter names; each entry knows its PyMC class, which parameters must be
positive, what it can be the prior of (a real number, a positive number, a
correlation matrix) and its log density for checks after sampling.

Default rule (``hierwork check`` marks defaults with ``*``; ``plan.json`` stores
each default with the sentence that derived it). Let ``S`` be the outcome's
reference spread on the linear predictor's scale (its SD for normal and
Student-t outcomes; the SD of its logarithm for the positive amounts of gamma
and lognormal, observed directly as the SD is; half a unit of log-odds or log
rate for proportions and counts, i.e. odds or rates multiplied by 1.65) and
``m`` its centre there (mean, logit of the pooled share, log of the pooled
rate, log of the mean, mean of the logarithm). With ``M = 5`` spreads and
``z = 2.576`` (the 99% point of the normal):

* **coefficient** of a term whose values span the observed range ``R`` (an
  indicator of a categorical level: ``R = 1``): ``normal(0, M S / (z R))``:
  with 99% prior probability, moving the term from its smallest to its largest
  observed value shifts the linear predictor by less than five spreads;
* **intercept** (the linear predictor with every term at 0): the linear
  predictor at the terms' means is ``normal(m, M S / z)`` a priori, and the
  intercept gets the distribution this implies with the coefficient priors,
  ``normal(m, sqrt((M S / z)^2 + sum_k sd_k^2 mean_k^2))``;
* **SD of varying intercepts**: ``exponential`` with median ``S`` (99% below
  ``6.6 S``); **SD of a varying slope** of a term with range ``R``: median
  ``S / R``, so the typical group's slope moves the linear predictor across
  the range by up to one spread;
* **residual SD** (normal, Student-t), and its log-scale counterparts lognormal
  ``log_sd`` and gamma ``cv`` (for a gamma, the SD of log outcome is about its
  coefficient of variation): ``exponential`` with median ``S``;
* **SD of the log residual SDs** of a factor with ``spread: varying``
  (``F.spread.sd``): ``exponential`` with median 0.35, so a typical group's
  residual SD is within a factor of about 1.4 of the population's (99% prior
  probability that the SD is below 2.3, groups then differing by factors of up to 10);
* **correlations** of varying terms: ``lkj(eta=2)``, which mildly favours
  weaker correlations;
* family parameters: Student-t ``nu`` ``gamma(2, 0.1)`` (Juarez and Steel 2010,
  J. Business and Economic Statistics 28, 541-551); negative-binomial
  ``dispersion`` ``gamma(2, 0.1)``; beta-binomial ``concentration``
  ``exponential`` with median the median number of trials ``n`` (a typical
  row's binomial variance about doubled, ``1 + (n - 1) / (n + 1)``; 98% between
  ``n / 70`` and ``6.6 n``); zero-inflated Poisson ``zero_inflation``
  ``beta(1, 1)``; ordinal: each gap between consecutive cut-points (``cutpoints.gap[a|b]``, the
  first cut-point fixed at 0) ``lognormal`` with median the gap between the logits of the observed
  cumulative shares (half a row added to each level) and log-scale SD 1 (99% within a factor of 13).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from hierwork.errors import SpecError, choices_hint

#: Spreads the linear predictor may move across a term's observed range (99% prior probability).
SPREADS = 5.0
#: The normal's 99% two-sided point.
Z99 = 2.5758293035489004
_LN2 = math.log(2.0)


@dataclass(frozen=True)
class Distribution:
    """One prior distribution of the table.

    ``supports`` lists what it can be the prior of: ``real``, ``positive``
    (uniform only with ``lower >= 0``), ``probability`` (uniform only within 0
    and 1) or ``correlation``.
    """

    name: str
    pymc: str
    params: tuple
    positive: tuple
    supports: tuple

    def logpdf(self, x, params: dict):
        """Log density at ``x`` (scipy; ``lkj``: ``x`` are correlation matrices, up to a constant)."""
        import numpy as np
        from scipy import stats

        p = params
        if self.name == "lkj":
            x = np.asarray(x, dtype=float)
            return (p["eta"] - 1.0) * np.linalg.slogdet(x)[1]
        frozen = {
            "normal": lambda: stats.norm(p["mu"], p["sigma"]),
            "student_t": lambda: stats.t(p["nu"], p["mu"], p["sigma"]),
            "cauchy": lambda: stats.cauchy(p["alpha"], p["beta"]),
            "uniform": lambda: stats.uniform(p["lower"], p["upper"] - p["lower"]),
            "half_normal": lambda: stats.halfnorm(0, p["sigma"]),
            "half_student_t": lambda: stats.t(p["nu"], 0, p["sigma"]),
            "half_cauchy": lambda: stats.halfcauchy(0, p["beta"]),
            "exponential": lambda: stats.expon(0, 1.0 / p["lam"]),
            "gamma": lambda: stats.gamma(p["alpha"], 0, 1.0 / p["beta"]),
            "beta": lambda: stats.beta(p["alpha"], p["beta"]),
            "lognormal": lambda: stats.lognorm(p["sigma"], 0, np.exp(p["mu"])),
        }[self.name]()
        out = frozen.logpdf(x)
        return out + np.log(2.0) if self.name == "half_student_t" else out


DISTRIBUTIONS = {d.name: d for d in (
    Distribution("normal", "Normal", ("mu", "sigma"), ("sigma",), ("real",)),
    Distribution("student_t", "StudentT", ("nu", "mu", "sigma"), ("nu", "sigma"), ("real",)),
    Distribution("cauchy", "Cauchy", ("alpha", "beta"), ("beta",), ("real",)),
    Distribution("uniform", "Uniform", ("lower", "upper"), (), ("real", "positive", "probability")),
    Distribution("half_normal", "HalfNormal", ("sigma",), ("sigma",), ("positive",)),
    Distribution("half_student_t", "HalfStudentT", ("nu", "sigma"), ("nu", "sigma"), ("positive",)),
    Distribution("half_cauchy", "HalfCauchy", ("beta",), ("beta",), ("positive",)),
    Distribution("exponential", "Exponential", ("lam",), ("lam",), ("positive",)),
    Distribution("gamma", "Gamma", ("alpha", "beta"), ("alpha", "beta"), ("positive",)),
    Distribution("beta", "Beta", ("alpha", "beta"), ("alpha", "beta"), ("probability",)),
    Distribution("lognormal", "LogNormal", ("mu", "sigma"), ("sigma",), ("positive",)),
    Distribution("lkj", "LKJCorr", ("eta",), ("eta",), ("correlation",)),
)}


@dataclass(frozen=True)
class Prior:
    """A resolved prior: distribution, parameters, whether it is a default, what it is the prior of.

    ``rule`` says how a default was derived (empty for priors the spec sets).
    """

    dist: str
    params: dict
    default: bool
    support: str  # "real", "positive", "probability" or "correlation"
    rule: str = ""

    def text(self) -> str:
        """Readable form, e.g. ``normal(mu=0, sigma=2.5)``."""
        from hierwork.formatting import number

        args = ", ".join(f"{k}={number(v)}" for k, v in self.params.items())
        return f"{self.dist}({args})"

    def logpdf(self, x):
        """Log density of the prior at ``x`` (see :meth:`Distribution.logpdf`)."""
        return DISTRIBUTIONS[self.dist].logpdf(x, self.params)

    def to_dict(self) -> dict:
        out = {"dist": self.dist, "params": self.params, "default": self.default}
        if self.rule:
            out["rule"] = self.rule
        return out


def coefficient_prior(spread: float, span: float, what: str) -> Prior:
    """``normal(0, M S / (z R))`` for a term spanning ``R`` (see the module docstring)."""
    span = span if span > 0 else 1.0
    sigma = SPREADS * spread / (Z99 * span)
    return Prior("normal", {"mu": 0.0, "sigma": sigma}, True, "real",
                 f"moving {what} across its observed range ({_n(span)}) shifts the linear predictor by "
                 f"less than {SPREADS:g} x {_n(spread)} with 99% prior probability")


def intercept_prior(centre: float, spread: float, terms: list) -> Prior:
    """The intercept (all terms at 0) implied by the linear predictor at the terms' means.

    ``terms`` are ``(mean, coefficient prior SD)`` of every term but the intercept.
    """
    at_means = SPREADS * spread / Z99
    sigma = math.sqrt(at_means ** 2 + sum((sd * mean) ** 2 for mean, sd in terms))
    return Prior("normal", {"mu": centre, "sigma": sigma}, True, "real",
                 f"the linear predictor at the terms' means lies within {SPREADS:g} x {_n(spread)} of "
                 f"{_n(centre)} with 99% prior probability; moved to the terms at 0 with the coefficient priors")


def group_sd_prior(spread: float, span: float | None, what: str) -> Prior:
    """``exponential`` with median ``S`` (intercepts) or ``S / R`` (slopes)."""
    median = spread / (span if span else 1.0)
    return Prior("exponential", {"lam": _LN2 / median}, True, "positive",
                 f"median {_n(median)}: {what} typically differ from the population by up to {_n(spread)}"
                 + " across the term's range" * bool(span) + "; 99% below 6.6 times the median")


def residual_sd_prior(spread: float, what: str = "the outcome's SD") -> Prior:
    """``exponential`` with median one outcome spread (``what`` names it in the rule)."""
    return Prior("exponential", {"lam": _LN2 / spread}, True, "positive", f"median {_n(spread)}, {what}")


#: Median of the default prior of ``F.spread.sd`` (log scale: group SDs typically within x1.4).
SPREAD_SD_MEDIAN = 0.35


def spread_sd_prior(factor: str) -> Prior:
    """``exponential`` with median :data:`SPREAD_SD_MEDIAN` for the SD of a factor's log residual SDs."""
    return Prior("exponential", {"lam": _LN2 / SPREAD_SD_MEDIAN}, True, "positive",
                 f"median {SPREAD_SD_MEDIAN:g} on the log scale: a typical {factor}'s residual SD is within a "
                 f"factor of {math.exp(SPREAD_SD_MEDIAN):.2g} of the population's; 99% below "
                 f"{SPREAD_SD_MEDIAN * math.log(100) / _LN2:.2g}")


def correlation_prior() -> Prior:
    return Prior("lkj", {"eta": 2.0}, True, "correlation", "lkj(eta=2): mildly favours weaker correlations")


def _n(value: float) -> str:
    from hierwork.formatting import number

    return number(value)


def default_priors(family, rows, term_stats: dict, centre: float, spread: float, factors) -> dict:
    """Default priors of every parameter of a plan, by the rule of the module docstring.

    Parameters
    ----------
    family : Family
    rows : OutcomeRows
    term_stats : dict
        Population term (not the intercept) -> ``(mean, observed range)``.
    centre, spread : float
        ``m`` and ``S`` (:meth:`Family.link_centre_spread`).
    factors : sequence of (name, varying terms, group-level predictor stats ``{column: (mean, range)}``)

    Returns
    -------
    dict
        Parameter name -> :class:`Prior`, in display order.
    """
    coefficients = {term: coefficient_prior(spread, span, term) for term, (_, span) in term_stats.items()}
    for name, _, gp_stats in factors:
        for col, (_, span) in gp_stats.items():
            coefficients[f"{name}.{col}"] = coefficient_prior(spread, span, f"{name}'s {col}")
    means = [(term_stats[t][0], p.params["sigma"]) for t, p in coefficients.items() if t in term_stats]
    means += [(gp_stats[col][0], coefficients[f"{name}.{col}"].params["sigma"])
              for name, _, gp_stats in factors for col in gp_stats]
    out = {"intercept": intercept_prior(centre, spread, means)}
    out.update({t: coefficients[t] for t in term_stats})
    out.update(family.extra_priors(rows, spread))
    for name, varying, gp_stats in factors:
        out[f"{name}.sd"] = group_sd_prior(spread, None, f"{name} intercepts")
        for term in varying[1:]:
            out[f"{name}.{term}.sd"] = group_sd_prior(spread, term_stats[term][1], f"{name} slopes of {term}")
        if len(varying) > 1:
            out[f"{name}.corr"] = correlation_prior()
        out.update({f"{name}.{col}": coefficients[f"{name}.{col}"] for col in gp_stats})
    return out


#: How a message names what a parameter is, by its support.
_SUPPORT_WORDS = {"correlation": "a correlation matrix", "probability": "a probability"}


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
            allowed = [d for d, dist in DISTRIBUTIONS.items() if support in dist.supports]
            if ps.dist not in allowed:
                raise SpecError(f"{ps.dist!r} cannot be the prior of {key!r}, which is "
                                f"{_SUPPORT_WORDS.get(support, support)}",
                                where=spec.where(f"priors.{key}"), hint=f"use one of: {', '.join(allowed)}")
            if support == "positive" and ps.dist == "uniform" and ps.params["lower"] < 0:
                raise SpecError(f"uniform prior of {key!r} must have lower >= 0", where=spec.where(f"priors.{key}"))
            if support == "probability" and ps.dist == "uniform" and not 0 <= ps.params["lower"] < ps.params["upper"] <= 1:
                raise SpecError(f"uniform prior of {key!r} must lie within 0 and 1", where=spec.where(f"priors.{key}"),
                                hint="write e.g. uniform: {lower: 0, upper: 0.5}")
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
