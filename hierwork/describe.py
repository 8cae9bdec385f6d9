"""Plain-text description of a plan, as printed by ``hierwork check``."""
from __future__ import annotations

import numpy as np

from .plan import ModelPlan


def plan_as_dict(plan: ModelPlan, extra: dict | None = None) -> dict:
    """The resolved plan as JSON-ready data (stored as ``plan.json`` in the run folder)."""
    return {
        "format": "hierwork-plan/1",
        "rows": plan.n,
        "family": plan.family,
        "terms": list(plan.terms),
        "factors": [{
            "name": f.name, "column": f.column, "groups": f.n_groups, "within": f.parent,
            "varying": list(f.varying), "predictors": list(f.predictors),
            "sizes": {"min": int(f.sizes.min()), "median": float(np.median(f.sizes)),
                      "max": int(f.sizes.max()), "singletons": int((f.sizes == 1).sum())},
            "parameterisation": f.parameterisation, "reason": f.reason,
        } for f in plan.factors],
        "priors": {k: {"dist": p.dist, "params": p.params, "default": p.default} for k, p in plan.priors.items()},
        "notes": list(plan.notes),
        **(extra or {}),
    }


def describe(plan: ModelPlan, extra: dict | None = None, collapsed: bool = False) -> str:
    """Human-readable plan: rows, factors and group sizes, terms, priors, parameterisation.

    With ``collapsed`` the group effects are integrated out, so the
    parameterisation is shown as what it would be, not what is used.
    """
    spec = plan.spec
    lines = [f"spec      {spec.path}", f"model     {spec.title} ({spec.name})",
             f"data      {spec.data_path}  ({plan.n:,} rows used)",
             f"outcome   {spec.outcome.column} ~ {plan.family}" + _outcome_extras(spec.outcome),
             f"terms     {', '.join(plan.terms)}", "", "grouping factors"]
    for f in plan.factors:
        s = f.sizes
        nest = f" within {f.parent}" if f.parent else ""
        lines.append(f"  {f.name} (column {f.column!r}{nest}): {f.n_groups:,} groups; rows per group "
                     f"min {s.min()}, median {np.median(s):g}, max {s.max()}; singletons {(s == 1).sum()}")
        lines.append(f"    varying: {', '.join(f.varying)}"
                     + (f"; group-level predictors: {', '.join(f.predictors)}" if f.predictors else ""))
        form = f.parameterisation.replace("_", "-")
        if collapsed:
            lines.append(f"    integrated out exactly (collapsed path); if sampled it would be {form}: {f.reason}")
        else:
            lines.append(f"    sampled {form}: {f.reason}")
    lines += ["", "priors (* = default, scaled to the data; see README)"]
    width = max(len(k) for k in plan.priors)
    for key, prior in plan.priors.items():
        lines.append(f"  {'*' if prior.default else ' '} {key:<{width}}  {prior.text()}")
    for key, value in (extra or {}).items():
        lines.append(f"{key:<9} {value}")
    for note in plan.notes:
        lines.append(f"note: {note}")
    return "\n".join(lines)


def _outcome_extras(outcome) -> str:
    parts = [f"{k} {getattr(outcome, k)!r}" for k in ("trials", "exposure", "known_sd") if getattr(outcome, k)]
    return f" ({'; '.join(parts)})" if parts else ""
