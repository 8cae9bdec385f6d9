"""The verdict: what the diagnostics gate decided, in words.

Reads ``diagnostics.json`` (docs/contracts.md) and states, for each failed
check, the value, the limit, by how much it missed, and on which parameter
(reader-facing names, :mod:`hierwork.names`, also for older run folders).
Shared by the HTML report, ``summary.md`` and ``hierwork compare``.
"""
from __future__ import annotations

from dataclasses import dataclass

from hierwork.formatting import number as fmt
from hierwork.formatting import number_against
from hierwork.inference.checks import BY_NAME
from hierwork.names import readable

__all__ = ["CheckLine", "Verdict", "verdict"]


@dataclass(frozen=True)
class CheckLine:
    """One check of the gate, ready for display."""

    name: str
    label: str
    value: float | None
    threshold: float | None
    comparison: str
    parameter: str | None
    passed: bool

    @property
    def limit_text(self) -> str:
        """``at most 1.01`` or ``at least 400``."""
        word = "at least" if self.comparison.startswith(">") else "at most"
        return f"{word} {fmt(self.threshold)}"

    @property
    def miss_text(self) -> str:
        """By how much a failed check missed its limit ('' when it passed)."""
        if self.passed or self.value is None or self.threshold is None:
            return ""
        gap = abs(float(self.value) - float(self.threshold))
        if self.name.startswith("ess"):
            gap = round(gap)
        text = f"{'short of' if self.comparison.startswith('>') else 'over'} the limit by {fmt(gap)}"
        if self.comparison.startswith(">") and self.threshold:
            text += f" ({gap / float(self.threshold):.0%} short)"
        return text

    @property
    def value_text(self) -> str:
        """The value; effective sample sizes as whole draws."""
        if self.name.startswith("ess") and self.value is not None:
            return fmt(round(float(self.value)))
        return number_against(self.value, self.threshold)

    def sentence(self) -> str:
        """One line: ``Bulk ESS 212 on b[intercept]: must be at least 400; short ...``."""
        where = f" on {self.parameter}" if self.parameter else ""
        text = f"{self.label} {self.value_text}{where}: must be {self.limit_text}"
        return f"{text}; {self.miss_text}" if self.miss_text else text


@dataclass(frozen=True)
class Verdict:
    """The gate's decision for one run.

    ``status`` is ``"passed"``, ``"failed"`` or ``"unknown"`` (no
    diagnostics.json).
    """

    status: str
    checks: tuple
    advice: tuple

    @property
    def failed(self) -> tuple:
        return tuple(c for c in self.checks if not c.passed)

    @property
    def short(self) -> str:
        """``passed``, ``FAILED (R-hat, Bulk ESS)`` or ``not checked``."""
        if self.status == "failed":
            return "FAILED (" + ", ".join(c.label for c in self.failed) + ")"
        return {"passed": "passed", "unknown": "not checked"}[self.status]

    @property
    def headline(self) -> str:
        if self.status == "passed":
            return f"Gate passed: all {len(self.checks)} convergence checks met their limits."
        if self.status == "failed":
            names = ", ".join(c.label for c in self.failed) or "see diagnostics.json"
            return f"Gate failed ({names}): do not use these estimates."
        return "Gate not evaluated: diagnostics.json is missing, so these estimates are unchecked."


def verdict(diagnostics: dict | None) -> Verdict:
    """Build the :class:`Verdict` from a parsed ``diagnostics.json`` (or None)."""
    if diagnostics is None:
        return Verdict("unknown", (), ())
    checks = tuple(
        CheckLine(name=str(c.get("name")), label=BY_NAME[c.get("name")].label if c.get("name") in BY_NAME else str(c.get("name")),
                  value=c.get("value"), threshold=c.get("threshold"),
                  comparison=str(c.get("comparison") or (BY_NAME[c["name"]].comparison
                                                          if c.get("name") in BY_NAME else "<=")),
                  parameter=readable(c.get("worst_parameter")), passed=bool(c.get("passed")))
        for c in diagnostics.get("checks", []))
    status = "passed" if diagnostics.get("passed") else "failed"
    return Verdict(status, checks, tuple(str(a) for a in diagnostics.get("advice", [])))
