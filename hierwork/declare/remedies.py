"""Remedies: what to try next when a fit fails its convergence gate.

The policy is an ordered list of steps, tried one after another while the
gate keeps failing; each retry keeps the changes of the attempts before it.
A step that does not address the failure at hand is skipped:

``target_accept: X``
    Raise NUTS's target acceptance rate to X (smaller steps). Used only when
    the divergences check failed: divergent transitions flag regions the
    integrator cannot follow, and a smaller step size is the first remedy
    (Betancourt 2017, "A Conceptual Introduction to Hamiltonian Monte Carlo",
    section 6.2).
``parameterisation``
    Switch the failing factor between centred and non-centred forms. The
    factor is the one named by a failing check's ``worst_parameter``
    (``farm__sd``, ``farm__effect[...]``); with no name but divergences, a
    low E-BFMI or saturated trees, every centred factor is switched. Skipped on the
    collapsed path, where the effects are integrated out and the form changes
    nothing. Centred forms suit groups
    with much data, non-centred ones groups with little (Papaspiliopoulos,
    Roberts and Skold 2007; Betancourt and Girolami 2015, the funnel).
``warmup_factor: K``
    Multiply the warm-up length by K, giving the adaptation more time.
``draws_factor: K``
    Multiply the draws by K. Used only when an R-hat or ESS check failed:
    more draws raise ESS and sharpen R-hat (Vehtari et al. 2021, section 4).
    When only the ESS checks failed it is tried before the other steps.

Default policy (common practice, in the order the steps are listed)::

    remedies:
      max_attempts: 5
      steps:
        - target_accept: 0.95
        - target_accept: 0.99
        - parameterisation
        - warmup_factor: 2
        - draws_factor: 2

``remedies: false`` turns retries off (one attempt per job).
"""
from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from hierwork.errors import SpecError

STEP_KINDS = ("target_accept", "parameterisation", "warmup_factor", "draws_factor")


@dataclass(frozen=True)
class Step:
    """One remedy step: ``kind`` from :data:`STEP_KINDS`, ``value`` its number (or None)."""

    kind: str
    value: float | None = None

    def text(self) -> str:
        """The step as written in a spec."""
        return self.kind if self.value is None else f"{self.kind}: {self.value:g}"


@dataclass(frozen=True)
class Policy:
    """An ordered retry policy.

    Attributes
    ----------
    steps : tuple of Step
    max_attempts : int
        Attempts per job, the first included (1 means no retries).
    """

    steps: tuple[Step, ...]
    max_attempts: int


DEFAULT_POLICY = Policy(
    steps=(Step("target_accept", 0.95), Step("target_accept", 0.99), Step("parameterisation"),
           Step("warmup_factor", 2), Step("draws_factor", 2)),
    max_attempts=5,
)


def parse_policy(value, where: str = "remedies") -> Policy:
    """Validate a spec's ``remedies:`` value.

    Parameters
    ----------
    value : None, bool or mapping
        ``None`` or ``true``: the default policy; ``false``: no retries; a
        mapping with ``max_attempts`` and/or ``steps``.
    where : str
        Location used in error messages.

    Returns
    -------
    Policy
    """
    if value is None or value is True:
        return DEFAULT_POLICY
    if value is False:
        return Policy(steps=(), max_attempts=1)
    if not isinstance(value, Mapping):
        raise SpecError(f"remedies must be true, false or a mapping, got {value!r}", where=where,
                        hint="write remedies: {max_attempts: 3} or see docs/batch.md")
    unknown = sorted(set(value) - {"max_attempts", "steps"})
    if unknown:
        raise SpecError(f"unknown remedies key {unknown[0]!r}", where=where,
                        hint="valid: 'max_attempts', 'steps'")
    max_attempts = value.get("max_attempts", DEFAULT_POLICY.max_attempts)
    if isinstance(max_attempts, bool) or not isinstance(max_attempts, int) or max_attempts < 1:
        raise SpecError(f"max_attempts must be a whole number of at least 1, got {max_attempts!r}",
                        where=f"{where}.max_attempts")
    raw_steps = value.get("steps")
    if raw_steps is None:
        return Policy(DEFAULT_POLICY.steps, max_attempts)
    if not isinstance(raw_steps, list):
        raise SpecError(f"steps must be a list, got {raw_steps!r}", where=f"{where}.steps")
    steps = tuple(_parse_step(s, f"{where}.steps[{i}]") for i, s in enumerate(raw_steps))
    return Policy(steps, max_attempts)


def _parse_step(raw, where: str) -> Step:
    if raw == "parameterisation":
        return Step("parameterisation")
    if not (isinstance(raw, Mapping) and len(raw) == 1):
        raise SpecError(f"a remedy step is 'parameterisation' or one 'kind: value' pair, got {raw!r}",
                        where=where, hint=f"valid kinds: {', '.join(STEP_KINDS)}")
    (kind, number), = raw.items()
    if kind not in STEP_KINDS or kind == "parameterisation":
        raise SpecError(f"unknown remedy step {kind!r}", where=where,
                        hint=f"valid: {', '.join(STEP_KINDS)}")
    ok = isinstance(number, (int, float)) and not isinstance(number, bool)
    if kind == "target_accept" and not (ok and 0 < number < 1):
        raise SpecError(f"target_accept must lie strictly between 0 and 1, got {number!r}", where=where)
    if kind != "target_accept" and not (ok and number > 1):
        raise SpecError(f"{kind} must be a number above 1, got {number!r}", where=where)
    return Step(kind, float(number))
