"""What the group sections of the report read from a run folder, gathered once.

The outcome's scale, the reference values in words, the target, the
population values and the group table, from ``plan.json`` (estimands),
``summary.csv`` and ``group_estimates.csv``. Nothing is computed here beyond
looking values up.
"""
from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from hierwork.formatting import number, probability
from hierwork.report.plotting import Scale, scale_of
from hierwork.runfolder import Run


#: Columns on the outcome's scale, and posterior probabilities, of group_estimates.csv and contrasts.csv.
OUTCOME_COLUMNS = ("outcome_mean", "outcome_lower", "outcome_upper", "no_pooling_outcome", "complete_pooling_outcome",
                   "difference", "lower", "upper")
PROBABILITY_COLUMNS = ("p_above_population", "p_beyond_target", "p_top", "p_bottom", "p_positive")


@dataclass(frozen=True)
class View:
    """A run's estimates as the report shows them (see the module docstring)."""

    run: Run
    table: pd.DataFrame | None
    scale: Scale
    estimands: dict

    @classmethod
    def of(cls, run: Run) -> "View":
        outcome = run.spec.get("outcome") if isinstance(run.spec.get("outcome"), dict) else {}
        scale = scale_of(run.estimands, run.family, str(outcome.get("column", "outcome")), outcome.get("exposure"))
        return cls(run, run.group_estimates, scale, run.estimands or {})

    def outcome_key(self, key: str, default: str) -> str:
        """A key of the spec's ``outcome`` section (``column``, ``trials``, ``exposure``) for labels."""
        outcome = self.run.spec.get("outcome")
        value = outcome.get(key) if isinstance(outcome, dict) else None
        return str(value) if value else default

    @property
    def outcome_column(self) -> str:
        """The outcome's column name in the data (for axis labels)."""
        return self.outcome_key("column", "outcome")

    @property
    def ready(self) -> bool:
        """Whether the group table has the outcome-scale columns (runs of older versions do not)."""
        return self.table is not None and "outcome_mean" in self.table.columns

    @property
    def link(self) -> tuple[str, str]:
        """The family's link and the name of its scale (``("logit", "log-odds")``; ``"log link"`` when a
        family with a non-identity link names no scale of its own)."""
        from hierwork.plan.families import REGISTRY, get_family

        if self.run.family not in REGISTRY:
            return "identity", "outcome units"
        family = get_family(self.run.family)
        if family.link != "identity" and family.link_scale == "outcome units":
            return family.link, f"{family.link} link"
        return family.link, family.link_scale

    @property
    def level(self) -> str:
        return f"{self.run.interval:.0%}"

    @property
    def target(self) -> dict | None:
        return self.estimands.get("target")

    @property
    def rank_k(self) -> int:
        return int(self.estimands.get("rank_k", 3))

    @property
    def per(self) -> float:
        """``estimates.rate_per`` for rates (1 otherwise)."""
        return float(self.estimands.get("scale", 1.0))

    @property
    def compared_at(self) -> str:
        """The reference values in words."""
        return str(self.estimands.get("text") or "the stored estimates (reference values not recorded)")

    @property
    def has_predictors(self) -> bool:
        """Whether the estimates hold predictors at reference values (False: the model has none)."""
        return self.estimands.get("values") != []

    def cells(self, change: bool) -> dict:
        """How table cells are written: values on the outcome's scale (``change``: differences), probabilities."""
        writers = {c: (lambda v: self.scale.text(v, change)) for c in OUTCOME_COLUMNS}
        writers.update({c: probability for c in PROBABILITY_COLUMNS})
        writers["pooling_weight"] = lambda v: number(v, 2)
        return writers

    def keys(self) -> list:
        """``(factor, term)`` pairs in table order."""
        return [tuple(k) for k in self.table[["factor", "term"]].drop_duplicates().itertuples(index=False)]

    def rows(self, factor: str, term: str) -> pd.DataFrame:
        return self.table[(self.table["factor"] == factor) & (self.table["term"] == term)]

    def population(self, term: str) -> dict | None:
        """The population value of a term on the outcome's scale (``summary.csv`` row: mean, lower, upper)."""
        summary = self.run.summary
        if summary is None:
            return None
        names = {"intercept": ["outcome"], "spread": ["residual_sd"]}.get(term, [f"outcome_change.{term}", term])
        for name in names:
            row = summary[summary["parameter"] == name]
            if not row.empty:
                return row.iloc[0][["mean", "lower", "upper"]].astype(float).to_dict()
        return None


def away_from_population(rows: pd.DataFrame, interval: float) -> tuple[pd.Series, pd.Series]:
    """Masks of the groups clearly above / below the population value.

    A group is clearly above when the central ``interval`` of its difference
    from the population value (drawn together, so the shared intercept's
    uncertainty cancels) lies wholly above zero: ``p_above_population`` beyond
    ``1 - (1 - interval) / 2``. Its own interval may still cover the
    population value, which is uncertain too; the difference is what the
    question "does this group differ?" asks about.
    """
    tail = (1.0 - interval) / 2.0
    p = rows["p_above_population"].astype(float)
    return p > 1.0 - tail, p < tail


def term_what(term: str) -> str:
    """What a term's rows of group_estimates.csv estimate, in words (empty for the intercept's expected outcome)."""
    if term == "intercept":
        return ""
    return "residual SD" if term == "spread" else f"change per unit of {term}"
