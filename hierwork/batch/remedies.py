"""Choosing the next attempt after a failed gate, from the policy a spec declares.

The policy format and its steps are documented in :mod:`hierwork.declare.remedies`.
"""
from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass

from hierwork.declare.remedies import Policy, Step
from hierwork.inference.checks import check_def

FORMS = {"centred": "non_centred", "non_centred": "centred"}
#: Checks whose failure says the groups are less informed than the form assumed (funnels).
FUNNEL_KINDS = {"divergences", "geometry"}
#: The checks that more draws alone address.
ESS_CHECKS = ("ess_bulk", "ess_tail")


@dataclass(frozen=True)
class Remedy:
    """The next attempt's changes.

    Attributes
    ----------
    cursor : int
        Index of the first step not yet used (pass it back next time).
    overrides : dict
        Dotted spec path -> new value, to add to the previous attempt's.
    reason : str
        One line for logs and the summary.
    """

    cursor: int
    overrides: dict
    reason: str


def failing_checks(diagnostics: Mapping) -> list[Mapping]:
    """The checks of a ``diagnostics.json`` dict that did not pass."""
    return [c for c in diagnostics.get("checks", []) if not c.get("passed", False)]


def _kinds(failing: list[Mapping]) -> set[str]:
    """What the failing checks mean for remedies (``kind`` in the checks table)."""
    return {definition.kind for c in failing if (definition := check_def(str(c.get("name", "")))) is not None}


def failing_factors(failing: list[Mapping], factors) -> list[str]:
    """Factors named by the failing checks' ``worst_parameter``: reader-facing names (``F.sd``,
    ``F=G T``; :mod:`hierwork.names`) and the internal ones of older runs (``F__sd``, ``F__effect[...]``)."""
    found = []
    for check in failing:
        param = str(check.get("worst_parameter") or "")
        for factor in sorted(factors, key=len, reverse=True):
            if re.match(rf"^{re.escape(factor)}(__\w|[.=])", param) and factor not in found:
                found.append(factor)
                break
    return found


def next_remedy(policy: Policy, cursor: int, attempts_done: int, diagnostics: Mapping,
                current: Mapping) -> Remedy | None:
    """Choose the next attempt's changes after a failed gate, or None to give up.

    Parameters
    ----------
    policy : Policy
    cursor : int
        Index of the first unused step (0 after the first attempt).
    attempts_done : int
        Attempts run so far for this job.
    diagnostics : mapping
        The failed attempt's ``diagnostics.json``.
    current : mapping
        The failed attempt's settings as dotted paths: ``sampling.target_accept``,
        ``sampling.warmup``, ``sampling.draws`` and
        ``groups.<factor>.parameterisation`` (resolved: centred, non_centred or partial;
        absent for factors whose effects were integrated out).

    Steps are tried in the policy's order from ``cursor``, skipping those that
    cannot address the failure or change the model; when only ESS checks
    failed, a ``draws_factor`` step is tried first (and may be taken again
    while only ESS keeps failing, up to ``max_attempts``).

    Returns
    -------
    Remedy or None
    """
    if attempts_done >= policy.max_attempts:
        return None
    failing = failing_checks(diagnostics)
    kinds = _kinds(failing)
    forms = {k.split(".")[1]: v for k, v in current.items()
             if k.startswith("groups.") and k.endswith(".parameterisation")}
    order = list(range(cursor, len(policy.steps)))
    only_ess = bool(failing) and all(str(c.get("name")) in ESS_CHECKS for c in failing)
    if only_ess:  # more draws is what raises ESS: try it before the other steps
        order.sort(key=lambda i: policy.steps[i].kind != "draws_factor")
    for index in order:
        step = policy.steps[index]
        changes = _apply(step, kinds, failing, forms, current)
        if changes:
            reason = f"{step.text()} (failed: {', '.join(c['name'] for c in failing) or 'gate'})"
            # A draws step taken out of turn leaves the steps before it for later failures.
            return Remedy(cursor if index > cursor and only_ess else index + 1, changes, reason)
    return None


def _apply(step: Step, kinds: set, failing: list, forms: dict, current: Mapping) -> dict:
    if step.kind == "target_accept":
        now = float(current.get("sampling.target_accept", 0.0))
        return {"sampling.target_accept": step.value} if "divergences" in kinds and step.value > now else {}
    if step.kind == "parameterisation":
        named = [f for f in failing_factors(failing, forms) if forms[f] in FORMS or forms[f] == "partial"]
        if not named and kinds & FUNNEL_KINDS:
            named = [f for f, form in forms.items() if form in ("centred", "partial")]
        return {f"groups.{f}.parameterisation": _other_form(forms[f], kinds) for f in named}
    key = "sampling.warmup" if step.kind == "warmup_factor" else "sampling.draws"
    if key not in current or (step.kind == "draws_factor" and "mixing" not in kinds):
        return {}
    return {key: int(round(int(current[key]) * step.value))}


def _other_form(form: str, kinds: set) -> str:
    """The form to try after ``form`` failed: the other fixed form; for ``partial``, the end its
    weights misjudged. Divergences or a funnel's geometry mean the groups know less than the
    weights assumed (all non-centred); otherwise slow mixing means they know more (all centred)."""
    if form == "partial":
        return "non_centred" if kinds & FUNNEL_KINDS else "centred"
    return FORMS[form]

