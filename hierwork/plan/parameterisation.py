"""Choosing centred or non-centred group effects from how informative the data are.

Rule (``parameterisation: auto``), from all factors at once:

1. **Joint variance components.** On the scale of the linear predictor, the
   family's working response ``z`` (with its per-row sampling variance, or an
   unknown common residual variance for normal-type outcomes;
   :meth:`~hierwork.plan.families.base.Family.working_response`) is taken as a
   linear mixed model with the population terms (and group-level predictors)
   as fixed effects and one independent variance component ``tau^2`` per
   factor and varying term. The components of every factor are estimated
   together by REML, with the EM iterations of Henderson's mixed-model
   equations (Searle, Casella and McCulloch 1992, *Variance Components*,
   §8.3), so that one factor's variation is not mistaken for another's noise
   (the one-factor method of moments counted a crossed factor's variance as
   within-group noise and judged a data-rich factor data-poor).
2. **Informativeness per group.** At those components, each group's effect has
   posterior variance ``PV_j`` (diagonal of the inverse of the mixed-model
   equations: the other factors' effects integrated out). For one factor,
   ``PV_j = 1 / (1/tau^2 + 1/v_j)`` with ``v_j`` the sampling variance of the
   group's own estimate, so ``kappa_j = tau^2 / PV_j - 1 = tau^2 / v_j``: the
   data are informative about group ``j`` when ``kappa_j`` exceeds 1 (the
   likelihood is sharper than the population distribution). With crossed or
   nested factors the same formula counts only the information left once the
   other factors are accounted for. Above ``DENSE_MAX`` effects the inverse is
   approximated by its diagonal blocks per group (each factor conditional on
   the others' estimates), which can overstate ``kappa_j`` for crossed factors
   with few repeats.
3. **Decision.** Because the posterior of ``tau`` reaches well below its
   estimate when groups are few, ``kappa_j`` is judged at the lower 5% bound of
   ``tau^2`` (the estimate times ``chi2_{0.05, J-1} / (J-1)``, treating it as a
   one-way ANOVA variance component): 3 groups need about 20 times more data
   per group than many groups. A factor is sampled **centred** if the median
   ``kappa_j`` of each of its varying terms is at least 1 there, otherwise
   **non-centred**; when a component is estimated at (practically) 0 the factor
   is non-centred (EM approaches 0 slowly, so a component whose largest
   ``kappa_j`` is under 0.01 counts as 0).

Why: the centred form mixes well when each group is pinned down by its own data
and poorly (a funnel) when the population distribution dominates; the
non-centred form is the opposite (Papaspiliopoulos, Roberts and Sköld 2007,
"A general framework for the parametrization of hierarchical models",
Statist. Sci. 22, 59-73; Betancourt and Girolami 2013, "Hamiltonian Monte Carlo
for hierarchical models", arXiv:1312.0906).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg, sparse
from scipy.sparse.linalg import splu

#: Largest number of population terms plus group effects whose mixed-model
#: equations are inverted exactly (dense, a fraction of a second per iteration).
DENSE_MAX = 1500

#: EM iterations at most, and the relative change of every component that stops them.
MAX_ITER, TOLERANCE = 200, 1e-4

#: A component below this fraction of the working response's variance counts as 0, and so
#: does one whose largest ``kappa_j`` is below ``NEGLIGIBLE``.
ZERO, NEGLIGIBLE = 1e-6, 0.01


@dataclass(frozen=True)
class Block:
    """One variance component: a factor's varying term.

    ``index`` (n,) is the group of each row, ``x`` (n,) the column the effect
    multiplies (None: the intercept, 1 for every row).
    """

    factor: str
    term: str
    index: np.ndarray
    n_groups: int
    x: np.ndarray | None = None


@dataclass(frozen=True)
class Components:
    """Joint estimates: ``tau2[k]`` and per-group ``kappa[k]`` of ``blocks[k]``; ``exact``: dense inverse."""

    blocks: tuple
    tau2: np.ndarray
    kappa: tuple
    sigma2: float | None
    iterations: int
    exact: bool

    def of(self, factor: str) -> list:
        """``[(term, tau2, kappa), ...]`` of one factor's blocks, for :func:`choose`."""
        return [(b.term, float(t), k) for b, t, k in zip(self.blocks, self.tau2, self.kappa) if b.factor == factor]


def variance_components(z, var, X, blocks) -> Components:
    """REML estimates of every block's variance and each group's ``kappa_j`` (module docstring).

    Parameters
    ----------
    z : ndarray (n,)
        Working response on the link scale.
    var : ndarray (n,) or None
        Its per-row sampling variance; None: unknown and common, estimated.
    X : ndarray (n, p)
        Fixed effects (population terms and group-level predictors per row).
    blocks : list of Block
    """
    n = len(z)
    Z = sparse.hstack([sparse.csc_matrix((np.ones(n) if b.x is None else b.x, (np.arange(n), b.index)),
                                         shape=(n, b.n_groups)) for b in blocks], format="csc")
    starts = np.cumsum([0] + [b.n_groups for b in blocks])
    q, p = Z.shape[1], X.shape[1]
    which = np.repeat(np.arange(len(blocks)), [b.n_groups for b in blocks])
    w = np.ones(n) if var is None else 1.0 / var
    WX, WZ = X * w[:, None], Z.multiply(w[:, None]).tocsc()
    A, B, D = X.T @ WX, np.asarray((WZ.T @ X)).T, (Z.T @ WZ).tocsc()
    rhs0 = np.concatenate([WX.T @ z, WZ.T @ z])
    A = A + np.eye(p) * 1e-10 * max(float(np.trace(A)) / p, 1e-300)  # a collinear design stays solvable
    scale = max(float(np.var(z)), 1e-12)
    sigma2 = scale / (len(blocks) + 1) if var is None else 1.0
    tau2 = np.full(len(blocks), scale / (len(blocks) + 1))
    exact = p + q <= DENSE_MAX
    for iteration in range(1, MAX_ITER + 1):
        ginv = 1.0 / np.maximum(tau2, ZERO * scale)
        sol, pv = _solve(A, B, D, rhs0, ginv[which] * sigma2, exact)
        u = sol[p:]
        new = np.array([(u[s:e] @ u[s:e] + sigma2 * pv[s:e].sum()) / (e - s) for s, e in zip(starts, starts[1:])])
        if var is None:
            new_sigma2 = max(float(z @ z - sol @ rhs0) / max(n - p, 1), ZERO * scale)
            change = abs(new_sigma2 - sigma2) / sigma2
            sigma2 = new_sigma2
        else:
            change = 0.0
        change = max(change, float(np.max(np.abs(new - tau2) / np.maximum(tau2, ZERO * scale))))
        tau2 = new
        if change < TOLERANCE:
            break
    ginv = 1.0 / np.maximum(tau2, ZERO * scale)
    _, pv = _solve(A, B, D, rhs0, ginv[which] * sigma2, exact)
    kappa = [np.maximum(t / np.maximum(sigma2 * pv[s:e], 1e-300) - 1.0, 0.0)
             for t, s, e in zip(tau2, starts, starts[1:])]
    # EM approaches a zero component only slowly: call it 0 once no group's data carry a
    # hundredth of the information its population distribution does.
    none = np.array([t < ZERO * scale * 10 or float(k.max()) < NEGLIGIBLE for t, k in zip(tau2, kappa)])
    tau2 = np.where(none, 0.0, tau2)
    kappa = tuple(np.zeros_like(k) if z else k for k, z in zip(kappa, none))
    return Components(tuple(blocks), tau2, kappa, sigma2 if var is None else None, iteration, exact)


def _solve(A, B, D, rhs, ginv, exact):
    """Solution of the mixed-model equations and the diagonal of their inverse's effect block.

    Equations ``[[A, B], [B', D + diag(ginv)]]`` (weights relative to the
    residual variance). ``exact``: dense Cholesky; otherwise a sparse LU for the
    solution and the diagonal blocks' inverse for the variances.
    """
    p = A.shape[0]
    if exact:
        C = np.block([[A, B], [B.T, D.toarray() + np.diag(ginv)]])
        factor = linalg.cho_factor(C, lower=True)
        inv = linalg.cho_solve(factor, np.eye(len(C)))
        return inv @ rhs, np.diag(inv)[p:]
    Dg = D + sparse.diags(ginv)
    C = sparse.bmat([[sparse.csc_matrix(A), sparse.csc_matrix(B)], [sparse.csc_matrix(B.T), Dg]], format="csc")
    return splu(C).solve(rhs), 1.0 / Dg.diagonal()


def choose(requested: str, judged: list) -> tuple[str, str]:
    """Apply the rule to ``[(term, tau2, kappa), ...]``; returns (parameterisation, reason)."""
    if requested != "auto":
        return requested, "set in the spec"
    n_groups = len(judged[0][2])
    for term, tau2, _ in judged:
        if tau2 <= 0:
            return "non_centred", (f"no between-group variation in {term} detectable (joint REML estimate 0): "
                                   "non-centred")
    low = tau2_lower_factor(n_groups)
    medians = [(float(np.median(kappa)) * low, term) for term, _, kappa in judged]
    med, term = min(medians)
    if med >= 1:
        return "centred", (f"median tau^2/v_j = {med:.3g} >= 1 for {term} at the low end of tau "
                           f"({n_groups} groups; data-rich; all factors' variances estimated jointly): centred")
    return "non_centred", (f"median tau^2/v_j = {med:.3g} < 1 for {term} at the low end of tau "
                           f"({n_groups} groups; data-poor or few groups; all factors' variances estimated "
                           "jointly): non-centred")


def tau2_lower_factor(n_groups: int) -> float:
    """Lower 5% bound of ``tau^2`` relative to its estimate, ``chi2_{0.05, J-1} / (J-1)``.

    Treats the between-group variance estimate as scaled chi-square with J - 1
    degrees of freedom (the classical one-way ANOVA result), so that few groups,
    whose SD posterior reaches towards 0, need much more data per group before
    the centred form is chosen.
    """
    from scipy.stats import chi2

    dof = max(n_groups - 1, 1)
    return float(chi2.ppf(0.05, dof) / dof)
