"""ModelPlan -> ``pymc.Model`` (the per-row, "plain" form).

Variable names are the contract of the run folder (see docs/contracts.md):
``b`` (dim ``term``), ``residual_sd``, ``nu``, ``dispersion``, and per factor
``F``: ``F__sd`` (dim ``F__term``), ``F__corr``, ``F__gamma`` (dim
``F__predictor``) and ``F__effect`` (dims ``F``, ``F__term``), the group's
offset from its population value in the data's units.

Parameterisations of a factor's effects ``u`` (sds ``s``, Cholesky factor of
the correlation ``L``):

* non-centred: ``z ~ N(0, I)``, ``u = z (diag(s) L)'``;
* centred: the first centred factor in parents-first order carries the
  population values: its group coefficients ``c_j ~ N(b_T + W_j gamma,
  diag(s) L L' diag(s))`` replace ``b_T + u_j`` in every row's linear predictor
  (hierarchical centring, Gelfand, Sahu and Carlin 1995); any further centred
  factor samples its offsets ``u_j ~ N(0, ...)`` directly.
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
    coords = {"term": list(plan.terms)}
    for f in plan.factors:
        coords[f.name] = list(f.levels)
        coords[f"{f.name}__term"] = list(f.varying)
        if f.predictors:
            coords[f"{f.name}__predictor"] = list(f.predictors)
        if len(f.varying) > 1:
            coords[f"{f.name}__term_"] = list(f.varying)
    return coords


def prior_rv(name: str, priors: list, dims=None):
    """One random variable with a (possibly per-element) prior.

    All elements must share a distribution family; their parameters may differ.
    """
    dists = {p.dist for p in priors}
    if len(dists) != 1:
        raise SpecError(f"the priors of {name!r} mix distributions ({', '.join(sorted(dists))})",
                        hint="give every element the same distribution family (parameters may differ)")
    dist = priors[0].dist
    params = {k: np.array([p.params[k] for p in priors]) for k in priors[0].params}
    if dims is None:
        params = {k: float(v[0]) for k, v in params.items()}
    return _DIST[dist](name, **params, dims=dims)


def population_block(plan: ModelPlan):
    """Population coefficients ``b`` and family parameters; returns (b, family extras)."""
    b = prior_rv("b", [plan.priors[t] for t in plan.terms], dims="term")
    extras = {}
    for name in ("residual_sd", "nu", "dispersion"):
        if name in plan.priors and not (name == "residual_sd" and plan.known_sd is not None):
            extras[name] = prior_rv(name, [plan.priors[name]])
    return b, extras


def factor_scales(f: FactorPlan, plan: ModelPlan):
    """SDs and Cholesky factor of a factor's group effects: returns (sd, chol of covariance)."""
    sd_priors = [plan.priors[f"{f.name}.sd"]] + [plan.priors[f"{f.name}.{t}.sd"] for t in f.varying[1:]]
    q = len(f.varying)
    if q == 1:
        sd = prior_rv(f"{f.name}__sd", sd_priors, dims=f"{f.name}__term")
        return sd, pt.reshape(sd, (1, 1))
    dists = {p.dist for p in sd_priors}
    if len(dists) != 1:
        raise SpecError(f"the SD priors of factor {f.name!r} mix distributions ({', '.join(sorted(dists))})",
                        hint="with correlated varying terms give every SD the same distribution family")
    params = {k: np.array([p.params[k] for p in sd_priors]) for k in sd_priors[0].params}
    sd_dist = _DIST[sd_priors[0].dist].dist(**params, shape=q)
    chol, corr, sd = pm.LKJCholeskyCov(f"{f.name}__chol", n=q, eta=plan.priors[f"{f.name}.corr"].params["eta"],
                                       sd_dist=sd_dist, compute_corr=True, store_in_trace=False)
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


def build_model(plan: ModelPlan) -> pm.Model:
    """Build the per-row PyMC model of a plan.

    Parameters
    ----------
    plan : ModelPlan

    Returns
    -------
    pymc.Model
    """
    X = plan.X
    with pm.Model(coords=coords_of(plan)) as model:
        b, extras = population_block(plan)
        anchored: set = set()  # population columns carried by a centred factor's coefficients
        eta_parts = []
        for f in plan.factors:
            sd, chol = factor_scales(f, plan)
            shift = group_predictor_term(f, plan)
            Z = X[:, list(f.varying_cols)]
            dims = (f.name, f"{f.name}__term")
            shape = (f.n_groups, len(f.varying))
            if f.parameterisation == "centred" and not anchored:
                mean = pt.broadcast_to(b[list(f.varying_cols)], shape)
                if shift is not None:
                    mean = pt.set_subtensor(mean[:, 0], mean[:, 0] + shift)
                coef = _centred(f"{f.name}__coef", mean, sd, chol, dims)
                effect = coef - mean
                eta_parts.append((coef[f.index] * Z).sum(axis=1))
                anchored.update(f.varying_cols)
            else:
                if f.parameterisation == "centred":
                    effect = _centred(f"{f.name}__u", pt.zeros(shape), sd, chol, dims)
                else:
                    z = pm.Normal(f"{f.name}__z", 0.0, 1.0, dims=dims)
                    effect = pt.dot(z, chol.T) if len(f.varying) > 1 else z * sd
                eta_parts.append((effect[f.index] * Z).sum(axis=1))
                if shift is not None:
                    eta_parts.append(shift[f.index])
            pm.Deterministic(f"{f.name}__effect", effect, dims=dims)
        free_cols = [k for k in range(X.shape[1]) if k not in anchored]
        eta = pt.dot(X[:, free_cols], b[free_cols]) if free_cols else 0.0
        eta = eta + sum(eta_parts)
        likelihood(plan, eta, extras)
    return model


def _centred(name, mean, sd, chol, dims):
    if len(pm.modelcontext(None).coords[dims[1]]) == 1:
        return pm.Normal(name, mu=mean, sigma=sd, dims=dims)
    return pm.MvNormal(name, mu=mean, chol=chol, dims=dims)


def likelihood(plan: ModelPlan, eta, extras) -> None:
    """Add the observed outcome given the linear predictor ``eta`` (per row)."""
    y, fam = plan.y, plan.family
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
