"""The gate's checks: one table that the gate, report, compare, batch remedies and summaries read.

Each check compares one number from the fit with a threshold set under the
spec's ``gate:`` key. ``kind`` says what a failure means for remedies:
``mixing`` (chains disagree or too few effective draws: more draws, another
parameterisation), ``divergences`` (curvature the integrator cannot follow:
smaller steps) and ``geometry`` (poor exploration of the energy or very long
trajectories: reparameterise). Light on purpose: nothing numeric is imported.

Sources of the checks and thresholds:

* rank-normalised split R-hat, bulk ESS and tail ESS over every element of
  every sampled quantity (Vehtari, Gelman, Simpson, Carpenter and Bürkner 2021,
  "Rank-normalization, folding, and localization: an improved R-hat", Bayesian
  Analysis 16, 667-718; thresholds 1.01 and 400 are that paper's
  recommendations);
* divergent transitions after warm-up (Betancourt 2017, "A conceptual
  introduction to Hamiltonian Monte Carlo", arXiv:1701.02434: any divergence
  signals a region the sampler could not explore);
* E-BFMI of each chain (Betancourt 2016, "Diagnosing suboptimal cotangent
  disintegrations in Hamiltonian Monte Carlo", arXiv:1604.00695; below 0.3
  flags poor exploration);
* share of iterations that hit the maximum tree depth (an efficiency warning;
  the 5% default is common practice, not from a publication).
"""
from __future__ import annotations

from dataclasses import dataclass

from hierwork.formatting import number_against

__all__ = ["CheckDef", "CHECKS", "BY_NAME", "check_def", "broken_text"]


@dataclass(frozen=True)
class CheckDef:
    """One row of the checks table."""

    name: str        # key in diagnostics.json
    label: str       # readable name
    comparison: str  # how a value passes: "<=" or ">="
    key: str         # spec key under ``gate:``
    kind: str        # mixing | divergences | geometry
    advice: str      # what to try when it fails
    source: str

    def passes(self, value: float, threshold: float) -> bool:
        """Whether ``value`` meets ``threshold`` (a missing or non-finite value never does)."""
        if value is None or value != value or value in (float("inf"), float("-inf")):
            return False
        return value <= threshold if self.comparison == "<=" else value >= threshold


_VEHTARI = "Vehtari et al. (2021), Bayesian Analysis 16, 667-718"

CHECKS = (
    CheckDef("r_hat", "R-hat", "<=", "r_hat_max", "mixing",
             "chains disagree: run longer (more warmup and draws), or switch the parameterisation of the "
             "factor named in the worst parameter", _VEHTARI),
    CheckDef("ess_bulk", "Bulk ESS", ">=", "ess_bulk_min", "mixing",
             "too few effective draws: increase draws, or switch the parameterisation of the factor named "
             "in the worst parameter", _VEHTARI),
    CheckDef("ess_tail", "Tail ESS", ">=", "ess_tail_min", "mixing",
             "tails poorly explored: increase draws; check for heavy tails or a funnel", _VEHTARI),
    CheckDef("divergences", "Divergent transitions", "<=", "divergences_max", "divergences",
             "the sampler hit curvature it cannot follow (often a funnel): raise sampling.target_accept "
             "(0.95, 0.99) or switch the factor to non_centred", "Betancourt (2017), arXiv:1701.02434"),
    CheckDef("bfmi", "E-BFMI", ">=", "bfmi_min", "geometry",
             "momentum resampling explores the energy poorly: reparameterise (non_centred), or use more "
             "informative priors on the group SDs", "Betancourt (2016), arXiv:1604.00695"),
    CheckDef("treedepth", "Share of draws at maximum tree depth", "<=", "treedepth_share_max", "geometry",
             "trajectories are too long: raise sampling.max_treedepth, or rescale predictors",
             "common practice"),
)

BY_NAME = {c.name: c for c in CHECKS}


def check_def(name: str) -> CheckDef | None:
    """The table row of check ``name`` (None for a name this version does not know)."""
    return BY_NAME.get(name)


#: A failed check broke its comparison the other way.
_BROKEN = {"<=": ">", ">=": "<"}


def broken_text(name: str, value, threshold, comparison: str | None = None) -> str:
    """One failed check in one line, with digits enough to see the failure: ``r_hat 1.0104 > 1.01``."""
    definition = BY_NAME.get(name)
    comparison = comparison or (definition.comparison if definition else "<=")
    return (f"{name} {number_against(value, threshold)} {_BROKEN.get(comparison, 'vs')} "
            f"{number_against(threshold, value)}")
