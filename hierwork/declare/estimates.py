"""Checks of the ``estimates`` section that span several keys (before the data are read).

Reference values (``at``) must name predictors of the model; a ``target`` must
lie on the outcome's scale (a probability strictly between 0 and 1 for a logit
link, a positive rate for a log link); ``rate_per`` applies only to families
with an exposure; each contrast names a factor of ``groups`` and two different
groups. What needs the data (a level or a group that does not occur, a
numeric predictor given a level) is checked when the plan is made
(:mod:`hierwork.plan.estimands`).
"""
from __future__ import annotations

import math

from hierwork.errors import SpecError, choices_hint
from hierwork.plan.families import get_family

#: Words ``estimates.at`` accepts besides numbers and levels.
REFERENCE_WORDS = ("mean", "zero")
#: Open range of the outcome's scale by link (no entry: any finite value).
OUTCOME_RANGE = {"logit": (0.0, 1.0, "a probability strictly between 0 and 1"),
                 "log": (0.0, math.inf, "a rate above 0")}


def model_predictors(predictors, factors) -> dict:
    """Predictor columns of the model -> what they are (population, varying slope, group-level)."""
    found: dict = {}
    for p in predictors:
        found.setdefault(p.column, "population predictor")
    for f in factors:
        for term in f.varying[1:]:
            found.setdefault(term, f"varying slope of {f.name}")
        for col in f.predictors:
            found.setdefault(col, f"group-level predictor of {f.name}")
    return found


def check_estimates(values: dict, outcome, predictors, factors, doc) -> None:
    """Raise :class:`SpecError` (file, line, key) for an ``estimates`` section that cannot apply."""
    est = values["estimates"]
    known = model_predictors(predictors, factors)
    for name in est["at"]:
        if name not in known:
            raise SpecError(f"{name!r} is not a predictor of the model", where=doc.where(f"estimates.at.{name}"),
                            hint=choices_hint(name, list(known)) if known else "the model has no predictors")
    family = get_family(outcome.family)
    if est["rate_per"] != 1.0 and "exposure" not in family.columns:
        raise SpecError(f"'rate_per' does not apply to family {family.name!r}", where=doc.where("estimates.rate_per"),
                        hint="it scales rates per unit of exposure (poisson, negative_binomial); remove it")
    target = est["target"]
    if target is not None and family.link in OUTCOME_RANGE:
        low, high, what = OUTCOME_RANGE[family.link]
        if not low < target["value"] < high:
            raise SpecError(f"target {target['value']!r} is not on the outcome's scale",
                            where=doc.where("estimates.target.value"),
                            hint=f"family {family.name!r} needs {what}")
    names = [f.name for f in factors]
    for i, contrast in enumerate(est["contrasts"]):
        base = f"estimates.contrasts[{i}]"
        if contrast["factor"] not in names:
            raise SpecError(f"factor {contrast['factor']!r} is not in 'groups'", where=doc.where(f"{base}.factor"),
                            hint=choices_hint(contrast["factor"], names))
        pair = contrast["groups"]
        if len(pair) != 2 or pair[0] == pair[1]:
            raise SpecError(f"a contrast compares two different groups, got {pair!r}", where=doc.where(f"{base}.groups"),
                            hint="write groups: [A, B]; the difference is A - B")
