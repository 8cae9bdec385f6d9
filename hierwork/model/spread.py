"""Varying residual spread: each group of a factor with ``spread: varying`` has its own residual SD.

The log residual SD of row ``i`` is the population's plus one offset per such
factor, partially pooled like group effects (non-centred)::

    log sigma_i = log residual_sd + sum_F s_F[j_F(i)],   s_F = F__spread_sd * z_F,   z_F ~ N(0, 1)

``residual_sd`` is then the residual SD of a typical group (the median over
groups in the population). Stored per factor: ``F__spread_sd`` (the SD of the
log offsets), ``F__spread_effect`` (dim ``F``, the offsets ``s_F``) and
``F__spread`` (dim ``F``, the group's residual SD ``residual_sd * exp(s_F[j])``,
outcome units). Only the per-row model takes it (:mod:`hierwork.model.paths`).
"""
from __future__ import annotations

from hierwork import runtime  # noqa: F401  (before PyTensor)

import pymc as pm
import pytensor.tensor as pt

from hierwork.model.blocks import prior_rv


def varying_factors(plan) -> list:
    """The factors of a plan whose groups have their own residual SD."""
    return [f for f in plan.factors if f.spread == "varying"]


def row_residual_sd(plan, residual_sd):
    """The residual SD of every row (a vector), or ``residual_sd`` unchanged when no spread varies."""
    factors = varying_factors(plan)
    if not factors:
        return residual_sd
    log_offset = 0.0
    for f in factors:
        scale = prior_rv(f"{f.name}__spread_sd", [plan.priors[f"{f.name}.spread.sd"]])
        z = pm.Normal(f"{f.name}__spread_z", 0.0, 1.0, dims=f.name)
        offset = pm.Deterministic(f"{f.name}__spread_effect", scale * z, dims=f.name)
        pm.Deterministic(f"{f.name}__spread", residual_sd * pt.exp(offset), dims=f.name)
        log_offset = log_offset + offset[f.index]
    return residual_sd * pt.exp(log_offset)
