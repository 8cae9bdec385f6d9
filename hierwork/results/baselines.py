"""The two ends of the pooling spectrum, beside every partially pooled estimate.

* **Complete pooling**: one coefficient per population term for everyone (plus
  group-level predictors at row level), same family.
* **No pooling**: per factor, a separate coefficient for every group and varying
  term (group indicator columns), with the same non-varying population terms
  and the same family; other factors and group-level predictors are left out
  (group indicators absorb them).

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
        Columns ``factor, group, term, n, no_pooling, complete_pooling``; values
        on the scale of the linear predictor with population predictors at 0.
    """
    cp = _complete_pooling(plan)
    frames = []
    for f in plan.factors:
        np_coef = _no_pooling(plan, f)
        for t, term in enumerate(f.varying):
            cp_value = np.full(f.n_groups, cp["b"][f.varying_cols[t]])
            if t == 0:
                cp_value = cp_value + _group_shift(plan, f, cp)
            frames.append(pd.DataFrame({"factor": f.name, "group": list(f.levels), "term": term,
                                        "n": f.sizes, "no_pooling": np_coef[:, t],
                                        "complete_pooling": cp_value}))
    return pd.concat(frames, ignore_index=True)


def _group_shift(plan, f, cp) -> np.ndarray:
    """Sum of group-level predictor contributions of ``f`` and its ancestors, per group of ``f``."""
    shift = np.zeros(f.n_groups)
    node, idx = f, np.arange(f.n_groups)
    while node is not None:
        if node.predictors:
            shift += (node.W @ cp[node.name])[idx]
        if node.parent is None:
            break
        idx = node.parent_index[idx]
        node = plan.factor(node.parent)
    return shift


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
    """Per-group coefficients of the varying terms of ``f``; NaN where not finite."""
    n, J, q = plan.n, f.n_groups, len(f.varying)
    rows = np.arange(n)
    blocks = [sp.csr_matrix((plan.X[:, col], (rows, f.index)), shape=(n, J)) for col in f.varying_cols]
    shared = [k for k in range(plan.X.shape[1]) if k not in f.varying_cols]
    if shared:
        blocks.append(sp.csr_matrix(plan.X[:, shared]))
    design = sp.hstack(blocks, format="csr")
    keep = ~_at_boundary(plan, f)[f.index]
    coef = fit_glm(plan, design, keep)
    per_group = coef[: J * q].reshape(q, J).T.copy()
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
