"""The population design: which terms the linear predictor has, built once and reused.

A :class:`Design` is made from the spec and the fitted data (:meth:`Design.from_spec`)
and turns any table with the same columns into the design matrix
(:meth:`Design.matrix`): the fitted rows, and the new rows of ``predict``. It is
stored in ``plan.json`` (:meth:`Design.to_dict`), so a saved run rebuilds exactly
the columns it was fitted with, never by parsing term names.

Term names are what users read and what prior keys use: ``intercept``, a
numeric column's name, and ``column=level`` for the indicator of a categorical
level against the reference level (treatment coding).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from hierwork.errors import DataError

#: Joins a categorical column and one of its levels in a term name.
LEVEL_SEPARATOR = "="


@dataclass(frozen=True)
class Term:
    """One column of the design: the intercept, a numeric column, or one level's indicator."""

    name: str
    kind: str  # "intercept" | "numeric" | "level"
    column: str | None = None
    level: str | None = None

    def values(self, frame) -> np.ndarray:
        """The term's column for the rows of ``frame`` (numeric columns already converted)."""
        if self.kind == "intercept":
            return np.ones(len(frame))
        if self.kind == "level":
            return (frame[self.column].astype(str).str.strip().to_numpy() == self.level).astype(float)
        return np.asarray(frame[self.column], dtype=float)

    def to_dict(self) -> dict:
        return {k: v for k, v in (("name", self.name), ("kind", self.kind), ("column", self.column),
                                  ("level", self.level)) if v is not None}


def level_term(column: str, level: str) -> str:
    """The name of a level's indicator term: ``tillage=reduced``."""
    return f"{column}{LEVEL_SEPARATOR}{level}"


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
        """The design of a spec's predictors, plus any varying slope not among them."""
        terms, notes = [Term("intercept", "intercept")], []
        for p in spec.predictors:
            if p.column in dataset.categorical:
                levels = dataset.categorical[p.column]
                terms += [Term(level_term(p.column, lv), "level", p.column, lv) for lv in levels[1:]]
            else:
                terms.append(Term(p.column, "numeric", p.column))
        for f in spec.factors:
            for term in f.varying[1:]:
                if term not in [t.name for t in terms]:
                    terms.append(Term(term, "numeric", term))
                    notes.append(f"{term!r} varies by {f.name} and is not among the predictors: "
                                 "added as a population term (the mean of the group slopes)")
        return cls(tuple(terms), {k: tuple(v) for k, v in dataset.categorical.items()}, tuple(notes))

    @property
    def names(self) -> tuple:
        return tuple(t.name for t in self.terms)

    def index(self, name: str) -> int:
        """Column of term ``name``."""
        return self.names.index(name)

    @property
    def columns(self) -> tuple:
        """The data columns the terms read, in first-use order."""
        seen = []
        for t in self.terms:
            if t.column is not None and t.column not in seen:
                seen.append(t.column)
        return tuple(seen)

    def level_terms(self) -> dict:
        """Categorical column -> the names of its level terms (a prior on the column sets them all)."""
        out: dict = {}
        for t in self.terms:
            if t.kind == "level":
                out.setdefault(t.column, []).append(t.name)
        return out

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
        return cls(tuple(Term(**t) for t in data["terms"]), {k: tuple(v) for k, v in data["levels"].items()})
