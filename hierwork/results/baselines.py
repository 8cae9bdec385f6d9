"""The two ends of the pooling spectrum, beside every partially pooled estimate.

* **Complete pooling**: one coefficient per population term for everyone (plus
  group-level predictors at row level), same family.
* **No pooling**: per factor, a separate coefficient for every group and varying
  term (group indicator columns), with the same non-varying population terms,
  the group-level predictors that vary within the factor's groups (those of
  nested children and of crossed factors) and the same family; the factor's
  own and its ancestors' group-level predictors and every other factor's
  offsets are left out (group indicators absorb them).

Both are reported where the partially pooled estimates are: a group's
intercept row is its linear predictor at the reference values
(:mod:`hierwork.plan.estimands`), its slope rows the slopes themselves. So a
parent factor's no-pooling value and its partially pooled value describe the
same typical child (child-level predictors at their reference values).

Both are maximum-likelihood fits by iteratively reweighted least squares on a
sparse design (McCullagh and Nelder 1989, "Generalized Linear Models", 2nd ed.,
§2.5), which reduces to the closed forms for normal outcomes: ordinary least
squares (group means without predictors) and, with known SDs, the
precision-weighted mean. Each family supplies its working response and weights
(:meth:`~hierwork.plan.families.base.Family.glm_working`) and any nuisance
update (the negative binomial's dispersion, Student-t's EM weights). A group
whose outcomes sit at a boundary (the family's
:meth:`~hierwork.plan.families.base.Family.boundary`: all failures or all
successes, all zero counts) has no finite no-pooling estimate: its value is NaN
and its rows do not enter that fit.
"""
from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy.sparse.linalg import MatrixRankWarning, spsolve

from hierwork.plan.plan import ModelPlan


def baselines(plan: ModelPlan) -> pd.DataFrame:
    """Complete- and no-pooling estimates for every factor, group and varying term.

    Parameters
    ----------
    plan : ModelPlan

    Returns
    -------
    pandas.DataFrame
        Columns ``factor, group, term, no_pooling, complete_pooling``, on the
        scale of the linear predictor: intercept rows at the reference values,
        slope rows the slopes.
    """
    ref = plan.estimands
    cp = _complete_pooling(plan)
    frames = []
    for f in plan.factors:
        own = lineage(plan, f)
        at_reference = float(ref.x @ cp["b"]) + sum(
            float(ref.w[g.name] @ cp[g.name]) for g in plan.factors if g.predictors and g.name not in own)
        np_coef = _no_pooling(plan, f)
        for t, term in enumerate(f.varying):
            cp_value = np.full(f.n_groups, cp["b"][f.varying_cols[t]])
            if t == 0:
                cp_value = at_reference + group_shift(plan, f, cp)
            frames.append(pd.DataFrame({"factor": f.name, "group": list(f.levels), "term": term,
                                        "no_pooling": np_coef[:, t], "complete_pooling": cp_value}))
    return pd.concat(frames, ignore_index=True)


def lineage(plan: ModelPlan, f) -> list:
    """Names of ``f`` and its ancestors (the factors whose group-level values a group of ``f`` has)."""
    names = [f.name]
    while f.parent is not None:
        f = plan.factor(f.parent)
        names.append(f.name)
    return names


def group_shift(plan, f, coef) -> np.ndarray:
    """Sum of group-level predictor contributions of ``f`` and its ancestors, per group of ``f``.

    ``coef[F]`` are the group-level coefficients of factor ``F`` (arrays of any
    leading shape, e.g. draws, with the predictors last).
    """
    shift = 0.0
    node, idx = f, np.arange(f.n_groups)
    while node is not None:
        if node.predictors:
            shift = shift + np.asarray(coef[node.name]) @ node.W[idx].T
        if node.parent is None:
            break
        idx = node.parent_index[idx]
        node = plan.factor(node.parent)
    return shift + np.zeros(f.n_groups)


def _complete_pooling(plan: ModelPlan) -> dict:
    blocks = [plan.X] + [f.W[f.index] for f in plan.factors if f.predictors]
    design = sp.csr_matrix(np.column_stack(blocks))
    coef = fit_glm(plan, design, np.ones(plan.n, bool))
    out, k = {"b": coef[: plan.X.shape[1]]}, plan.X.shape[1]
    for f in plan.factors:
        if f.predictors:
            out[f.name] = coef[k: k + len(f.predictors)]
            k += len(f.predictors)
    return out


def _no_pooling(plan: ModelPlan, f) -> np.ndarray:
    """Per-group values of the varying terms of ``f`` (intercept at the reference values); NaN where not finite."""
    n, J, q = plan.n, f.n_groups, len(f.varying)
    ref = plan.estimands
    rows = np.arange(n)
    blocks = [sp.csr_matrix((plan.X[:, col], (rows, f.index)), shape=(n, J)) for col in f.varying_cols]
    shared = [k for k in range(plan.X.shape[1]) if k not in f.varying_cols]
    within = [g for g in plan.factors if g.predictors and g.name not in lineage(plan, f)]
    extra = [plan.X[:, shared]] + [g.W[g.index] for g in within]
    if shared or within:
        blocks.append(sp.csr_matrix(np.column_stack(extra)))
    design = sp.hstack(blocks, format="csr")
    keep = ~_at_boundary(plan, f)[f.index]
    coef = fit_glm(plan, design, keep)
    per_group = coef[: J * q].reshape(q, J).T.copy()
    reference = np.concatenate([ref.x[shared]] + [ref.w[g.name] for g in within])
    per_group[:, 0] += per_group[:, 1:] @ ref.x[list(f.varying_cols[1:])] + float(coef[J * q:] @ reference)
    per_group[_at_boundary(plan, f)] = np.nan
    unidentified = np.bincount(f.index[keep], minlength=J) < q
    per_group[unidentified] = np.nan
    return per_group


def _at_boundary(plan: ModelPlan, f) -> np.ndarray:
    """Groups whose no-pooling maximum-likelihood estimate is infinite."""
    return plan.family.boundary(plan.outcome, f.index, f.n_groups)


def fit_glm(plan: ModelPlan, design: sp.csr_matrix, keep: np.ndarray, max_iter: int = 100) -> np.ndarray:
    """Maximum-likelihood coefficients of ``plan``'s family on ``design`` rows ``keep``.

    Iteratively reweighted least squares; the normal equations are solved
    exactly, with a tiny ridge (1e-9 of the mean diagonal) only when they are
    singular, so that columns without data stay finite.
    """
    D = design[keep]
    family, rows = plan.family, plan.outcome.rows(keep)
    offset = family.offset(rows)
    coef = np.zeros(D.shape[1])
    eta, state = family.glm_start(rows), {}
    for _ in range(max_iter):
        z, w = family.glm_working(rows, eta, state)
        new = _weighted_solve(D, z, w)
        eta = D @ new + offset
        converged = np.max(np.abs(new - coef)) < 1e-10 * (1 + np.max(np.abs(new)))
        coef = new
        state = family.glm_update(rows, eta, state)
        if converged or family.glm_one_step:
            break
    return coef


def _weighted_solve(D, z, w) -> np.ndarray:
    """Solve the weighted normal equations exactly; a tiny ridge only if they are singular."""
    Wd = D.multiply(w[:, None]).tocsr()
    A = (D.T @ Wd).tocsc()
    rhs = D.T @ (w * z)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MatrixRankWarning)
        coef = np.atleast_1d(spsolve(A, rhs))
    if np.all(np.isfinite(coef)):
        return coef
    ridge = 1e-9 * max(float(A.diagonal().mean()), 1e-12)
    return np.atleast_1d(spsolve(A + ridge * sp.identity(A.shape[0], format="csc"), rhs))
