"""One way to show a number, everywhere hierwork prints one.

Significant figures (4 by default), thousands separators for large whole
numbers, and no exponent between 1e-5 and 1e6 (the range of the estimates,
diagnostics, correlations and probabilities users read: a correlation of
-0.0008858 reads as such, not as ``-8.858e-04``). :func:`number_against` adds digits
until a value that differs from its threshold also *reads* differently, so a
failing R-hat of 1.0104 never shows as ``1.01 > 1.01``.
"""
from __future__ import annotations

import math

__all__ = ["number", "number_against", "share", "probability"]

#: Below this magnitude (and from ``_LARGE`` up) a number is written with an exponent.
_SMALL, _LARGE = 1e-5, 1e6


def number(value, digits: int = 4) -> str:
    """``value`` with ``digits`` significant figures; ``-`` for missing values.

    Whole numbers are written in full (with thousands separators from 10,000);
    booleans as ``yes``/``no``; text is returned unchanged.
    """
    if value is None:
        return "-"
    if isinstance(value, str):
        return value or "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    value = float(value)
    if math.isnan(value):
        return "-"
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    magnitude = abs(value)
    if value == int(value) and magnitude < 1e15:
        return f"{int(value):,}" if magnitude >= 10_000 else str(int(value))
    if magnitude != 0 and (magnitude < _SMALL or magnitude >= _LARGE):
        return f"{value:.{digits - 1}e}"
    if magnitude >= 10_000:
        return f"{value:,.0f}"
    text = f"{value:.{digits}g}"
    return text if "e" not in text else f"{value:.{max(digits - 1 - int(math.floor(math.log10(magnitude))), 0)}f}"


def number_against(value, threshold, digits: int = 4) -> str:
    """``value`` with enough digits to differ visibly from ``threshold`` when it differs."""
    text = number(value, digits)
    if value is None or threshold is None or isinstance(value, (str, bool)):
        return text
    try:
        differs = float(value) != float(threshold)
    except (TypeError, ValueError):
        return text
    extra = digits
    while differs and text == number(threshold, extra) and extra < 12:
        extra += 1
        text = number(value, extra)
    return text


def share(value) -> str:
    """A proportion as a percentage: ``12%``, ``0.4%``, ``<0.1%``; ``-`` when missing."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    pct = 100 * float(value)
    if pct == 0:
        return "0%"
    if pct < 0.1:
        return "<0.1%"
    if pct < 10 and round(pct) != pct:
        return f"{pct:.1f}%"
    return f"{pct:.0f}%"


def probability(value) -> str:
    """A posterior probability from draws: ``0.97``, ``0.305``; ``<0.001`` and ``>0.999`` at the ends.

    A share of draws of exactly 0 or 1 does not make the event impossible or
    certain, so the ends are written as bounds.
    """
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    value = float(value)
    if value < 0.0005:
        return "<0.001"
    if value > 0.9995:
        return ">0.999"
    return f"{value:.3f}".rstrip("0").rstrip(".") if value >= 0.01 else f"{value:.3f}"
