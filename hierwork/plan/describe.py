"""The plan for people and for files: the text ``hierwork check`` prints, and ``plan.json``.

The text has three parts: what is modelled (data, outcome, terms), one small
table per grouping factor (how many groups and how large they are), the priors
(defaults marked), and then every decision hierwork took for the fit, each
with its reason.
"""
from __future__ import annotations

import numpy as np

from hierwork.formatting import number

#: Columns of the per-factor table.
_SIZE_HEADINGS = ("groups", "smallest", "median", "largest", "one-row groups")


def group_sizes(f) -> dict:
    """Size summary of one factor's groups (rows per group)."""
    s = f.sizes
    return {"groups": int(f.n_groups), "smallest": int(s.min()), "median": float(np.median(s)),
            "largest": int(s.max()), "one_row_groups": int((s == 1).sum())}


def plan_as_dict(plan, decisions: dict | None = None) -> dict:
    """The resolved plan as JSON-ready data (``plan.json`` in the run folder)."""
    return {
        "format": "hierwork-plan/1",
        "rows": plan.n,
        "family": plan.family.name,
        "link": plan.family.link,
        "missing": plan.missing,
        "terms": list(plan.terms),
        "design": plan.design.to_dict(),
        "factors": [{
            "name": f.name, "column": f.column, "groups": f.n_groups, "within": f.parent,
            "varying": list(f.varying), "predictors": list(f.predictors),
            "predictor_design": f.group_design.to_dict(), "spread": f.spread, "sizes": group_sizes(f),
            "parameterisation": f.parameterisation, "reason": f.reason,
            **({} if f.weights is None else {"partial_weights": {  # per group, then per varying term
                "groups": list(f.levels), "terms": list(f.varying), "weights": np.round(f.weights, 4).tolist()}}),
        } for f in plan.factors],
        "priors": {k: p.to_dict() for k, p in plan.priors.items()},
        "notes": list(plan.notes),
        "estimands": plan.estimands.to_dict(),
        **(decisions or {}),
        **_shift_entry(plan, (decisions or {}).get("path")),
    }


def _shift(plan, path):
    """The decision row of the shifted population coefficients, or None (:mod:`hierwork.model.paths`)."""
    from hierwork.model.paths import shift_decision

    return shift_decision(plan, path) if path else None


def _shift_entry(plan, path) -> dict:
    """plan.json's ``shifted_terms`` (sampled plus their factors' mean effects) and ``shift_reason``."""
    from hierwork.model.paths import shifted_columns

    row = _shift(plan, path)  # the semi-collapsed path shifts the same columns (its factors cross the integrated one)
    return {} if row is None else {"shifted_terms": [plan.terms[c] for c in shifted_columns(plan)],
                                   "shift_reason": row[2]}


def missing_text(missing: dict) -> str:
    """``3 of 120 rows removed for missing values (yield 2, dose 1)``; empty when none were."""
    if not missing or not missing.get("rows_removed"):
        return ""
    counts = ", ".join(f"{column} {count:,}" for column, count in missing["by_column"].items())
    return (f"{missing['rows_removed']:,} of {missing['rows_read']:,} rows removed for missing values "
            f"(missing: drop; rows with a gap per column: {counts})")


def missing_lines(missing: dict) -> list[str]:
    """The ``check`` line of the ``missing`` policy when it is ``drop``."""
    if not missing or missing.get("policy") != "drop":
        return []
    return [f"  missing  {missing_text(missing) or 'drop: no row had a missing value'}"]


def _size_table(f) -> list[str]:
    sizes = group_sizes(f)
    values = [number(v) for v in sizes.values()]
    widths = [max(len(h), len(v)) for h, v in zip(_SIZE_HEADINGS, values)]
    return ["    " + "  ".join(h.rjust(w) for h, w in zip(_SIZE_HEADINGS, widths)),
            "    " + "  ".join(v.rjust(w) for v, w in zip(values, widths))]


def describe(plan, decisions: list) -> str:
    """Readable plan.

    Parameters
    ----------
    plan : ModelPlan
    decisions : list of (what, choice, reason)
        Choices made for the fit (path, engine), shown after each factor's form.
    """
    spec = plan.spec
    outcome = spec.outcome
    extras = [f"{k} {getattr(outcome, k)!r}" for k in ("trials", "exposure", "known_sd") if getattr(outcome, k)]
    lines = [f"{spec.path}: {spec.title} ({spec.name})",
             f"  data     {spec.data_path} ({plan.n:,} rows used)",
             *missing_lines(plan.missing),
             f"  outcome  {outcome.column}: {plan.family.name}, {plan.family.link} link"
             + (f" ({'; '.join(extras)})" if extras else ""),
             f"  terms    {', '.join(plan.terms)}",
             f"  groups compared at  {plan.estimands.text()}",
             f"  outcome scale       {plan.estimands.label}"]
    for f in plan.factors:
        nest = f", nested in {f.parent}" if f.parent else ""
        lines += ["", f"factor {f.name} (column {f.column!r}{nest}): rows per group", *_size_table(f),
                  f"    varies: {', '.join(f.varying)}"
                  + (f"; group-level predictors: {', '.join(f.predictors)}" if f.predictors else "")
                  + ("; residual SD: each group its own (spread: varying)" if f.spread == "varying" else "")]
    lines += ["", "priors (* = default, scaled to the data: rule in the README, derivation in plan.json)"]
    width = max(len(k) for k in plan.priors)
    for key, prior in plan.priors.items():
        lines.append(f"  {'*' if prior.default else ' '} {key:<{width}}  {prior.text()}")
    lines += ["", "decisions"]
    rows = list(decisions)
    shift = _shift(plan, next((choice for what, choice, _ in decisions if what == "path"), None))
    from hierwork.model.paths import sampled_plan

    path = next((choice for what, choice, _ in decisions if what == "path"), None)
    sampled = set() if path == "collapsed" else {f.name for f in sampled_plan(plan, path).factors}
    for f in plan.factors:
        form = f.parameterisation.replace("_", "-")
        if f.name not in sampled:
            rows.append((f"{f.name} effects", "integrated out",
                         f"exact on the {path.replace('_', '-')} path (if sampled: {form}, {f.reason})"))
        else:
            rows.append((f"{f.name} effects", f"sampled {form}", f.reason))
    rows += [shift] if shift else []
    width = max(len(what) for what, _, _ in rows)
    lines += [f"  {what:<{width}}  {choice}: {reason}" for what, choice, reason in rows]
    lines += [f"note: {note}" for note in plan.notes]
    return "\n".join(lines)
