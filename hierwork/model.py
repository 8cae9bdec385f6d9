"""ModelPlan -> ``pymc.Model`` (the per-row, "plain" form).

Variable names are the contract of the run folder (see docs/contracts.md):
``b`` (dim ``term``), ``residual_sd``, ``nu``, ``dispersion``, and per factor
``F``: ``F__sd`` (dim ``F__term``), ``F__corr``, ``F__gamma`` (dim
``F__predictor``) and ``F__effect`` (dims ``F``, ``F__term``), the group's
offset from its population value. All of them are in the data's own units.

Internally the sampler sees predictors centred at their means, which removes
the strong intercept-slope correlation of uncentred data. The change of
variables is linear with unit Jacobian, so the posterior is exactly the one
the spec states: the population intercept ``b[intercept]`` (value at x = 0)
keeps the prior the spec gives it, imposed as a potential on the sampled
centred intercept; a factor's effects at centred x are ``A u`` with ``A`` the
unit upper-triangular map ``u_0 + sum_k u_k m_k``, whose covariance is
``A S A'`` (Cholesky factor ``A L``).

Parameterisations of a factor's effects (``L`` the Cholesky factor of their
covariance):

* non-centred: ``z ~ N(0, I)``, effects ``= z (A L)'``;
* centred, the only factor of the model: its group coefficients
  ``c_j ~ N(A (b_T + W_j gamma), A S A')`` replace ``b_T + u_j`` in every row
  (hierarchical centring, Gelfand, Sahu and Carlin 1995, Biometrika 82,
  479-488);
* centred, one of several factors: the offsets are sampled directly,
  ``u_j ~ N(0, A S A')`` (letting one of several crossed or nested factors carry
  the population values would tie its coefficients to the other factors'
  effects, a ridge the sampler crawls along).

``build_model(plan, centre=False)`` gives the same model without centring
and with every factor non-centred, which prior predictive simulation uses
(every variable then has a proper generative prior).
"""
from __future__ import annotations

import numpy as np
import pymc as pm
import pytensor.tensor as pt

from .errors import SpecError
from .plan import FactorPlan, ModelPlan

_DIST = {
    "normal": pm.Normal,
    "student_t": pm.StudentT,
    "cauchy": pm.Cauchy,
    "uniform": pm.Uniform,
    "half_normal": pm.HalfNormal,
    "half_student_t": pm.HalfStudentT,
    "half_cauchy": pm.HalfCauchy,
    "exponential": pm.Exponential,
    "gamma": pm.Gamma,
}


def coords_of(plan: ModelPlan) -> dict:
    """Named dimensions of the model: population terms and, per factor, groups and terms."""
    coords = {"term": list(plan.terms), "slope": list(plan.terms[1:])}
    for f in plan.factors:
        coords[f.name] = list(f.levels)
        coords[f"{f.name}__term"] = list(f.varying)
        if f.predictors:
            coords[f"{f.name}__predictor"] = list(f.predictors)
        if len(f.varying) > 1:
            coords[f"{f.name}__term_"] = list(f.varying)
    return coords


def _params(name: str, priors: list, vector: bool) -> tuple:
    dists = {p.dist for p in priors}
    if len(dists) != 1:
        raise SpecError(f"the priors of {name!r} mix distributions ({', '.join(sorted(dists))})",
                        hint="give every element the same distribution family (parameters may differ)")
    params = {k: np.array([p.params[k] for p in priors]) for k in priors[0].params}
    if not vector:
        params = {k: float(v[0]) for k, v in params.items()}
    return _DIST[priors[0].dist], params


def prior_rv(name: str, priors: list, dims=None):
    """One random variable with a (possibly per-element) prior of one distribution family."""
    dist, params = _params(name, priors, dims is not None)
    return dist(name, **params, dims=dims)


def population_block(plan: ModelPlan, centre: bool):
    """Population coefficients ``b`` (data units) and the family's extra parameters.

    Returns ``(b, means)``: with ``centre`` the sampled intercept is the linear
    predictor at the predictors' means, ``a``, and ``b[intercept] = a - sum_k b_k m_k``;
    ``means`` are the ``m_k`` (0 without centring).
    """
    terms = plan.terms
    means = plan.X[:, 1:].mean(axis=0) if centre else np.zeros(len(terms) - 1)
    slopes = prior_rv("b_slope", [plan.priors[t] for t in terms[1:]], dims="slope") if len(terms) > 1 \
        else pt.zeros(0)
    if centre:
        dist, params = _params("intercept", [plan.priors["intercept"]], False)
        start = params.get("mu", 0.0) + float(np.dot(means, [plan.priors[t].params.get("mu", 0.0)
                                                              for t in terms[1:]]))
        a = pm.Flat("b_centred_intercept", initval=start)
        intercept = a - pt.dot(slopes, means)
        pm.Potential("intercept_prior", pm.logp(dist.dist(**params), intercept))
    else:
        intercept = prior_rv("b_intercept", [plan.priors["intercept"]])
    b = pm.Deterministic("b", pt.concatenate([pt.stack([intercept]), slopes]), dims="term")
    return b, means


def family_extras(plan: ModelPlan) -> dict:
    """Residual SD, Student-t degrees of freedom, negative-binomial dispersion, as the family needs."""
    extras = {}
    for name in ("residual_sd", "nu", "dispersion"):
        if name in plan.priors:
            extras[name] = prior_rv(name, [plan.priors[name]])
    return extras


def factor_scales(f: FactorPlan, plan: ModelPlan):
    """SDs and Cholesky factor of a factor's group-effect covariance: returns (sd, chol)."""
    sd_priors = [plan.priors[f"{f.name}.sd"]] + [plan.priors[f"{f.name}.{t}.sd"] for t in f.varying[1:]]
    q = len(f.varying)
    if q == 1:
        sd = prior_rv(f"{f.name}__sd", sd_priors, dims=f"{f.name}__term")
        return sd, pt.reshape(sd, (1, 1))
    dist, params = _params(f"{f.name} SDs", sd_priors, True)
    chol, corr, sd = pm.LKJCholeskyCov(f"{f.name}__chol", n=q, eta=plan.priors[f"{f.name}.corr"].params["eta"],
                                       sd_dist=dist.dist(**params, shape=q), compute_corr=True,
                                       store_in_trace=False)
    pm.Deterministic(f"{f.name}__sd", sd, dims=f"{f.name}__term")
    pm.Deterministic(f"{f.name}__corr", corr, dims=(f"{f.name}__term", f"{f.name}__term_"))
    return sd, chol


def group_predictor_term(f: FactorPlan, plan: ModelPlan):
    """Contribution of group-level predictors to each group's intercept, shape (J,)."""
    if not f.predictors:
        return None
    gamma = prior_rv(f"{f.name}__gamma", [plan.priors[f"{f.name}.{c}"] for c in f.predictors],
                     dims=f"{f.name}__predictor")
    return pt.dot(pt.as_tensor_variable(f.W), gamma)


def shift_matrix(f: FactorPlan, means: np.ndarray) -> np.ndarray:
    """``A``: effects at x = 0 -> effects at the centred x (unit upper-triangular)."""
    A = np.eye(len(f.varying))
    A[0, 1:] = [means[c - 1] for c in f.varying_cols[1:]]
    return A


def build_model(plan: ModelPlan, centre: bool = True, reduced: bool = False) -> pm.Model:
    """Build the PyMC model of a plan with every group effect sampled.

    Parameters
    ----------
    plan : ModelPlan
    centre : bool
        Sample with predictors centred (exact change of variables) and each
        factor in its planned form (default). ``False`` gives the generative
        form, uncentred and every factor non-centred, for prior simulation.
    reduced : bool
        Normal outcomes only: evaluate the likelihood from per-cell sufficient
        statistics (exact, O(cells) per gradient) instead of per row.

    Returns
    -------
    pymc.Model
    """
    with pm.Model(coords=coords_of(plan)) as model:
        b, means = population_block(plan, centre)
        extras = family_extras(plan)
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
            if form == "centred" and len(plan.factors) == 1:
                mean = pt.broadcast_to(b[list(f.varying_cols)], shape)  # data units: b_T + W gamma
                if shift is not None:
                    mean = pt.set_subtensor(mean[:, 0], mean[:, 0] + shift)
                mean = pt.dot(mean, A.T)  # at centred x
                start = np.zeros(shape)
                start[:, 0] = plan.priors["intercept"].params.get("mu", 0.0)
                coef = _centred(f"{f.name}__coef", mean, sd, chol_c, dims, start)
                effect_c = coef - mean
                parts.append((f, pt.dot(coef, to_data), None))
                anchored.update(f.varying_cols)
            else:
                if form == "centred":
                    effect_c = _centred(f"{f.name}__u", pt.zeros(shape), sd, chol_c, dims, np.zeros(shape))
                else:
                    effect_c = pt.dot(pm.Normal(f"{f.name}__z", 0.0, 1.0, dims=dims), chol_c.T)
                parts.append((f, pt.dot(effect_c, to_data), shift))
            pm.Deterministic(f"{f.name}__effect", pt.dot(effect_c, to_data), dims=dims)
        free = [k for k in range(plan.X.shape[1]) if k not in anchored]
        if reduced:
            from .gaussian import reduced_normal_likelihood

            reduced_normal_likelihood(plan, b, free, parts, extras.get("residual_sd"))
        else:
            eta = pt.dot(plan.X[:, free], b[free]) if free else pt.zeros(plan.n)
            for f, values, shift in parts:
                eta = eta + (values[f.index] * plan.X[:, list(f.varying_cols)]).sum(axis=1)
                if shift is not None:
                    eta = eta + shift[f.index]
            likelihood(plan, eta, extras)
    return model


def _centred(name, mean, sd, chol, dims, start):
    """Group values sampled directly: ``N(mean_j, chol chol')`` for every group ``j``.

    With several terms the density is written out with one triangular solve
    for all groups (a batched multivariate normal solves once per group, which
    is many times slower); the values are then a flat variable plus that
    density, which is the same distribution.
    """
    if len(pm.modelcontext(None).coords[dims[1]]) == 1:
        return pm.Normal(name, mu=mean, sigma=sd, dims=dims)
    value = pm.Flat(name, dims=dims, initval=start)
    z = pt.linalg.solve_triangular(chol, (value - mean).T, lower=True)
    J, q = start.shape
    pm.Potential(f"{name}_density", -0.5 * pt.sum(z ** 2) - J * pt.sum(pt.log(pt.diag(chol)))
                 - 0.5 * J * q * np.log(2 * np.pi))
    return value


def likelihood(plan: ModelPlan, eta, extras) -> None:
    """Add the observed outcome ``y`` given the linear predictor ``eta`` (per row).

    The outcome enters as data (``y_data``), so a compiled model can be refitted
    to new outcomes of the same design without recompiling (nutpie's
    ``with_data``), as simulation-based calibration does.
    """
    y, fam = pm.Data("y_data", plan.y), plan.family
    if plan.exposure is not None:
        eta = eta + np.log(plan.exposure)
    if fam == "normal":
        sigma = plan.known_sd if plan.known_sd is not None else extras["residual_sd"]
        pm.Normal("y", mu=eta, sigma=sigma, observed=y)
    elif fam == "student_t":
        pm.StudentT("y", nu=extras["nu"], mu=eta, sigma=extras["residual_sd"], observed=y)
    elif fam == "bernoulli":
        pm.Bernoulli("y", logit_p=eta, observed=y)
    elif fam == "binomial":
        pm.Binomial("y", n=plan.trials, logit_p=eta, observed=y)
    elif fam == "poisson":
        pm.Poisson("y", mu=pt.exp(eta), observed=y)
    elif fam == "negative_binomial":
        pm.NegativeBinomial("y", mu=pt.exp(eta), alpha=extras["dispersion"], observed=y)
    else:
        raise AssertionError(f"unknown family {fam}")
