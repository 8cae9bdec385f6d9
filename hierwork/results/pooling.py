"""How much each group is pooled: the pooling weight per group and the pooling factor per factor.

**Pooling weight** (``group_estimates.csv``, column ``pooling_weight``). In the
normal hierarchical model with known variances a group's posterior mean is
``(1 - B_j) * own estimate + B_j * population value`` with

    B_j = v_j / (v_j + tau^2),

``v_j`` the sampling variance of the group's own estimate and ``tau^2`` the
between-group variance (Efron, B. and Morris, C. 1975, "Data analysis using
Stein's estimator and its generalizations", JASA 70, 311-319; Gelman et al.
2013, *Bayesian Data Analysis*, 3rd ed., section 5.5). ``pooling_weight`` is the
posterior mean of ``B_j``: each draw's ``tau`` (``F__sd``, with ``F__corr``) and
``v_j`` from that draw's Fisher information on the link scale
(:meth:`~hierwork.plan.families.base.Family.information` summed over the
group's rows: ``sigma^2 / n_j`` for normal outcomes, ``1 / sum n p (1 - p)``
for binomial ones, ``1 / sum mu`` for Poisson counts). It lies in [0, 1]: 0 when
the group's own data decide, 1 when it takes the population value.

With several varying terms, ``v_j`` of a term is the diagonal element of the
inverse of the group's information matrix in the terms' columns, taken about
the reference values, so that the intercept row's weight is that of the
group's value at the reference values (its ``tau^2`` is then
``a' Sigma a`` with ``a = (1, x_ref)``); the exact shrinkage is a matrix, this is
its per-term summary. A group of a factor with nested children gets
``v_j = 1 / sum_k 1 / (v_k + tau_child^2)`` over its child groups ``k`` (the
children's own variation is part of the parent's sampling variance); crossed
factors are judged on their own rows. Groups whose data cannot identify a term
(one row, or a slope's predictor constant within the group) get ``v_j``
infinite and weight 1.

**Pooling factor** (``pooling.csv``): Gelman and Pardoe (2006), see
:func:`pooling_factors`.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.sparse as sp

from hierwork.plan.plan import ModelPlan
from hierwork.results.draws import chunks, distinct_rows, draws_of, linear_predictor, rows_of, within_budget

#: Draws x distinct rows evaluated for the pooling weights; above it, evenly spaced draws (at least 100).
WEIGHT_ROW_CELLS = 50_000_000
#: Draws x groups x terms^2 of information matrices held at once.
WEIGHT_GROUP_CELLS = 20_000_000
#: Relative ridge that keeps a singular information matrix invertible (its term's variance then explodes).
_RIDGE = 1e-10


def pooling_weights(idata, plan: ModelPlan) -> dict:
    """Posterior mean pooling weight of every group and varying term: factor -> array (J, q)."""
    family, ref = plan.family, plan.estimands
    draws = draws_of(idata.posterior, plan.factors, family.parameters(plan.outcome))
    widest = max(f.n_groups * len(f.varying) ** 2 for f in plan.factors)
    distinct = distinct_rows(rows_of(plan))  # identical rows carry identical information
    rows = distinct.rows
    keep = min(within_budget(draws.n, rows.n, WEIGHT_ROW_CELLS), within_budget(draws.n, widest, WEIGHT_GROUP_CELLS),
               key=len)
    draws = draws.subset(keep)
    info = {f.name: np.zeros((draws.n, f.n_groups, len(f.varying), len(f.varying))) for f in plan.factors}
    for sl in chunks(draws.n, rows.n):
        eta = linear_predictor(draws, rows, sl)
        w = np.broadcast_to(family.information(eta, rows.outcome.rows(sl), draws.family_params(rows, sl)), eta.shape)
        for f, (_, index, _, _) in zip(plan.factors, rows.groups):
            Z = rows.X[sl][:, list(f.varying_cols)] - ref.x[list(f.varying_cols)]
            Z[:, 0] = 1.0
            S = sp.csr_matrix((distinct.counts[sl].astype(float), (np.arange(Z.shape[0]), index[sl])),
                              shape=(Z.shape[0], f.n_groups))
            for a in range(Z.shape[1]):
                for c in range(a, Z.shape[1]):
                    total = np.asarray((w * (Z[:, a] * Z[:, c])) @ S)
                    info[f.name][:, :, a, c] += total
                    if a != c:
                        info[f.name][:, :, c, a] += total
    variance, between = {}, {}
    for f in reversed(plan.factors):  # children before parents
        variance[f.name] = _own_variance(info.pop(f.name))
        between[f.name] = _between_variance(idata.posterior, f, ref, keep)
        for child in (c for c in plan.factors if c.parent == f.name):
            for t, term in enumerate(f.varying):
                if term in child.varying:
                    k = child.varying.index(term)
                    precision = 1.0 / (variance[child.name][:, :, k] + between[child.name][:, None, k])
                    parent_sum = np.asarray(precision @ _indicator(child.parent_index, f.n_groups))
                    variance[f.name][:, :, t] = 1.0 / parent_sum
    out = {}
    for f in plan.factors:
        v, tau2 = variance[f.name], between[f.name][:, None, :]
        with np.errstate(invalid="ignore", divide="ignore"):
            weight = np.where(np.isfinite(v) & (v + tau2 > 0), v / (v + tau2), 1.0)
        out[f.name] = weight.mean(axis=0)
    return out


def _indicator(index: np.ndarray, n_groups: int) -> sp.csr_matrix:
    return sp.csr_matrix((np.ones(len(index)), (np.arange(len(index)), index)), shape=(len(index), n_groups))


def _own_variance(info: np.ndarray) -> np.ndarray:
    """Diagonal of the inverse information matrices (D, J, q, q) -> (D, J, q); inf where not identified."""
    q = info.shape[-1]
    if q == 1:
        with np.errstate(divide="ignore"):
            return np.where(info[..., 0, 0] > 0, 1.0 / np.maximum(info[..., 0, 0], 1e-300), np.inf)[..., None]
    scale = np.maximum(np.trace(info, axis1=-2, axis2=-1) / q, 1e-300)[..., None, None]
    inverse = np.linalg.inv(info + _RIDGE * scale * np.eye(q))
    v = np.diagonal(inverse, axis1=-2, axis2=-1).copy()
    return np.where(v * np.diagonal(info, axis1=-2, axis2=-1) > 1 / _RIDGE / 10, np.inf, v)


def _between_variance(posterior, f, ref, keep: np.ndarray) -> np.ndarray:
    """Per draw, the between-group variance of each term's row: (D, q); the intercept's at the reference values."""
    q = len(f.varying)
    sd = np.asarray(posterior[f"{f.name}__sd"].values, float).reshape(-1, q)[keep]
    tau2 = sd ** 2
    if q > 1:
        corr = np.asarray(posterior[f"{f.name}__corr"].values, float).reshape(-1, q, q)[keep]
        cov = sd[:, :, None] * corr * sd[:, None, :]
        a = np.r_[1.0, ref.x[list(f.varying_cols[1:])]]
        tau2[:, 0] = np.einsum("i,dij,j->d", a, cov, a)
    return tau2


def pooling_factors(idata, plan: ModelPlan) -> pd.DataFrame:
    """Pooling factor per factor and varying term (Gelman and Pardoe 2006).

    ``lambda = 1 - V_j(E[u_j]) / E[V_j(u_j)]``, where ``V_j`` is the variance
    across groups and ``E`` the posterior mean (Gelman, A. and Pardoe, I. 2006,
    "Bayesian measures of explained variance and pooling in multilevel
    (hierarchical) models", Technometrics 48, 241-251, eq. 8). Near 0: groups
    keep their own estimates; near 1: they are pooled to the population value.
    With ``spread: varying`` the row of term ``spread`` does the same for the
    log offsets of the groups' residual SDs (``F__spread_effect``).
    """
    rows = []
    for f in plan.factors:
        effect = idata.posterior[f"{f.name}__effect"].values  # (c, d, J, q)
        flat = effect.reshape(-1, f.n_groups, len(f.varying))
        terms = list(f.varying)
        if f.spread == "varying":
            offsets = idata.posterior[f"{f.name}__spread_effect"].values.reshape(-1, f.n_groups, 1)
            flat, terms = np.concatenate([flat, offsets], axis=2), terms + ["spread"]
        for t, term in enumerate(terms):
            e_var = float(np.mean(np.var(flat[:, :, t], axis=1, ddof=1)))
            var_e = float(np.var(flat[:, :, t].mean(axis=0), ddof=1))
            rows.append({"factor": f.name, "term": term, "n_groups": f.n_groups,
                         "pooling_factor": 1 - var_e / e_var if e_var > 0 else np.nan})
    return pd.DataFrame(rows)
