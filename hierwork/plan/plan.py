"""Spec + Dataset -> :class:`ModelPlan`: arrays, terms, priors and parameterisation.

The plan is everything the model builders need and nothing they must work
out: the family, the population design matrix in the data's own units (and the
:class:`~hierwork.plan.design.Design` that made it), each factor's group index
and labels, the varying columns, group-level predictors, the nesting map,
resolved priors (defaults marked), the sampling form of each factor, and the
estimands (:mod:`hierwork.plan.estimands`: reference values, outcome scale,
target, contrasts).
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from hierwork.plan import parameterisation, priors
from hierwork.plan.design import Design
from hierwork.plan.estimands import estimands_of
from hierwork.plan.families import get_family
from hierwork.plan.families.base import Family, OutcomeRows


@dataclass(frozen=True)
class FactorPlan:
    """One grouping factor, ready to model.

    Attributes
    ----------
    name, column : str
    levels : tuple of str
        Group labels (composed with the parents' for nested factors), in first-seen order.
    index : ndarray (n,)
        Group of each row (into ``levels``).
    sizes : ndarray (J,)
        Rows per group.
    varying : tuple of str
        Varying terms, ``"intercept"`` first.
    varying_cols : tuple of int
        Columns of the population design ``X`` that the varying terms multiply.
    predictors : tuple of str
        Names of the group-level predictor terms (a numeric column's name, ``column=level``
        for a categorical one's levels); their values per group are the rows of ``W`` (J, r).
    group_design : Design
        The terms of the group-level predictors (no intercept), stored in plan.json for ``predict``.
    parent : str or None
        Factor this one is nested in; ``parent_index`` (J,) maps groups to parent groups.
    parameterisation, reason : str
        ``"centred"``, ``"non_centred"`` or ``"partial"`` and why.
    weights : ndarray (J, q) or None
        With ``"partial"``: each group's weight per varying term, 1 centred, 0 non-centred
        (:func:`hierwork.plan.parameterisation.judge`).
    spread : str
        ``"varying"``: each group has its own residual SD (``F__spread``), else ``"fixed"``.
    """

    name: str
    column: str
    levels: tuple
    index: np.ndarray
    sizes: np.ndarray
    varying: tuple
    varying_cols: tuple
    predictors: tuple
    W: np.ndarray
    parent: str | None
    parent_index: np.ndarray | None
    parameterisation: str
    reason: str
    group_design: Design = Design(())
    spread: str = "fixed"
    weights: np.ndarray | None = None

    @property
    def n_groups(self) -> int:
        return len(self.levels)


@dataclass(frozen=True)
class ModelPlan:
    """Everything needed to build and fit the model, in the data's own units."""

    spec: object
    family: Family
    outcome: OutcomeRows
    design: Design
    X: np.ndarray
    factors: tuple
    priors: dict
    notes: tuple = field(default_factory=tuple)
    data_sha256: str = ""
    estimands: object = None  # plan.estimands.Estimands: reference values, outcome scale, target, contrasts
    missing: dict = field(default_factory=dict)  # Dataset.missing: policy, rows read and removed per column

    @property
    def terms(self) -> tuple:
        return self.design.names

    @property
    def y(self) -> np.ndarray:
        return self.outcome.y

    @property
    def trials(self):
        return self.outcome.trials

    @property
    def exposure(self):
        return self.outcome.exposure

    @property
    def known_sd(self):
        return self.outcome.known_sd

    @property
    def n(self) -> int:
        return len(self.outcome.y)

    def factor(self, name: str) -> FactorPlan:
        return next(f for f in self.factors if f.name == name)


def make_plan(spec, dataset) -> ModelPlan:
    """Turn a validated spec and dataset into a :class:`ModelPlan`.

    Parameters
    ----------
    spec : Spec
    dataset : Dataset

    Returns
    -------
    ModelPlan
    """
    frame = dataset.frame
    family = get_family(spec.outcome.family)
    rows = dataset.outcome_rows(spec.outcome)
    design = Design.from_spec(spec, dataset)
    X = design.matrix(frame)
    factor_plans = []
    for f in _parents_first(spec.factors):
        factor_plans.append(_factor_plan(f, dataset, design, factor_plans))
    factor_plans = _parameterise(factor_plans, family, rows, X)

    centre, spread = family.link_centre_spread(rows)
    term_stats = {name: (float(X[:, k].mean()), float(np.ptp(X[:, k])))
                  for k, name in enumerate(design.names) if k > 0}
    factors = [(fp.name, fp.varying, {col: (float(fp.W[:, k].mean()), float(np.ptp(fp.W[:, k])))
                                      for k, col in enumerate(fp.predictors)}) for fp in factor_plans]
    resolved = priors.default_priors(family, rows, term_stats, centre, spread, factors)
    resolved.update({f"{fp.name}.spread.sd": priors.spread_sd_prior(fp.name) for fp in factor_plans
                     if fp.spread == "varying"})
    priors.check_lkj_keys(spec)
    several = {**design.level_terms(), **{f"{fp.name}.{column}": [f"{fp.name}.{t}" for t in terms]
                                         for fp in factor_plans for column, terms in fp.group_design.level_terms().items()}}
    resolved = priors.apply_user_priors(resolved, spec, several)
    return ModelPlan(spec=spec, family=family, outcome=rows, design=design, X=X, factors=tuple(factor_plans),
                     priors=resolved, notes=design.notes, data_sha256=dataset.sha256,
                     estimands=estimands_of(spec, design, frame, factor_plans, family), missing=dict(dataset.missing))


def _factor_plan(f, dataset, design, done) -> FactorPlan:
    """A factor's groups and terms; its parameterisation is decided for all factors at once (:func:`_parameterise`)."""
    codes, uniques = pd.factorize(dataset.labels[f.name])
    codes = codes.astype(np.int64)
    sizes = np.bincount(codes, minlength=len(uniques))
    group_design = Design.of_group_predictors(f.predictor_settings, dataset)
    W = pd.DataFrame(group_design.matrix(dataset.frame)).groupby(codes).first().to_numpy() if f.predictors \
        else np.zeros((len(uniques), 0))
    parent_index = None
    if f.within is not None:
        parent = next(p for p in done if p.name == f.within)
        parent_index = pd.Series(parent.index).groupby(codes).first().to_numpy().astype(np.int64)
    return FactorPlan(name=f.name, column=f.column, levels=tuple(str(u) for u in uniques), index=codes,
                      sizes=sizes, varying=f.varying, varying_cols=tuple(design.index(t) for t in f.varying),
                      predictors=group_design.names, W=W, parent=f.within, parent_index=parent_index,
                      parameterisation=f.parameterisation, reason="set in the spec", group_design=group_design,
                      spread=f.spread)


def _parameterise(factor_plans, family, rows, X) -> list:
    """Resolve ``auto`` from the variance components of all factors, estimated jointly.

    The fixed part is the population design plus every factor's group-level
    predictors per row; each varying term of each factor is one component
    (:func:`hierwork.plan.parameterisation.variance_components`).
    """
    if not any(f.parameterisation in ("auto", "partial") for f in factor_plans):
        return factor_plans
    z, var = family.working_response(rows)
    fixed = np.column_stack([X] + [f.W[f.index] for f in factor_plans if f.predictors])
    blocks = [parameterisation.Block(f.name, term, f.index, f.n_groups, None if k == 0 else X[:, col] - X[:, col].mean())
              for f in factor_plans for k, (term, col) in enumerate(zip(f.varying, f.varying_cols))]
    components = parameterisation.variance_components(z, var, fixed, blocks)
    return [replace(f, **dict(zip(("parameterisation", "reason", "weights"),
                                  parameterisation.choose(f.parameterisation, components.of(f.name)))))
            for f in factor_plans]


def _parents_first(factors) -> list:
    done, order = set(), []
    pending = list(factors)
    while pending:
        for f in list(pending):
            if f.within is None or f.within in done:
                order.append(f)
                done.add(f.name)
                pending.remove(f)
    return order
