"""The population design: which terms the linear predictor has, built once and reused.

A :class:`Design` is made from the spec and the fitted data (:meth:`Design.from_spec`)
and turns any table with the same columns into the design matrix
(:meth:`Design.matrix`): the fitted rows, and the new rows of ``predict``. It is
stored in ``plan.json`` (:meth:`Design.to_dict`), so a saved run rebuilds exactly
the columns it was fitted with, never by parsing term names; a standardised
term keeps the fitted data's mean and SD, so new rows are scaled the same way.

Term names are what users read and what prior keys use:

* ``intercept``; a numeric column's name (``engine_hours``);
* ``column=level``: the indicator of a categorical level against the reference
  level (treatment coding: ``sea_state=rough``);
* a transformed numeric column: ``log(dose)``, ``sqrt(dose)``,
  ``standardised(dose)`` (``(dose - mean) / SD`` of the fitted rows, SD with
  ``n - 1``);
* an interaction: the names of the terms multiplied, joined by ``:``
  (``engine_hours:sea_state=rough``, ``log(dose):sea_state=rough``); a
  categorical part contributes one term per non-reference level, so
  ``[engine_hours, sea_state]`` with three sea states gives two terms.

Group-level predictors of a factor have a design of their own, built the same
way without intercept (:meth:`Design.of_group_predictors`).
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass, field

import numpy as np

from hierwork.errors import DataError

#: Joins a categorical column and one of its levels in a term name.
LEVEL_SEPARATOR = "="
#: Joins the parts of an interaction in a term name.
INTERACTION_SEPARATOR = ":"


@dataclass(frozen=True)
class Transform:
    """A transform of a numeric predictor: its name pattern and the values it accepts."""

    name: str
    label: str  # term name pattern, "{}" is the column
    accepts: object  # values -> bool mask of acceptable values
    needs: str  # what the values must be, for messages


#: Transforms of ``predictors[].transform``.
TRANSFORMS = {t.name: t for t in (
    Transform("log", "log({})", lambda v: v > 0, "positive"),
    Transform("sqrt", "sqrt({})", lambda v: v >= 0, "zero or more"),
    Transform("standardise", "standardised({})", np.isfinite, "finite"),
)}


def check_transform(values: np.ndarray, transform: str | None, column: str, ref) -> None:
    """Refuse values a transform cannot take (log of 0, square root of a negative), naming the rows.

    ``ref`` is a :class:`~hierwork.data.rows.RowRef` of the rows.
    """
    if transform is None:
        return
    t = TRANSFORMS[transform]
    bad = ~t.accepts(np.asarray(values, dtype=float))
    if bad.any():
        raise DataError(f"predictor {column!r} has transform {transform} and must be {t.needs}; "
                        f"it is not in {ref.text(bad)} (first: {np.asarray(values)[bad][0]:g})", where=ref.where,
                        hint=f"remove those rows, or choose another transform"
                             + (" (sqrt accepts 0)" if transform == "log" else ""))


@dataclass(frozen=True)
class Term:
    """One column of the design.

    ``kind`` is ``intercept``, ``numeric`` (a column, with an optional
    ``transform``; ``centre`` and ``scale`` for ``standardise``), ``level`` (one
    level's indicator) or ``interaction`` (the product of its ``parts``).
    """

    name: str
    kind: str  # "intercept" | "numeric" | "level" | "interaction"
    column: str | None = None
    level: str | None = None
    transform: str | None = None
    centre: float | None = None
    scale: float | None = None
    parts: tuple = ()

    def values(self, frame) -> np.ndarray:
        """The term's column for the rows of ``frame`` (numeric columns already converted)."""
        if self.kind == "intercept":
            return np.ones(len(frame))
        if self.kind == "level":
            return (frame[self.column].astype(str).str.strip().to_numpy() == self.level).astype(float)
        if self.kind == "interaction":
            return np.prod([p.values(frame) for p in self.parts], axis=0)
        x = np.asarray(frame[self.column], dtype=float)
        if self.transform == "log":
            return np.log(x)
        if self.transform == "sqrt":
            return np.sqrt(x)
        if self.transform == "standardise":
            return (x - self.centre) / self.scale
        return x

    @property
    def columns(self) -> tuple:
        """The data columns the term reads."""
        if self.kind == "interaction":
            return tuple(dict.fromkeys(c for p in self.parts for c in p.columns))
        return () if self.column is None else (self.column,)

    def to_dict(self) -> dict:
        out = {k: v for k, v in (("name", self.name), ("kind", self.kind), ("column", self.column),
                                 ("level", self.level), ("transform", self.transform), ("centre", self.centre),
                                 ("scale", self.scale)) if v is not None}
        if self.parts:
            out["parts"] = [p.to_dict() for p in self.parts]
        return out

    @classmethod
    def from_dict(cls, data: dict) -> "Term":
        return cls(**{**data, "parts": tuple(cls.from_dict(p) for p in data.get("parts", ()))})


def level_term(column: str, level: str) -> str:
    """The name of a level's indicator term: ``tillage=reduced``."""
    return f"{column}{LEVEL_SEPARATOR}{level}"


def column_terms(column: str, frame, categorical: dict, transform: str | None = None) -> list:
    """The terms of one column: its level indicators (categorical) or one numeric term."""
    if column in categorical:
        return [Term(level_term(column, lv), "level", column, lv) for lv in categorical[column][1:]]
    if transform is None:
        return [Term(column, "numeric", column)]
    if transform == "standardise":
        x = np.asarray(frame[column], dtype=float)
        return [Term(TRANSFORMS[transform].label.format(column), "numeric", column, transform=transform,
                     centre=float(x.mean()), scale=float(x.std(ddof=1)))]
    return [Term(TRANSFORMS[transform].label.format(column), "numeric", column, transform=transform)]


def interaction_terms(parts: list) -> list:
    """The product terms of an interaction: one per combination of its parts' terms."""
    return [Term(INTERACTION_SEPARATOR.join(t.name for t in combo), "interaction", parts=tuple(combo))
            for combo in itertools.product(*parts)]


@dataclass(frozen=True)
class Design:
    """The population terms of a model and the categorical levels they were built from.

    Attributes
    ----------
    terms : tuple of Term
        ``intercept`` first.
    levels : dict
        Categorical column -> its levels, reference level first.
    notes : tuple of str
        Decisions worth telling the user (a varying slope added as a term).
    """

    terms: tuple
    levels: dict = field(default_factory=dict)
    notes: tuple = ()

    @classmethod
    def from_spec(cls, spec, dataset) -> "Design":
        """The design of a spec's predictors and interactions, plus any varying slope not among them."""
        terms, notes, of_column = [Term("intercept", "intercept")], [], {}
        for p in spec.predictors:
            of_column[p.column] = column_terms(p.column, dataset.frame, dataset.categorical, p.transform)
            terms += of_column[p.column]
        for interaction in spec.interactions:
            terms += interaction_terms([of_column[c] for c in interaction.columns])
        for f in spec.factors:
            for term in f.varying[1:]:
                if term not in [t.name for t in terms]:
                    terms.append(Term(term, "numeric", term))
                    notes.append(f"{term!r} varies by {f.name} and is not among the predictors: "
                                 "added as a population term (the mean of the group slopes)")
        levels = {k: tuple(v) for k, v in dataset.categorical.items() if k in of_column}
        return cls(tuple(terms), levels, tuple(notes))

    @classmethod
    def of_group_predictors(cls, predictors, dataset) -> "Design":
        """The design of a factor's group-level predictors (``Predictor`` settings), no intercept."""
        terms = [t for p in predictors for t in column_terms(p.column, dataset.frame, dataset.categorical, p.transform)]
        columns = [p.column for p in predictors]
        return cls(tuple(terms), {c: tuple(dataset.categorical[c]) for c in columns if c in dataset.categorical})

    @property
    def names(self) -> tuple:
        return tuple(t.name for t in self.terms)

    def index(self, name: str) -> int:
        """Column of term ``name``."""
        return self.names.index(name)

    @property
    def columns(self) -> tuple:
        """The data columns the terms read, in first-use order."""
        return tuple(dict.fromkeys(c for t in self.terms for c in t.columns))

    def level_terms(self) -> dict:
        """Names that stand for several terms -> those terms (a prior on the name sets them all).

        A categorical column stands for its level terms; an interaction with a
        categorical part, written as its columns joined by ``:``
        (``engine_hours:sea_state``), for all its terms.
        """
        out: dict = {}
        for t in self.terms:
            if t.kind == "level":
                out.setdefault(t.column, []).append(t.name)
            elif t.kind == "interaction":
                key = INTERACTION_SEPARATOR.join(p.column for p in t.parts)
                if key != t.name:
                    out.setdefault(key, []).append(t.name)
        return out

    def check_values(self, frame, ref) -> None:
        """Refuse values the terms' transforms cannot take (the rows of ``frame``, numbers already)."""
        for t in self.terms:
            for part in (t.parts or (t,)):
                if part.transform is not None:
                    check_transform(frame[part.column].to_numpy(dtype=float), part.transform, part.column, ref)

    def matrix(self, frame) -> np.ndarray:
        """The design matrix (rows of ``frame``, one column per term)."""
        return np.column_stack([t.values(frame) for t in self.terms])

    def check_levels(self, frame, where: str) -> None:
        """Refuse categorical levels the fit never saw (they have no coefficient)."""
        for column, known in self.levels.items():
            if column not in frame.columns:
                continue
            labels = set(frame[column].astype(str).str.strip())
            unknown = sorted(labels - set(known))
            if unknown:
                raise DataError(f"column {column!r} has level{'s' if len(unknown) > 1 else ''} "
                                f"{', '.join(map(repr, unknown))} not seen when fitting", where=where,
                                hint=f"the run knows: {', '.join(map(repr, known))}")

    def to_dict(self) -> dict:
        return {"terms": [t.to_dict() for t in self.terms], "levels": {k: list(v) for k, v in self.levels.items()}}

    @classmethod
    def from_dict(cls, data: dict) -> "Design":
        """The design stored in ``plan.json``."""
        return cls(tuple(Term.from_dict(t) for t in data["terms"]), {k: tuple(v) for k, v in data["levels"].items()})
