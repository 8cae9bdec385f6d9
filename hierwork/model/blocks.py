"""Building blocks shared by every model path: priors, population coefficients, group scales.

Variable names are the contract of the run folder (see docs/contracts.md):
``b`` (dim ``term``), the family's parameters (``residual_sd``, ``nu``,
``dispersion``, ...), and per factor ``F``: ``F__sd`` (dim ``F__term``),
``F__corr``, ``F__gamma`` (dim ``F__predictor``) and ``F__effect`` (dims ``F``,
``F__term``), the group's offset from its population value. All of them are in
the data's own units.

Internally the sampler sees predictors centred at their means, which removes
the strong intercept-slope correlation of uncentred data. The change of
variables is linear with unit Jacobian, so the posterior is exactly the one
the spec states: the population intercept ``b[intercept]`` (value at x = 0)
keeps the prior the spec gives it, imposed as a potential on the sampled
centred intercept; a factor's effects at centred x are ``A u`` with ``A`` the
unit upper-triangular map ``u_0 + sum_k u_k m_k``, whose covariance is
``A S A'`` (Cholesky factor ``A L``).
"""
from __future__ import annotations

from hierwork import runtime  # noqa: F401  (before PyTensor)

import numpy as np
import pymc as pm
import pytensor.tensor as pt

from hierwork.errors import SpecError
from hierwork.plan.plan import FactorPlan, ModelPlan
from hierwork.plan.priors import DISTRIBUTIONS


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
    for dim, labels in plan.family.vector_parameters(plan.outcome).values():
        coords[dim] = list(labels)
    return coords


def _params(name: str, priors: list, vector: bool) -> tuple:
    dists = {p.dist for p in priors}
    if len(dists) != 1:
        raise SpecError(f"the priors of {name!r} mix distributions ({', '.join(sorted(dists))})",
                        hint="give every element the same distribution family (parameters may differ)")
    params = {k: np.array([p.params[k] for p in priors]) for k in priors[0].params}
    if not vector:
        params = {k: float(v[0]) for k, v in params.items()}
    return getattr(pm, DISTRIBUTIONS[priors[0].dist].pymc), params


def prior_rv(name: str, priors: list, dims=None):
    """One random variable with a (possibly per-element) prior of one distribution family."""
    dist, params = _params(name, priors, dims is not None)
    return dist(name, **params, dims=dims)


def predictor_means(plan: ModelPlan, centre: bool) -> np.ndarray:
    """Means of the population predictors the sampler centres at (zeros without centring)."""
    return plan.X[:, 1:].mean(axis=0) if centre else np.zeros(len(plan.terms) - 1)


def population_block(plan: ModelPlan, centre: bool, offset=None):
    """Population coefficients ``b`` (data units) and the family's extra parameters.

    Returns ``(b, means)``: with ``centre`` the sampled intercept is the linear
    predictor at the predictors' means, ``a``, and ``b[intercept] = a - sum_k b_k m_k``;
    ``means`` are the ``m_k`` (0 without centring).

    ``offset`` (p,) tensor, data units: the sum over factors of each term's mean
    group effect, ``o_t = sum_f mean_j u_{f,j,t}``. Given, the sampled
    coefficients are the shifted ones ``b'_t = b_t + o_t`` (``b_shifted_intercept``
    at the predictors' means, ``b_shifted_slope``), which the data identify on
    crossed designs, and ``b = b' - o`` carries the spec's priors as potentials:
    a shear with unit Jacobian, so the posterior of ``b`` and the effects is
    unchanged (see :func:`hierwork.model.paths.shifted_columns`).
    """
    terms = plan.terms
    means = predictor_means(plan, centre)
    slope_priors = [plan.priors[t] for t in terms[1:]]
    if offset is not None and len(terms) > 1:
        shifted = pm.Flat("b_shifted_slope", dims="slope", initval=np.array([_start(p) for p in slope_priors]))
        slopes = shifted - offset[1:]
        dist, params = _params("b_slope", slope_priors, True)
        pm.Potential("slope_prior", pm.logp(dist.dist(**params), slopes).sum())
    elif len(terms) > 1:
        slopes = prior_rv("b_slope", slope_priors, dims="slope")
    else:
        slopes = pt.zeros(0)
    if centre:
        dist, params = _params("intercept", [plan.priors["intercept"]], False)
        start = _start(plan.priors["intercept"]) + float(np.dot(means, [_start(p) for p in slope_priors]))
        if offset is None:
            intercept = pm.Flat("b_centred_intercept", initval=start) - _dot(slopes, means)
        else:  # the centred groups' mean intercept is o_0 + sum_k o_k m_k
            a = pm.Flat("b_shifted_intercept", initval=start) - offset[0] - _dot(offset[1:], means)
            intercept = a - _dot(slopes, means)
        pm.Potential("intercept_prior", pm.logp(dist.dist(**params), intercept))
    else:
        intercept = prior_rv("b_intercept", [plan.priors["intercept"]])
    b = pm.Deterministic("b", pt.concatenate([pt.stack([intercept]), slopes]), dims="term")
    return b, means


def _dot(v, means):
    """``v . means``; 0 with no slopes (an empty product still costs a matrix-vector call per gradient)."""
    return pt.dot(v, means) if len(means) else 0.0


def _start(prior) -> float:
    """A starting value inside a coefficient prior's support: its location (or a uniform's midpoint)."""
    p = prior.params
    return float(p["mu"] if "mu" in p else p["alpha"] if prior.dist == "cauchy"
                 else (p["lower"] + p["upper"]) / 2 if "lower" in p else 0.0)


def family_extras(plan: ModelPlan) -> dict:
    """The family's own parameters (residual SD, degrees of freedom, dispersion, cut-points...) as PyMC variables."""
    family, vectors = plan.family, plan.family.vector_parameters(plan.outcome)
    out = {}
    for name in family.parameters(plan.outcome):
        if name in vectors:
            dim, _ = vectors[name]
            priors = [plan.priors[p] for p in family.prior_names(name, plan.outcome)]
            out[name] = family.own_variable(name, priors, dim)
        else:
            out[name] = prior_rv(name, [plan.priors[name]])
    return out


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
