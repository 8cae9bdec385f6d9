"""What the estimates answer: reference values, the outcome's scale, target, ranks and contrasts.

Groups are compared at **reference values** of the predictors (spec key
``estimates.at``), built from the population design (:mod:`hierwork.plan.design`):
a numeric term at the mean of the data (default), at zero, or at a number; a
categorical predictor at one of its levels (default its reference level, so its
level terms are 0). Group-level predictors enter the population value at their
reference values too (default: their mean over the groups, each group counted
once); each group's own estimate keeps its own group-level values.

The **outcome's scale** is the family's mean (:meth:`~hierwork.plan.families.base.Family.mean`):
a probability, a count per ``estimates.rate_per`` units of exposure, or the
outcome's units. :class:`Estimands` is stored in ``plan.json`` (:meth:`Estimands.to_dict`)
so that the report and ``predict`` read the same choices back.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from hierwork.declare.estimates import REFERENCE_WORDS
from hierwork.errors import SpecError, did_you_mean
from hierwork.formatting import number

#: Group labels shown in the hint when a contrast names a group that does not exist.
_HINT_LABELS = 8


@dataclass(frozen=True)
class ReferenceValue:
    """One predictor's reference value: ``column``, its ``role`` (population, group level of F),
    ``how`` it was chosen (``mean``, ``zero``, ``number``, ``level``, ``reference level``) and the ``value``."""

    column: str
    role: str
    how: str
    value: object

    def text(self) -> str:
        """``rain_days = 2.13 (mean of the data)``."""
        why = {"mean": "mean of the data" if self.role == "population" else f"mean over the groups of {self.role}",
               "zero": "zero", "number": "set in the spec", "level": "set in the spec",
               "reference level": "its reference level"}[self.how]
        shown = self.value if isinstance(self.value, str) else number(self.value)
        return f"{self.column} = {shown} ({why})"


@dataclass(frozen=True)
class Estimands:
    """The questions the estimates answer (see the module docstring).

    Attributes
    ----------
    x : ndarray
        Reference row of the population design, one value per term (``1`` for the intercept).
    w : dict
        Factor -> reference values of its group-level predictors.
    values : tuple of ReferenceValue
        For the report and ``check``; categorical predictors at their reference level included.
    scale : float
        Factor applied to the family's mean (``rate_per`` for families with an exposure, else 1).
    label : str
        The outcome's scale in words: ``probability of late (out of deliveries)``.
    kind : str
        The family's ``outcome_scale``: ``probability``, ``rate`` or ``outcome units``.
    target : dict or None
        ``{"value", "direction"}``.
    rank_k : int
    contrasts : tuple of (factor, group A, group B)
    """

    x: np.ndarray
    w: dict = field(default_factory=dict)
    values: tuple = ()
    scale: float = 1.0
    label: str = "outcome"
    kind: str = "outcome units"
    target: dict | None = None
    rank_k: int = 3
    contrasts: tuple = ()

    def outcome(self, family, eta, params: dict):
        """The expected outcome on the outcome's scale of linear predictor(s) ``eta``."""
        return family.mean(eta, params) * self.scale

    def text(self) -> str:
        """``rain_days = 2.13 (mean of the data); ...``, or a note when the model has no predictors."""
        return "; ".join(v.text() for v in self.values) if self.values else "no predictors: nothing to fix"

    def to_dict(self) -> dict:
        return {"x": [float(v) for v in self.x], "w": {k: [float(v) for v in w] for k, w in self.w.items()},
                "values": [{"column": v.column, "role": v.role, "how": v.how, "value": v.value} for v in self.values],
                "text": self.text(), "scale": self.scale, "label": self.label, "kind": self.kind,
                "target": self.target, "rank_k": self.rank_k,
                "contrasts": [{"factor": f, "groups": [a, b]} for f, a, b in self.contrasts]}

    @classmethod
    def from_dict(cls, data: dict) -> "Estimands":
        """The estimands stored in ``plan.json``."""
        return cls(x=np.asarray(data["x"], float), w={k: np.asarray(v, float) for k, v in data["w"].items()},
                   values=tuple(ReferenceValue(**v) for v in data["values"]), scale=float(data["scale"]),
                   label=data["label"], kind=data["kind"], target=data["target"], rank_k=int(data["rank_k"]),
                   contrasts=tuple((c["factor"], *c["groups"]) for c in data["contrasts"]))


def estimands_of(spec, design, frame, factors, family) -> Estimands:
    """Build and check the estimands of a spec against its design and groups.

    Reference values are set per column, in the column's own units; the
    reference row of the design is the design applied to them, so a
    transformed term is the transform of its column's reference value and an
    interaction term the product of its parts at theirs.

    Parameters
    ----------
    spec : Spec
    design : Design
    frame : pandas.DataFrame
        The fitted rows (numeric columns as numbers).
    factors : sequence of FactorPlan
    family : Family

    Raises
    ------
    SpecError
        A level that does not occur, a numeric predictor given a word other than
        ``mean`` or ``zero``, a reference value a transform cannot take, a
        contrast naming a group that does not exist (file, line and key of the spec).
    """
    est = spec.estimates
    values: list = []
    x = _reference_row(design, lambda column: frame[column].to_numpy(dtype=float), "population", spec, values)
    w = {}
    for f in factors:
        def per_group(column, f=f):
            return pd.Series(frame[column].to_numpy(dtype=float)).groupby(f.index).first().to_numpy()

        w[f.name] = _reference_row(f.group_design, per_group, f.name, spec, values)
    target = est["target"]
    return Estimands(x=x, w=w, values=tuple(values), scale=_scale(family, est), label=_label(spec, family, est),
                     kind=family.outcome_scale, target=dict(target) if target else None, rank_k=est["rank_k"],
                     contrasts=_contrasts(spec, factors))


def _reference_row(design, column_values, role: str, spec, values: list) -> np.ndarray:
    """The design's row at the reference values of its columns (appended to ``values``).

    ``column_values(column)`` gives a numeric column's values the default
    ``mean`` averages (the rows, or one value per group for group-level predictors).
    """
    at = spec.estimates["at"]
    reference = {}
    for column in design.columns:
        if column in design.levels:
            level = _level(at.get(column), design.levels[column], column, spec)
            values.append(ReferenceValue(column, role, "reference level" if column not in at else "level", level))
            reference[column] = [level]
        else:
            ref = _numeric(at.get(column), column_values(column), column, role, spec)
            values.append(ref)
            reference[column] = [ref.value]
    if not design.terms:
        return np.zeros(0)
    with np.errstate(divide="ignore", invalid="ignore"):
        row = design.matrix(pd.DataFrame(reference, index=[0]))[0]
    for t in design.terms:
        if t.transform is not None and not np.isfinite(row[design.index(t.name)]):
            raise SpecError(f"{t.name} is not defined at {t.column} = {number(reference[t.column][0])}",
                            where=spec.where(f"estimates.at.{t.column}" if t.column in at else "predictors"),
                            hint=f"set estimates.at.{t.column} to a value the transform accepts")
    return row


def _numeric(given, column_values, column: str, role: str, spec) -> ReferenceValue:
    if given is None or given == "mean":
        return ReferenceValue(column, role, "mean", float(np.mean(column_values)))
    if given == "zero":
        return ReferenceValue(column, role, "zero", 0.0)
    if isinstance(given, str):
        raise SpecError(f"{column!r} is numeric: {given!r} is not 'mean', 'zero' or a number",
                        where=spec.where(f"estimates.at.{column}"), hint="write e.g. 'mean' or 120")
    return ReferenceValue(column, role, "number", float(given))


def _level(given, levels, column: str, spec) -> str:
    if given is None:
        return levels[0]
    level = str(given).strip()
    if level not in levels:
        words = " ('mean' and 'zero' apply to numeric predictors)" if level in REFERENCE_WORDS else ""
        raise SpecError(f"{column!r} has no level {level!r}{words}", where=spec.where(f"estimates.at.{column}"),
                        hint=f"{did_you_mean(level, levels)}levels: {', '.join(map(repr, levels))}")
    return level


def _scale(family, est) -> float:
    return float(est["rate_per"]) if "exposure" in family.columns else 1.0


def _label(spec, family, est) -> str:
    """The outcome's scale in words, from the family's ``outcome_scale`` and the outcome's columns."""
    out = spec.outcome
    if family.outcome_scale == "probability":
        return f"probability of {out.column}" + (f" (out of {out.trials})" if out.trials else "")
    if family.outcome_scale == "rate":
        per = f"{est['rate_per']:,g} {out.exposure}" if out.exposure else (
            "row" if est["rate_per"] == 1 else f"{est['rate_per']:,g} rows")
        return f"{out.column} per {per}"
    if family.outcome_scale == "expected score":
        return f"expected {out.column} (as level positions 1, 2, ...)"
    return out.column


def _contrasts(spec, factors) -> tuple:
    by_name = {f.name: f for f in factors}
    pairs = []
    for i, contrast in enumerate(spec.estimates["contrasts"]):
        f = by_name[contrast["factor"]]
        for k, group in enumerate(contrast["groups"]):
            if group not in f.levels:
                shown = ", ".join(map(repr, f.levels[:_HINT_LABELS])) + (", ..." if f.n_groups > _HINT_LABELS else "")
                raise SpecError(f"{f.name} has no group {group!r}", where=spec.where(f"estimates.contrasts[{i}].groups"),
                                hint=f"{did_you_mean(group, f.levels)}{f.n_groups} groups, e.g. {shown}"
                                     + ("; nested labels join the parent's: parent/child" if f.parent else ""))
        pairs.append((f.name, *contrast["groups"]))
    return tuple(pairs)
