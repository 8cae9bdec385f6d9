"""Choosing centred or non-centred group effects from how informative the data are.

Rule (``parameterisation: auto``). For each factor, estimate on the scale of
the linear predictor the between-group SD ``tau`` and each group's sampling
variance ``v_j`` of its own mean (``sigma^2 / n_j`` for normal outcomes, the
inverse Fisher information for the others, ``1 / sum(1/se^2)`` with known
SDs), from each family's working response
(:meth:`~hierwork.plan.families.base.Family.working_response`). The data are
informative about group ``j`` when ``kappa_j = tau^2 / v_j``
exceeds 1 (the likelihood is sharper than the population distribution). If the
median ``kappa_j`` (at the low end of ``tau``, below) is at least 1 the factor is
sampled **centred**, otherwise
**non-centred**; when no between-group variation is detectable (``tau`` = 0 by
the method of moments) the factor is non-centred. A varying slope of ``x`` is
judged the same way, with each group's own least-squares slope, its sampling
variance ``sigma^2 / S_xx,j`` (``S_xx,j`` the within-group sum of squares of
``x``; 0 makes the group uninformative) and the moments estimate of the slopes'
SD; the factor is centred only if every varying term is data-rich. Because the
posterior of ``tau`` reaches well below its estimate when groups are few, the
median ``kappa_j`` is judged at the lower 5% bound of ``tau^2`` (the estimate
times ``chi2_{0.05, J-1} / (J-1)``, treating it as a one-way ANOVA variance
component): 3 groups need about 20 times more data per group than many groups.

Why: the centred form mixes well when each group is pinned down by its own data
and poorly (a funnel) when the population distribution dominates; the
non-centred form is the opposite (Papaspiliopoulos, Roberts and Sköld 2007,
"A general framework for the parametrization of hierarchical models",
Statist. Sci. 22, 59-73; Betancourt and Girolami 2013, "Hamiltonian Monte Carlo
for hierarchical models", arXiv:1312.0906).
"""
from __future__ import annotations

import numpy as np


def informativeness(z, var, index, n_groups):
    """Method-of-moments ``tau^2`` and per-group ``kappa_j`` (see module docstring).

    Parameters
    ----------
    z : ndarray
        Per-row working response on the link scale.
    var : ndarray or None
        Per-row sampling variance; ``None`` means unknown and common (estimated
        from the pooled within-group variance).
    index : ndarray of int
        Group of each row.
    n_groups : int
    """
    counts = np.bincount(index, minlength=n_groups).astype(float)
    if var is None:
        sums = np.bincount(index, z, n_groups)
        means = sums / counts
        resid = z - means[index]
        dof = len(z) - n_groups
        sigma2 = float(resid @ resid / dof) if dof > 0 else float(np.var(z))
        v = sigma2 / counts
    else:
        w = 1.0 / var
        wsum = np.bincount(index, w, n_groups)
        means = np.bincount(index, w * z, n_groups) / wsum
        v = 1.0 / wsum
    # Between-group variance by moments: var(means) - mean(v), floored at 0.
    tau2 = max(float(np.var(means, ddof=1)) - float(np.mean(v)), 0.0) if n_groups > 1 else 0.0
    return tau2, tau2 / v


def slope_informativeness(z, x, index, n_groups):
    """Moments ``tau^2`` of per-group slopes of ``z`` on ``x`` and per-group ``kappa_j``."""
    counts = np.bincount(index, minlength=n_groups).astype(float)
    xm = np.bincount(index, x, n_groups) / counts
    zm = np.bincount(index, z, n_groups) / counts
    dx, dz = x - xm[index], z - zm[index]
    sxx = np.bincount(index, dx * dx, n_groups)
    sxy = np.bincount(index, dx * dz, n_groups)
    ok = sxx > 1e-12 * max(float(sxx.max()), 1e-300)
    dof = len(z) - 2 * int(ok.sum()) - int((~ok).sum())
    slopes = np.where(ok, sxy / np.where(ok, sxx, 1.0), 0.0)
    resid = dz - slopes[index] * dx
    sigma2 = float(resid @ resid / dof) if dof > 0 else float(np.var(z))
    if ok.sum() < 2:
        return 0.0, np.zeros(n_groups)
    v = sigma2 / sxx[ok]
    tau2 = max(float(np.var(slopes[ok], ddof=1)) - float(np.mean(v)), 0.0)
    kappa = np.zeros(n_groups)
    kappa[ok] = tau2 / v
    return tau2, kappa


def choose(requested: str, judged: list) -> tuple[str, str]:
    """Apply the rule to ``[(term, tau2, kappa), ...]``; returns (parameterisation, reason)."""
    if requested != "auto":
        return requested, "set in the spec"
    n_groups = len(judged[0][2])
    for term, tau2, _ in judged:
        if tau2 <= 0:
            return "non_centred", f"no between-group variation in {term} detectable by moments: non-centred"
    low = tau2_lower_factor(n_groups)
    medians = [(float(np.median(kappa)) * low, term) for term, _, kappa in judged]
    med, term = min(medians)
    if med >= 1:
        return "centred", (f"median tau^2/v_j = {med:.3g} >= 1 for {term} at the low end of tau "
                           f"({n_groups} groups; data-rich): centred")
    return "non_centred", (f"median tau^2/v_j = {med:.3g} < 1 for {term} at the low end of tau "
                           f"({n_groups} groups; data-poor or few groups): non-centred")


def tau2_lower_factor(n_groups: int) -> float:
    """Lower 5% bound of ``tau^2`` relative to its moments estimate, ``chi2_{0.05, J-1} / (J-1)``.

    Treats the between-group variance estimate as scaled chi-square with J - 1
    degrees of freedom (the classical one-way ANOVA result), so that few groups,
    whose SD posterior reaches towards 0, need much more data per group before
    the centred form is chosen.
    """
    from scipy.stats import chi2

    dof = max(n_groups - 1, 1)
    return float(chi2.ppf(0.05, dof) / dof)
