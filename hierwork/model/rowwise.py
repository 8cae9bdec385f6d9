"""ModelPlan -> ``pymc.Model`` with every group effect sampled (the plain and reduced paths).

Parameterisations of a factor's effects (``L`` the Cholesky factor of their
covariance; see :mod:`hierwork.model.blocks` for the centring of predictors):

* non-centred: ``z ~ N(0, I)``, effects ``= z (A L)'``;
* centred, the only factor of the model: its group coefficients
  ``c_j ~ N(A (b_T + W_j gamma), A S A')`` replace ``b_T + u_j`` in every row
  (hierarchical centring, Gelfand, Sahu and Carlin 1995, Biometrika 82,
  479-488);
* partial (``F__partial``): each group between the two by its weight
  (:func:`_partial`);
* centred, one of several factors: the offsets are sampled directly,
  ``u_j ~ N(0, A S A')`` (letting one of several crossed or nested factors carry
  the population values would tie its coefficients to the other factors'
  effects, a ridge the sampler crawls along).

With crossed factors the data identify a population coefficient plus the
mean of its factors' group effects (on the link scale), not each: the sampler
would crawl along that ridge. The coefficients are then sampled shifted,
``b'_t = b_t + sum_f mean_j u_{f,j,t}``, and ``b`` derived with its prior
(:func:`~hierwork.model.blocks.population_block`): a shear with unit
Jacobian, the same posterior (rule: :func:`~hierwork.model.paths.shifted_columns`).

``build_model(plan, centre=False)`` gives the same model without centring
and with every factor non-centred, which prior predictive simulation uses
(every variable then has a proper generative prior). On the reduced path
(normal outcomes) the likelihood is evaluated from per-cell sufficient
statistics instead of per row, with the same log density; for counts and
proportions, rows with identical predictors and groups are one binomial or
Poisson term (the same posterior; the log density differs by a constant).
"""
from __future__ import annotations

from hierwork import runtime  # noqa: F401  (before PyTensor)

import numpy as np
import pymc as pm
import pytensor.tensor as pt

from hierwork.model import marginal
from hierwork.model.blocks import (coords_of, factor_scales, family_extras, group_predictor_term,
                                   population_block, predictor_means, shift_matrix)
from hierwork.model.cells import cell_index, cell_stats, row_cells
from hierwork.model.paths import shifted_columns
from hierwork.model.spread import row_residual_sd
from hierwork.plan.plan import ModelPlan


def build_model(plan: ModelPlan, centre: bool = True, reduced: bool = False, shift: bool | tuple = True,
                likelihood_of=None) -> pm.Model:
    """Build the PyMC model of a plan with every group effect sampled.

    Parameters
    ----------
    plan : ModelPlan
    centre : bool
        Sample with predictors centred (exact change of variables) and each
        factor in its planned form (default). ``False`` gives the generative
        form, uncentred and every factor non-centred, for prior simulation.
    reduced : bool
        Evaluate the likelihood per cell instead of per row (exact, O(cells)
        per gradient): from sufficient statistics for normal outcomes, from
        summed rows of identical predictors and groups for counts and
        proportions (:meth:`~hierwork.plan.families.base.Family.aggregate`).
    shift : bool or tuple of int
        With ``centre``, sample the coefficients of
        :func:`~hierwork.model.paths.shifted_columns` shifted by the mean group
        effects (default; the same posterior). ``False`` samples them as they
        are (the reference the shift is tested against); a tuple names the
        columns (the semi-collapsed path: the plan's factors are crossed with
        the one integrated out).
    likelihood_of : callable, optional
        ``likelihood_of(b, free_cols, parts, extras)`` adds the likelihood
        instead (the partially collapsed path, :mod:`hierwork.model.semi_collapsed`);
        ``parts`` are ``(factor, values, shift)`` as for
        :func:`reduced_normal_likelihood`.

    Returns
    -------
    pymc.Model
    """
    with pm.Model(coords=coords_of(plan)) as model:
        shifted = () if not centre or shift is False else shifted_columns(plan) if shift is True else shift
        means = predictor_means(plan, centre)
        b = None if shifted else population_block(plan, centre)[0]  # shifted: once the effects exist
        extras = family_extras(plan)
        if "residual_sd" in extras:
            extras["residual_sd"] = row_residual_sd(plan, extras["residual_sd"])
        anchored: set = set()
        parts = []  # (factor, per-group values in data units multiplying its varying columns, shift)
        for f in plan.factors:
            sd, chol = factor_scales(f, plan)
            shift = group_predictor_term(f, plan)
            A = shift_matrix(f, means)
            to_data = np.linalg.inv(A).T  # row vectors at centred x -> at x = 0
            chol_c = pt.dot(A, chol)
            dims = (f.name, f"{f.name}__term")
            shape = (f.n_groups, len(f.varying))
            form = f.parameterisation if centre else "non_centred"  # generative form for prior simulation
            if form == "centred" and len(plan.factors) == 1 and not shifted:
                mean = _group_mean(b, f, shift, A, shape)
                start = np.zeros(shape)
                start[:, 0] = plan.priors["intercept"].params.get("mu", 0.0)
                coef = _centred(f"{f.name}__coef", mean, sd, chol_c, dims, start)
                effect_c = coef - mean
                parts.append((f, pt.dot(coef, to_data), None))
                anchored.update(f.varying_cols)
            else:
                if form == "partial":
                    alone = len(plan.factors) == 1 and not shifted
                    mean = _group_mean(b, f, shift, A, shape) if alone else pt.zeros(shape)
                    effect_c = _partial(f.name, mean, sd, chol_c, f.weights, dims)
                elif form == "centred" and shifted:
                    effect_c = _contrasts_and_mean(f.name, sd, chol_c, shape)
                elif form == "centred":
                    effect_c = _centred(f"{f.name}__u", pt.zeros(shape), sd, chol_c, dims, np.zeros(shape))
                else:
                    effect_c = pt.dot(pm.Normal(f"{f.name}__z", 0.0, 1.0, dims=dims), chol_c.T)
                parts.append((f, pt.dot(effect_c, to_data), shift))
            pm.Deterministic(f"{f.name}__effect", pt.dot(effect_c, to_data), dims=dims)
        if shifted:
            offset = pt.zeros(plan.X.shape[1])
            for f, values, _ in parts:
                offset = pt.inc_subtensor(offset[list(f.varying_cols)], values.mean(axis=0))
            b, _ = population_block(plan, centre, offset)
        free = [k for k in range(plan.X.shape[1]) if k not in anchored]
        if likelihood_of is not None:
            likelihood_of(b, free, parts, extras)
        elif reduced and plan.family.exact_normal:
            reduced_normal_likelihood(plan, b, free, parts, extras.get("residual_sd"))
        else:
            cells = row_cells(plan.X, [f.index for f in plan.factors]) if reduced else None
            take = slice(None) if cells is None else cells.first  # one row per cell carries its eta
            X = plan.X[take]
            eta = pt.dot(X[:, free], b[free]) if free else pt.zeros(X.shape[0])
            for f, values, shift in parts:
                index = f.index[take]
                for k, col in enumerate(f.varying_cols):  # vector gathers: their gradient runs in C
                    eta = eta + values[:, k][index] * X[:, col]
                if shift is not None:
                    eta = eta + shift[index]
            if cells is None:
                likelihood(plan, eta, extras)
            else:
                family, outcome = plan.family.aggregate(plan.outcome, cells.cell, cells.n_cells)
                family.likelihood(eta, pm.Data("y_data", outcome.y), outcome, extras)
    return model


def _group_mean(b, f, shift, A, shape):
    """Each group's population value at the centred predictors: ``A (b_T + W_j gamma)``, shape (J, q)."""
    mean = pt.broadcast_to(b[list(f.varying_cols)], shape)  # data units: b_T + W gamma
    if shift is not None:
        mean = pt.set_subtensor(mean[:, 0], mean[:, 0] + shift)
    return pt.dot(mean, A.T)


def _partial(name, mean, sd, chol, weights, dims):
    """Offsets partially non-centred, group by group: ``p_jt ~ N(w_jt m_jt, sd_t^(2 w_jt))``.

    The offsets are ``u_j = chol (sd^(-w_j) * (p_j - w_j * m_j))``, so that
    ``u_j ~ N(0, chol chol')`` exactly (Gorinova, Moore and Hoffman 2020,
    with a weight per group; :func:`hierwork.plan.parameterisation.judge`):
    ``w = 1`` is the centred form (``p_j = m_j + u_j`` with one term),
    ``w = 0`` the non-centred ``z``. ``mean`` (J, q): the groups' population
    values ``m_j`` (hierarchical centring of the location, the only factor)
    or zeros.
    """
    scale = sd[None, :] ** weights
    value = pm.Normal(f"{name}__partial", mu=weights * mean, sigma=scale, dims=dims)
    return pt.dot((value - weights * mean) / scale, chol.T)


def _contrasts_and_mean(name, sd, chol, shape):
    """Offsets ``u_j ~ N(0, S)`` of a centred factor whose mean effect the data do not identify.

    With the coefficients shifted, the data inform each group's contrast with
    the others but not the factor's mean effect, which only its prior holds:
    sampled centred, all groups drift together along it. So the orthonormal
    contrasts ``C = H u`` (Helmert, rows iid ``N(0, S)``) are sampled centred
    and the mean ``u_bar = L w / sqrt(J)``, ``w ~ N(0, I)``, non-centred; then
    ``u = H' C + 1 u_bar'``, exactly the same distribution.
    """
    J, q = shape
    model = pm.modelcontext(None)
    model.add_coord(f"{name}__contrasts", [f"contrast {k + 1}" for k in range(J - 1)])
    C = _centred(f"{name}__contrast", pt.zeros((J - 1, q)), sd, chol, (f"{name}__contrasts", f"{name}__term"),
                 np.zeros((J - 1, q)))
    w = pm.Normal(f"{name}__mean_z", 0.0, 1.0, dims=f"{name}__term")
    return _helmert_transpose_times(C, J) + pt.dot(chol, w)[None, :] / np.sqrt(J)


def _helmert_transpose_times(C, J):
    """``H' C`` for the (J-1, J) Helmert contrasts ``H`` (``scipy.linalg.helmert(J)``) in O(J), not O(J^2).

    Row k of H is ``1/sqrt((k+1)(k+2))`` on columns 0..k and ``-(k+1)/sqrt((k+1)(k+2))``
    on column k+1; with ``a_k = C_k / sqrt((k+1)(k+2))``, ``(H'C)_j = sum_{k>=j} a_k - j a_{j-1}``.
    """
    k = np.arange(J - 1)
    a = C / np.sqrt((k + 1.0) * (k + 2.0))[:, None]
    zero = pt.zeros((1, C.shape[1]))
    return (pt.concatenate([pt.cumsum(a[::-1], axis=0)[::-1], zero], axis=0)
            - pt.concatenate([zero, (k + 1.0)[:, None] * a], axis=0))


def _centred(name, mean, sd, chol, dims, start):
    """Group values sampled directly: ``N(mean_j, chol chol')`` for every group ``j``.

    With several terms the density is written out with one solve
    for all groups (a batched multivariate normal solves once per group, which
    is many times slower); the values are then a flat variable plus that
    density, which is the same distribution.
    """
    if len(pm.modelcontext(None).coords[dims[1]]) == 1:
        return pm.Normal(name, mu=mean, sigma=sd, dims=dims)
    value = pm.Flat(name, dims=dims, initval=start)
    # ``chol`` is ``A L`` (effects at the centred predictors), not triangular when a slope's
    # predictor has a non-zero mean: solve it in full; ``det A = 1``, so ``log det = log det L``.
    z = pt.linalg.solve(chol, (value - mean).T)
    J, q = start.shape
    pm.Potential(f"{name}_density", -0.5 * pt.sum(z ** 2) - J * pt.log(pt.abs(pt.linalg.det(chol)))
                 - 0.5 * J * q * np.log(2 * np.pi))
    return value


def likelihood(plan: ModelPlan, eta, extras) -> None:
    """Add the observed outcome ``y`` given the linear predictor ``eta`` (per row), by the plan's family.

    The outcome enters as data (``y_data``), so a compiled model can be refitted
    to new outcomes of the same design without recompiling (nutpie's
    ``with_data``), as simulation-based calibration does.
    """
    plan.family.likelihood(eta, pm.Data("y_data", plan.y), plan.outcome, extras)


def reduced_normal_likelihood(plan: ModelPlan, b, free_cols, parts, sigma) -> None:
    """Add the normal likelihood from per-cell statistics (the reduced path).

    Gives the same log density as the per-row ``pm.Normal`` whose mean is
    ``X[:, free_cols] @ b[free_cols] + sum(values[f.index] * X[:, f.varying_cols])
    + shift[f.index]`` summed over ``parts``.

    Parameters
    ----------
    plan : ModelPlan
        Normal family.
    b : (p,) tensor
        Population coefficients.
    free_cols : list of int
        Columns of ``X`` whose coefficient is ``b`` (the others are carried by a
        centred factor's group coefficients).
    parts : list of (FactorPlan, values, shift)
        ``values`` (J_f, q_f) multiplies the factor's varying columns; ``shift``
        (J_f,) or None is added to the linear predictor of its rows.
    sigma : scalar tensor or None
        ``residual_sd`` (None with known SDs).
    """
    stats, coef, effects, _ = cell_terms(plan, b, free_cols, parts)
    loglik = marginal.reduced_loglik(stats, coef, effects, sigma)
    pm.Potential("y_reduced", loglik.sum())


def cell_terms(plan: ModelPlan, b, free_cols, parts, extra=()):
    """Cell statistics and the per-cell terms of the reduced likelihood.

    Cells are the combinations of the groups of the ``parts``' factors and of
    the ``extra`` factors, sorted by the extra factors' groups. Returns ``(stats, coef, effects, cell_groups)``: the
    coefficients ``b`` on ``free_cols`` (0 elsewhere), the ``(values, cols,
    cell_group)`` of :func:`~hierwork.model.marginal.reduced_loglik`, and the
    (cells, factors) group codes, parts' factors first.
    """
    factors = list(extra) + [f for f, _, _ in parts]  # cells sorted by the extra factors' groups first
    cell, cell_groups = cell_index(*[f.index for f in factors]) if factors else (
        np.zeros(plan.n, dtype=np.int64), np.zeros((1, 0), dtype=np.int64))
    cell_groups = np.roll(cell_groups, -len(extra), axis=1)  # parts' factors first
    stats = cell_stats(plan.y, plan.X, cell, len(cell_groups), plan.known_sd)
    mask = np.zeros(plan.X.shape[1])
    mask[list(free_cols)] = 1.0
    effects = []
    for k, (f, values, shift) in enumerate(parts):
        effects.append((values, tuple(f.varying_cols), cell_groups[:, k]))
        if shift is not None:
            effects.append((shift[:, None], (0,), cell_groups[:, k]))
    return stats, b * mask, effects, cell_groups
