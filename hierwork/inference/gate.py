"""The convergence gate: results that fail it are never presented as valid.

The checks, their thresholds (spec key ``gate:``), advice and sources are the
table :data:`hierwork.inference.checks.CHECKS`; this module computes each
check's value and worst parameter on a fit.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass, field

from hierwork import runtime  # noqa: F401  (before ArviZ)

import arviz as az
import numpy as np

from hierwork.inference.checks import CHECKS, broken_text
from hierwork.inference.convergence import diagnose
from hierwork.names import factor_terms, parameter_name


@dataclass(frozen=True)
class Check:
    """One gate check: its value against its threshold, and the worst parameter."""

    name: str
    comparison: str  # "<=" or ">="
    threshold: float
    value: float
    worst_parameter: str | None
    passed: bool
    advice: str = ""


@dataclass(frozen=True)
class GateResult:
    """All checks of one fit; ``passed`` only if every check passed."""

    checks: tuple
    passed: bool
    n_draws: int
    n_chains: int
    extra: dict = field(default_factory=dict)

    def failed(self) -> list:
        return [c for c in self.checks if not c.passed]

    def to_dict(self) -> dict:
        return {"format": "hierwork-diagnostics/1", "passed": self.passed, "chains": self.n_chains,
                "draws_per_chain": self.n_draws, "checks": [asdict(c) for c in self.checks],
                "advice": [c.advice for c in self.failed()], **self.extra}

    def verdict(self) -> str:
        """One line: PASSED, or FAILED with the failing checks."""
        if self.passed:
            return "gate PASSED: all convergence checks within thresholds"
        parts = [broken_text(c.name, c.value, c.threshold, c.comparison)
                 + (f" (worst: {c.worst_parameter})" if c.worst_parameter else "") for c in self.failed()]
        return "gate FAILED: " + "; ".join(parts) + " - estimates are NOT valid"


def _worst(post) -> dict:
    """Worst R-hat (max), bulk and tail ESS (min) over every element of every variable.

    Returns ``{"r_hat" | "ess_bulk" | "ess_tail": (value, name)}`` with reader-facing
    names (:mod:`hierwork.names`); elements whose value is NaN (constants, such as the unit
    diagonal of a correlation matrix) are skipped.
    """
    worst = {"r_hat": (None, None), "ess_bulk": (None, None), "ess_tail": (None, None)}
    for name, da in post.data_vars.items():
        da = da.transpose("chain", "draw", ...)
        values = np.asarray(da.values, dtype=float)
        shape = values.shape[2:]
        results = diagnose(values.reshape(values.shape[:2] + (-1,)))
        for key, result in zip(worst, results):
            if not np.isfinite(result).any():
                continue
            idx = int(np.nanargmax(result) if key == "r_hat" else np.nanargmin(result))
            val, best = float(result[idx]), worst[key][0]
            if best is None or (val > best if key == "r_hat" else val < best):
                worst[key] = (val, _label(post, name, da, np.unravel_index(idx, shape)))
    return {k: (float("nan") if v is None else v, at) for k, (v, at) in worst.items()}


def _label(post, name, da, index) -> str:
    """The reader-facing name of one element of a posterior variable (:mod:`hierwork.names`)."""
    dims = [d for d in da.dims if d not in ("chain", "draw")]
    coords = {d: (da.coords[d].values[i] if d in da.coords else i) for d, i in zip(dims, index)}
    return parameter_name(name, coords, factor_terms(post, name))


def evaluate_gate(idata, gate: dict, max_treedepth: int) -> GateResult:
    """Run every check of the gate on a fit.

    Parameters
    ----------
    idata : arviz.InferenceData
        With ``posterior`` and ``sample_stats`` (diverging, energy, tree depth).
    gate : dict
        The spec's ``gate`` section.
    max_treedepth : int
        The sampler's maximum tree depth, to count saturated iterations.

    Returns
    -------
    GateResult
    """
    post = idata.posterior  # constant elements (correlation diagonals) give NaN and are skipped
    n_chains, n_draws = post.sizes["chain"], post.sizes["draw"]
    worst = _worst(post)
    (rhat_val, rhat_at), (bulk_val, bulk_at), (tail_val, tail_at) = worst.values()
    stats = idata.sample_stats
    divergences = int(stats["diverging"].sum()) if "diverging" in stats else 0
    bfmi = np.atleast_1d(az.bfmi(idata)) if "energy" in stats else np.array([np.nan])
    depth_share = _treedepth_share(stats, max_treedepth)
    worst_chain = int(np.nanargmin(bfmi)) if np.isfinite(bfmi).any() else None

    values = {"r_hat": (rhat_val, rhat_at), "ess_bulk": (bulk_val, bulk_at), "ess_tail": (tail_val, tail_at),
              "divergences": (divergences, _divergence_hint(idata, divergences)),
              "bfmi": (float(np.nanmin(bfmi)) if np.isfinite(bfmi).any() else np.nan,
                       f"chain {worst_chain}" if worst_chain is not None else None),
              "treedepth": (depth_share, None)}
    checks = []
    for definition in CHECKS:
        value, where = values[definition.name]
        threshold = float(gate[definition.key])
        ok = definition.passes(float(value), threshold)
        checks.append(Check(definition.name, definition.comparison, threshold, float(value), where, ok,
                            "" if ok else definition.advice))
    checks = tuple(checks)
    extra = {"bfmi_per_chain": [float(x) for x in bfmi], "divergent_per_chain":
             [int(x) for x in stats["diverging"].sum("draw").values] if "diverging" in stats else []}
    return GateResult(checks=checks, passed=all(c.passed for c in checks), n_draws=n_draws,
                      n_chains=n_chains, extra=extra)


def _treedepth_share(stats, max_treedepth: int) -> float:
    for name in ("reached_max_treedepth", "maxdepth_reached"):
        if name in stats:
            return float(np.asarray(stats[name].values, dtype=float).mean())
    if "tree_depth" in stats:
        return float((stats["tree_depth"].values >= max_treedepth).mean())
    if "depth" in stats:
        return float((stats["depth"].values >= max_treedepth).mean())
    return 0.0


def _divergence_hint(idata, divergences: int) -> str | None:
    """Name the group SD whose value is lowest at divergent draws, relative to its mean (funnel neck)."""
    if divergences == 0:
        return None
    div = idata.sample_stats["diverging"].values.astype(bool)
    worst, worst_ratio = None, np.inf
    for name in idata.posterior.data_vars:
        if not name.endswith("__sd"):
            continue
        values = idata.posterior[name].values
        for k in range(values.shape[-1] if values.ndim > 2 else 1):
            v = values[..., k] if values.ndim > 2 else values
            ratio = float(np.mean(v[div]) / np.mean(v)) if np.mean(v) > 0 else np.inf
            if ratio < worst_ratio:
                array = idata.posterior[name]
                coords = {array.dims[-1]: array.coords[array.dims[-1]].values[k]} if values.ndim > 2 else {}
                worst, worst_ratio = parameter_name(name, coords, factor_terms(idata.posterior, name)), ratio
    return worst
