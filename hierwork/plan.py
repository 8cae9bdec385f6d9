"""Spec + Dataset -> :class:`ModelPlan`: arrays, terms, priors and parameterisation.

The plan is everything the model builders need and nothing they must work
out: the population design matrix in the data's own units, each factor's group
index and labels, the varying columns, group-level predictors, the nesting map,
resolved priors (defaults marked) and the sampling form of each factor.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from . import parameterisation, priors
from .data import Dataset
from .spec import Spec


@dataclass(frozen=True)
class FactorPlan:
    """One grouping factor, ready to model.

    Attributes
    ----------
    name, column : str
    levels : tuple of str
        Group labels (unique within parents for nested factors), in first-seen order.
    index : ndarray (n,)
        Group of each row (into ``levels``).
    sizes : ndarray (J,)
        Rows per group.
    varying : tuple of str
        Varying terms, ``"intercept"`` first.
    varying_cols : tuple of int
        Columns of the population design ``X`` that the varying terms multiply.
    predictors : tuple of str
        Group-level predictors; their values per group are the rows of ``W`` (J, r).
    parent : str or None
        Factor this one is nested in; ``parent_index`` (J,) maps groups to parent groups.
    parameterisation, reason : str
        ``"centred"`` or ``"non_centred"`` and why.
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

    @property
    def n_groups(self) -> int:
        return len(self.levels)


@dataclass(frozen=True)
class ModelPlan:
    """Everything needed to build and fit the model, in the data's own units."""

    spec: Spec
    family: str
    y: np.ndarray
    trials: np.ndarray | None
    exposure: np.ndarray | None
    known_sd: np.ndarray | None
    X: np.ndarray
    terms: tuple
    factors: tuple
    priors: dict
    notes: tuple = field(default_factory=tuple)
    data_sha256: str = ""

    @property
    def n(self) -> int:
        return len(self.y)

    def factor(self, name: str) -> FactorPlan:
        return next(f for f in self.factors if f.name == name)


def make_plan(spec: Spec, dataset: Dataset) -> ModelPlan:
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
    out = spec.outcome
    y = frame[out.column].to_numpy(dtype=float)
    trials = frame[out.trials].to_numpy(dtype=float) if out.trials else None
    exposure = frame[out.exposure].to_numpy(dtype=float) if out.exposure else None
    known_sd = frame[out.known_sd].to_numpy(dtype=float) if out.known_sd else None

    columns, terms, x_stats, categorical_terms, notes = [np.ones(len(frame))], ["intercept"], {}, {}, []
    for p in spec.predictors:
        if p.column in dataset.categorical:
            levels = dataset.categorical[p.column]
            level_terms = []
            for level in levels[1:]:
                term = f"{p.column}[{level}]"
                columns.append((frame[p.column].to_numpy() == level).astype(float))
                terms.append(term)
                level_terms.append(term)
                x_stats[term] = (float(columns[-1].mean()), 1.0, "categorical")
            categorical_terms[p.column] = level_terms
        else:
            _add_numeric(frame, p.column, columns, terms, x_stats)
    for f in spec.factors:
        for term in f.varying[1:]:
            if term not in terms:
                _add_numeric(frame, term, columns, terms, x_stats)
                notes.append(f"{term!r} varies by {f.name} and is not among the predictors: "
                             "added as a population term (the mean of the group slopes)")
    X = np.column_stack(columns)

    z, var = parameterisation.working_response(out.family, y, trials, exposure, known_sd)
    factor_plans = []
    order = _parents_first(spec.factors)
    for f in order:
        labels = dataset.labels[f.name]
        codes, uniques = pd.factorize(labels)
        codes = codes.astype(np.int64)
        sizes = np.bincount(codes, minlength=len(uniques))
        W = np.zeros((len(uniques), len(f.predictors)))
        for k, col in enumerate(f.predictors):
            W[:, k] = pd.Series(frame[col].to_numpy(dtype=float)).groupby(codes).first().to_numpy()
        parent_index = None
        if f.within is not None:
            parent = next(p for p in factor_plans if p.name == f.within)
            parent_index = pd.Series(parent.index).groupby(codes).first().to_numpy().astype(np.int64)
        judged = [("intercept", *parameterisation.informativeness(z, var, codes, len(uniques)))]
        for term in f.varying[1:]:
            x = X[:, terms.index(term)]
            judged.append((term, *parameterisation.slope_informativeness(z, x, codes, len(uniques))))
        form, reason = parameterisation.choose(f.parameterisation, judged)
        factor_plans.append(FactorPlan(
            name=f.name, column=f.column, levels=tuple(str(u) for u in uniques), index=codes, sizes=sizes,
            varying=f.varying, varying_cols=tuple(terms.index(t) for t in f.varying),
            predictors=f.predictors, W=W, parent=f.within, parent_index=parent_index,
            parameterisation=form, reason=reason))

    centre, spread = priors.link_scale_outcome(out.family, y, trials, exposure)
    gp_stats = []
    for fp in factor_plans:
        stats = {}
        for k, col in enumerate(fp.predictors):
            sd = float(np.std(fp.W[:, k], ddof=1))
            stats[col] = (float(np.mean(fp.W[:, k])), sd if sd > 0 else 1.0)
        gp_stats.append((fp.name, fp.varying, stats))
    resolved = priors.default_priors(out.family, terms, x_stats, centre, spread, gp_stats, known_sd is not None)
    priors.check_lkj_keys(spec)
    resolved = priors.apply_user_priors(resolved, spec, categorical_terms)
    return ModelPlan(spec=spec, family=out.family, y=y, trials=trials, exposure=exposure, known_sd=known_sd,
                     X=X, terms=tuple(terms), factors=tuple(factor_plans), priors=resolved,
                     notes=tuple(notes), data_sha256=dataset.sha256)


def _add_numeric(frame, column, columns, terms, x_stats) -> None:
    values = frame[column].to_numpy(dtype=float)
    sd = float(np.std(values, ddof=1)) if len(values) > 1 else 0.0
    columns.append(values)
    terms.append(column)
    x_stats[column] = (float(values.mean()), sd if sd > 0 else 1.0, "numeric")


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
