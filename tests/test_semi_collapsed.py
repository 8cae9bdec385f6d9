"""The partially collapsed path: one crossed factor integrated out exactly, the others sampled.

References: the dense multivariate normal marginal of the per-row model,
``y ~ N(X b + sampled effects, s^2 I + Z S Z')`` (scipy.stats.multivariate_normal),
and its conditional normal of the integrated effects given the rest (dense
normal algebra, numpy).
"""
import numpy as np
import pandas as pd
import pytest
import yaml
from scipy import stats

import hierwork
from hierwork.model import marginal, paths, semi_collapsed


def _plan(tmp_path, frame, spec):
    frame.to_csv(tmp_path / "data.csv", index=False)
    doc = {"format": "hierwork/1", "name": "t", "data": "data.csv", **spec}
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump(doc))
    return hierwork.check(tmp_path / "spec.yaml").plan


def _crossed(tmp_path, n=120, seed=5, known_sd=False):
    """Couriers (slope on distance, a courier-level predictor) x addresses x regions, a few rows each."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({"y": rng.normal(40, 4, n), "x": rng.gamma(3.0, 1.0, n),
                          "courier": rng.choice([f"c{k}" for k in range(9)], n),
                          "address": rng.choice([f"a{k}" for k in range(6)], n),
                          "region": rng.choice(list("nsew"), n)})
    frame["years"] = frame["courier"].str[1:].astype(float) * 0.3
    spec = {"outcome": {"column": "y"}, "predictors": ["x"],
            "groups": {"courier": {"varying": ["intercept", "x"], "predictors": ["years"]},
                       "address": {}, "region": {}}}
    if known_sd:
        frame["se"] = rng.uniform(1.0, 3.0, n)
        spec["outcome"]["known_sd"] = "se"
    return _plan(tmp_path, frame, spec)


def _dense(plan, f, b, sampled, gamma, chol, sigma):
    """Marginal log-likelihood and conditional mean/covariance of f's effects, by dense algebra."""
    mean = plan.X @ b + f.W[f.index] @ gamma
    for g, u in sampled.items():
        factor = plan.factor(g)
        mean = mean + (u[factor.index] * plan.X[:, list(factor.varying_cols)]).sum(1)
    q = len(f.varying)
    Z = np.zeros((plan.n, f.n_groups * q))
    for k in range(q):
        Z[np.arange(plan.n), f.index * q + k] = plan.X[:, f.varying_cols[k]]
    P = np.kron(np.eye(f.n_groups), chol @ chol.T)
    noise = np.diag(plan.known_sd ** 2) if plan.known_sd is not None else sigma ** 2 * np.eye(plan.n)
    V = noise + Z @ P @ Z.T
    cond_mean = P @ Z.T @ np.linalg.solve(V, plan.y - mean)
    cond_cov = P - P @ Z.T @ np.linalg.solve(V, Z @ P)
    return stats.multivariate_normal(mean, V).logpdf(plan.y), cond_mean, cond_cov


@pytest.mark.parametrize("known_sd", [False, True])
def test_semi_collapsed_likelihood_equals_dense_marginal(tmp_path, known_sd):
    plan = _crossed(tmp_path, known_sd=known_sd)
    assert paths.semi_collapsed_applies(plan)
    problem = semi_collapsed.semi_collapsed_problem(plan)
    f = problem.factor
    assert f.name == "courier"
    model = semi_collapsed.build_semi_collapsed_model(plan, problem)
    assert "courier__z" not in model.named_vars and "courier__effect" not in model.named_vars
    names = ["y_integrated", "b", "address__effect", "region__effect", "courier__gamma", "courier__sd", "courier__corr"]
    names += [] if known_sd else ["residual_sd"]
    outs = model.replace_rvs_by_values([model[v] for v in names])
    fn = model.compile_fn(outs, inputs=model.value_vars, on_unused_input="ignore")
    rng = np.random.default_rng(1)
    for _ in range(3):
        point = {k: v + rng.normal(scale=0.5, size=np.shape(v)) for k, v in model.initial_point().items()}
        ll, b, ua, ur, gamma, sd, corr, *sigma = fn(point)
        chol = sd[:, None] * np.linalg.cholesky(corr)
        ref, _, _ = _dense(plan, f, b, {"address": ua, "region": ur}, gamma, chol, sigma[0] if sigma else None)
        np.testing.assert_allclose(ll, ref, rtol=1e-9)


def test_semi_collapsed_draws_follow_dense_conditional(tmp_path):
    """The drawn effects' mean and covariance, over many draws at one parameter value, are the dense conditional's."""
    plan = _crossed(tmp_path, n=60, seed=8)
    problem = semi_collapsed.semi_collapsed_problem(plan)
    f = problem.factor
    rng = np.random.default_rng(2)
    b = np.array([40.0, 0.5])
    ua = rng.normal(size=(plan.factor("address").n_groups, 1))
    ur = rng.normal(size=(plan.factor("region").n_groups, 1))
    gamma, sigma = np.array([0.7]), 3.0
    chol = np.array([[2.0, 0.0], [0.3, 0.5]])
    _, mu, cov = _dense(plan, f, b, {"address": ua, "region": ur}, gamma, chol, sigma)
    from hierwork.model.rowwise import cell_terms

    parts = [(plan.factor("address"), ua, None), (plan.factor("region"), ur, None)]
    stats_, coef, effects, groups = cell_terms(problem.rest, b, [0, 1], parts, extra=(f,))
    effects.append(((f.W @ gamma)[:, None], (0,), groups[:, -1]))
    D = 20000
    u = marginal.draw_integrated_effects(
        stats_, np.tile(coef, (D, 1)), [(np.broadcast_to(v, (D,) + v.shape), c, g) for v, c, g in effects],
        marginal.Integrated(tuple(f.varying_cols), groups[:, -1], f.n_groups),
        np.broadcast_to(chol, (D, 2, 2)), np.full(D, sigma), rng=np.random.default_rng(3))
    flat = u.reshape(D, -1)
    sd = np.sqrt(np.diag(cov))
    np.testing.assert_allclose(flat.mean(0), mu, atol=5 * sd.max() / np.sqrt(D))  # 5 Monte Carlo SEs
    np.testing.assert_allclose(np.cov(flat.T), cov, atol=0.05 * cov.diagonal().max())


def test_path_choice_and_requests(tmp_path):
    plan = _crossed(tmp_path)
    path, reason = paths.best_path(plan)
    assert path == "semi_collapsed" and "courier (the most groups) integrated out" in reason
    assert paths.integrated_factor(plan).name == "courier"
    assert [g.name for g in paths.sampled_plan(plan, "semi_collapsed").factors] == ["address", "region"]
    assert paths.sampled_plan(plan, "reduced") is plan
    auto = hierwork.check(tmp_path / "spec.yaml")
    assert auto.path == "semi_collapsed"
    lines = {line.split()[0]: line for line in auto.text().splitlines() if " effects " in line}
    assert "integrated out: exact on the semi-collapsed path" in lines["courier"]
    assert "sampled" in lines["address"] and "sampled" in lines["region"]
    # a slower exact path may be asked for; semi_collapsed on a non-normal or factor-less model may not
    for slower in ("reduced", "plain"):
        spec = hierwork.load_spec(tmp_path / "spec.yaml", {"sampling.path": slower})
        assert paths.resolve_path(spec, plan) == (slower, "set in the spec")
    frame = pd.DataFrame({"y": np.arange(12) % 4, "a": list("uvw") * 4, "c": list("pq") * 6})
    with pytest.raises(hierwork.errors.SpecError, match="path 'semi_collapsed' does not apply"):
        _plan(tmp_path, frame, {"outcome": {"column": "y", "family": "poisson"},
                                "groups": {"a": {}, "c": {}}, "sampling": {"path": "semi_collapsed"}})


def test_refresh_sweeps_keep_the_dense_joint_conditional(tmp_path):
    """Gibbs sweeps leave the joint conditional of all effects unchanged (dense normal algebra).

    At one value of the coefficients, SDs and group-predictor coefficients, the
    sampled factors' effects start as exact draws of their conditional with the
    integrated factor marginalised; after :func:`add_group_effects` every
    factor's effects (refreshed) must follow the dense joint conditional of all
    effects given that value, and NUTS's parameterisation variables are set aside.
    """
    import arviz as az
    import xarray as xr

    plan = _crossed(tmp_path, n=60, seed=8)
    factors = [plan.factor(name) for name in ("courier", "address", "region")]
    b, gamma, sigma = np.array([40.0, 0.5]), np.array([0.7]), 3.0
    chol = np.array([[2.0, 0.0], [0.3, 0.5]])
    sds = {"address": 1.5, "region": 1.0}
    # The dense joint conditional of (courier, address, region) effects given the values above.
    columns, prior = [], []
    for f in factors:
        for j in range(f.n_groups):
            for k, col in enumerate(f.varying_cols):
                z = np.zeros(plan.n)
                rows = f.index == j
                z[rows] = plan.X[rows, col]
                columns.append(z)
        prior.append(np.kron(np.eye(f.n_groups), chol @ chol.T) if f.name == "courier"
                     else sds[f.name] ** 2 * np.eye(f.n_groups))
    Z = np.column_stack(columns)
    P = np.zeros((Z.shape[1],) * 2)
    start = 0
    for block in prior:
        P[start:start + len(block), start:start + len(block)] = block
        start += len(block)
    courier = factors[0]
    residual = plan.y - plan.X @ b - courier.W[courier.index] @ gamma
    precision = Z.T @ Z / sigma ** 2 + np.linalg.inv(P)
    cov = np.linalg.inv(precision)
    mu = cov @ Z.T @ residual / sigma ** 2
    n_courier = courier.n_groups * 2
    D, rng = 4000, np.random.default_rng(4)
    start = rng.multivariate_normal(mu[n_courier:], cov[n_courier:, n_courier:], size=D)  # courier marginalised
    n_address = factors[1].n_groups
    shape = (2, D // 2)
    courier_cov = chol @ chol.T
    courier_sd = np.sqrt(np.diag(courier_cov))
    post = xr.Dataset({
        "b": (("chain", "draw", "term"), np.broadcast_to(b, shape + (2,)).copy()),
        "residual_sd": (("chain", "draw"), np.full(shape, sigma)),
        "courier__sd": (("chain", "draw", "courier__term"), np.broadcast_to(courier_sd, shape + (2,)).copy()),
        "courier__corr": (("chain", "draw", "courier__term", "courier__term_"),
                          np.broadcast_to(courier_cov / np.outer(courier_sd, courier_sd), shape + (2, 2)).copy()),
        "courier__gamma": (("chain", "draw", "courier__predictor"), np.broadcast_to(gamma, shape + (1,)).copy()),
        "address__sd": (("chain", "draw", "address__term"), np.full(shape + (1,), sds["address"])),
        "region__sd": (("chain", "draw", "region__term"), np.full(shape + (1,), sds["region"])),
        "address__effect": (("chain", "draw", "address", "address__term"),
                            start[:, :n_address].reshape(shape + (n_address, 1))),
        "region__effect": (("chain", "draw", "region", "region__term"),
                           start[:, n_address:].reshape(shape + (-1, 1))),
        "address__contrast": (("chain", "draw", "address__contrasts"), np.zeros(shape + (n_address - 1,))),
        "b_shifted_intercept": (("chain", "draw"), np.zeros(shape)),
    })
    idata = semi_collapsed.add_group_effects(az.InferenceData(posterior=post), plan, seed=9)
    after = idata.posterior
    assert "address__contrast" not in after and "b_shifted_intercept" not in after
    assert set(idata.sampled_forms.data_vars) == {"address__contrast", "b_shifted_intercept"}
    flat = np.concatenate([after[f"{f.name}__effect"].values.reshape(D, -1) for f in factors], axis=1)
    sd = np.sqrt(np.diag(cov))
    np.testing.assert_allclose(flat.mean(0), mu, atol=5 * sd.max() / np.sqrt(D))  # 5 Monte Carlo SEs
    np.testing.assert_allclose(np.cov(flat.T), cov, atol=0.08 * cov.diagonal().max())
    # The refresh moved the sampled factors' effects: they are not NUTS's draws any more.
    assert not np.allclose(after["address__effect"].values.reshape(D, -1), start[:, :n_address])
