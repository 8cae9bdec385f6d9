"""Group labels: one rule for fitting and for ``predict``.

Labels are the column's text with surrounding spaces removed. A factor nested
in another (``within:``) is labelled by its parent's label and its own, joined
by ``/`` (``north/7`` and ``south/7`` are two plots), so labels that repeat
across parents name different groups. A ``/`` inside the labels of a factor
that takes part in nesting is refused: region ``a/b`` with site ``c`` and
region ``a`` with site ``b/c`` would otherwise become one group.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from hierwork.errors import DataError

#: Joins a parent's label and a nested group's own label.
SEPARATOR = "/"


def raw_labels(values: pd.Series) -> np.ndarray:
    """A column's group labels as text (object array)."""
    return values.astype(str).str.strip().to_numpy().astype(object)


def group_labels(frame: pd.DataFrame, factors) -> dict:
    """Factor name -> label of every row, nested labels composed with their parents'.

    ``factors`` are objects with ``name``, ``column`` and ``within`` (the spec's
    factors, or plan.json entries read back as such).
    """
    raw = {f.name: raw_labels(frame[f.column]) for f in factors}
    parent = {f.name: f.within for f in factors}
    nested = {f.name for f in factors if f.within is not None} | {p for p in parent.values() if p is not None}
    for f in factors:
        if f.name in nested:
            clash = [label for label in pd.unique(raw[f.name]) if SEPARATOR in label]
            if clash:
                raise DataError(f"group label {clash[0]!r} of factor {f.name!r} (column {f.column!r}) contains "
                                f"{SEPARATOR!r}, which joins nested labels ({len(clash)} label(s) affected)",
                                hint=f"replace {SEPARATOR!r} in that column, e.g. by '-'")
    labels: dict = {}

    def composite(name):
        if name not in labels:
            own = raw[name]
            if parent[name] is not None:
                up = composite(parent[name])
                own = np.array([f"{p}{SEPARATOR}{c}" for p, c in zip(up, own)], dtype=object)
            labels[name] = own
        return labels[name]

    for f in factors:
        composite(f.name)
    return labels
