"""The fast path wired to plans: path choice, collapsed model, exact group draws.

References: dense multivariate normal marginals and conditionals (scipy,
numpy); per-row normal densities (scipy.stats.norm); the plain per-row PyMC
model (hierwork.model.build_model) for priors and posteriors; the eight
schools (Rubin 1981; BDA3 Table 5.2) posterior by quadrature over (mu, tau)
with the group effects conditionally normal (BDA3 §5.4).
"""
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pymc as pm
import pytensor.tensor as pt
import pytest
import yaml
from scipy import stats

import hierwork
from hierwork.model import collapsed, paths, rowwise
from hierwork.model.rowwise import build_model
from hierwork.inference.sampling import run_sampler

ROOT = Path(__file__).resolve().parents[1]
DATA = Path(__file__).parent / "data"


def _plan(tmp_path, frame, spec):
    """Plan of an inline spec on an inline table (written to tmp_path)."""
    frame.to_csv(tmp_path / "data.csv", index=False)
    doc = {"format": "hierwork/1", "name": "t", "data": "data.csv", **spec}
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump(doc))
    return hierwork.check(tmp_path / "spec.yaml").plan


@pytest.fixture(scope="module")
def wheat_plan():
    """Demo: nitrogen slope varying by farm, farms within regions, a farm-level predictor."""
    return hierwork.check(ROOT / "model_specs" / "wheat_slopes.yaml").plan


@pytest.fixture(scope="module")
def wheat_problem(wheat_plan):
    return collapsed.collapsed_problem(wheat_plan)


def _point(model, seed):
    """A random point of the model's value variables (unconstrained)."""
    rng = np.random.default_rng(seed)
    ip = model.initial_point()
    return {k: v + rng.normal(scale=0.3, size=np.shape(v)) for k, v in ip.items()}


def _dense_wheat(plan, b, gamma, chols, sigma):
    """Marginal log-likelihood and effect conditionals of the wheat chain by dense algebra."""
    farm, region = plan.factor("farm"), plan.factor("region")
    X = plan.X
    mean = X @ b + farm.W[farm.index] @ gamma
    r = plan.y - mean
    Zf = np.zeros((plan.n, farm.n_groups * 2))
    for k in range(2):
        Zf[np.arange(plan.n), farm.index * 2 + k] = X[:, farm.varying_cols[k]]
    Zr = np.zeros((plan.n, region.n_groups))
    Zr[np.arange(plan.n), region.index] = 1.0
    Z = np.hstack([Zf, Zr])
    Sf, Sr = chols["farm"] @ chols["farm"].T, chols["region"] @ chols["region"].T
    P = np.zeros((Z.shape[1],) * 2)
    for j in range(farm.n_groups):
        P[2 * j:2 * j + 2, 2 * j:2 * j + 2] = Sf
    P[Zf.shape[1]:, Zf.shape[1]:] = np.eye(region.n_groups) * Sr[0, 0]
    V = sigma**2 * np.eye(plan.n) + Z @ P @ Z.T
    loglik = stats.multivariate_normal(mean, V).logpdf(plan.y)
    cov = P - P @ Z.T @ np.linalg.solve(V, Z @ P)
    mu = P @ Z.T @ np.linalg.solve(V, r)
    return loglik, mu, cov, Zf.shape[1]


def _values(model, point):
    """Constrained values of the free variables and deterministics at a point."""
    outs = model.replace_rvs_by_values([model[v] for v in ("b", "residual_sd", "farm__gamma", "farm__sd",
                                                           "farm__corr", "region__sd")])
    fn = model.compile_fn(outs, inputs=model.value_vars, on_unused_input="ignore")
    b, s, gamma, fsd, fcorr, rsd = fn(point)
    chols = {"farm": fsd[:, None] * np.linalg.cholesky(fcorr), "region": rsd[:, None]}
    return b, s, gamma, fsd, fcorr, rsd, chols


# --- path choice ----------------------------------------------------------------------

def test_path_choice(wheat_plan, tmp_path):
    assert paths.best_path(wheat_plan)[0] == "collapsed"
    assert [f.name for f in paths.nesting_chain(wheat_plan)] == ["farm", "region"]
    # binomial weeks of a depot with the same rain days share their linear predictor: exact cells
    assert paths.best_path(hierwork.check(ROOT / "model_specs" / "depot_delays.yaml").plan)[0] == "reduced"
    frame = pd.DataFrame({"y": np.arange(12.0), "a": list("uvw") * 4, "c": list("pq") * 6})
    crossed = _plan(tmp_path, frame, {"outcome": {"column": "y"}, "groups": {"a": {}, "c": {}}})
    assert paths.best_path(crossed)[0] == "semi_collapsed"
    assert paths.nesting_chain(crossed) is None


# --- collapsed model on a plan ---------------------------------------------------------

def test_collapsed_model_equals_priors_plus_dense_marginal(wheat_plan, wheat_problem):
    """Same priors as the plain model; the likelihood is the dense Gaussian marginal."""
    model = collapsed.build_collapsed_model(wheat_plan, wheat_problem)
    plain = build_model(wheat_plan)
    point = _point(model, 1)
    shared = [plain[rv.name] for rv in model.free_RVs]
    plain_point = {**plain.initial_point(), **point}
    plain_priors = plain.compile_logp(vars=shared + [plain["intercept_prior"]])(plain_point)
    b, s, gamma, *_, chols = _values(model, point)
    dense, *_ = _dense_wheat(wheat_plan, b, gamma, chols, s)
    np.testing.assert_allclose(model.compile_logp()(point), plain_priors + dense, rtol=1e-9)


def test_group_effect_draws_match_dense_conditional(wheat_plan, wheat_problem):
    model = collapsed.build_collapsed_model(wheat_plan, wheat_problem)
    point = _point(model, 2)
    b, s, gamma, fsd, fcorr, rsd, chols = _values(model, point)
    D = 4000
    rep = lambda v: np.broadcast_to(v, (1, D) + np.shape(v)).copy()  # noqa: E731
    idata = az.from_dict(posterior={"b": rep(b), "residual_sd": rep(s), "farm__gamma": rep(gamma),
                                    "farm__sd": rep(fsd), "farm__corr": rep(fcorr),
                                    "region__sd": rep(rsd)})
    collapsed.add_group_effects(idata, wheat_plan, 7, wheat_problem, group_log_likelihood=True)
    dense_ll, mu, cov, n_farm_cols = _dense_wheat(wheat_plan, b, gamma, chols, s)
    farm_eff = idata.posterior["farm__effect"]
    assert farm_eff.dims == ("chain", "draw", "farm", "farm__term")
    assert list(farm_eff["farm"].values) == list(wheat_plan.factor("farm").levels)
    draws = np.hstack([farm_eff.values[0].reshape(D, -1), idata.posterior["region__effect"].values[0, :, :, 0]])
    z = (draws.mean(0) - mu) / np.sqrt(np.diag(cov) / D)
    assert np.max(np.abs(z)) < 4.5  # Monte Carlo error of a mean, 4.5 standard errors
    np.testing.assert_allclose(draws.std(0), np.sqrt(np.diag(cov)), rtol=0.08)  # ~4.5 x sqrt(1/(2D))
    np.testing.assert_allclose(idata.log_likelihood["y_by_region"].values[0, 0].sum(), dense_ll, rtol=1e-9)


# --- reduced path plumbing -------------------------------------------------------------

def test_reduced_likelihood_equals_per_row_normal(tmp_path):
    rng = np.random.default_rng(3)
    n = 150
    frame = pd.DataFrame({"y": rng.normal(50, 3, n), "x": rng.normal(size=n),
                          "a": rng.choice(list("uvwxy"), n), "c": rng.choice(list("pqr"), n)})
    frame["w"] = frame["a"].map({k: i * 0.5 for i, k in enumerate("uvwxy")})
    plan = _plan(tmp_path, frame, {"outcome": {"column": "y"}, "predictors": ["x"],
                                   "groups": {"a": {"varying": ["intercept", "x"], "predictors": ["w"]},
                                              "c": {}}})
    fa, fc = plan.factor("a"), plan.factor("c")
    b = rng.normal(size=2) + [50, 0]
    va, vc = rng.normal(size=(fa.n_groups, 2)), rng.normal(size=(fc.n_groups, 1))
    shift, s = rng.normal(size=fa.n_groups), 2.5
    # a centred factor carries column 0 and 1 (free_cols excludes them)
    mean = (va[fa.index] * plan.X[:, [0, 1]]).sum(1) + shift[fa.index] + vc[fc.index, 0]
    ref = stats.norm.logpdf(plan.y, mean, s).sum()
    with pm.Model() as m:
        rowwise.reduced_normal_likelihood(plan, pt.as_tensor(b), [], [
            (fa, pt.as_tensor(va), pt.as_tensor(shift)), (fc, pt.as_tensor(vc), None)], pt.as_tensor(s))
    np.testing.assert_allclose(m.compile_logp()({}), ref, rtol=1e-9)
    mean = plan.X @ b + (va[fa.index] * plan.X[:, [0, 1]]).sum(1) + vc[fc.index, 0]
    with pm.Model() as m:
        rowwise.reduced_normal_likelihood(plan, pt.as_tensor(b), [0, 1], [
            (fa, pt.as_tensor(va), None), (fc, pt.as_tensor(vc), None)], pt.as_tensor(s))
    np.testing.assert_allclose(m.compile_logp()({}), stats.norm.logpdf(plan.y, mean, s).sum(), rtol=1e-9)


# --- posteriors ------------------------------------------------------------------------

def _sample(model, plan, seed, draws=1000, **extra):
    settings = {**plan.spec.sampling, "chains": 2, "warmup": 1000, "draws": draws, "seed": seed,
                "cores": 1, **extra}
    return run_sampler(model, settings, "pymc", progress=False)


@pytest.mark.slow
def test_eight_schools_fast_path_matches_quadrature(tmp_path):
    """Posterior means of mu, tau and each school's effect against a quadrature
    over (mu, tau) given the spec's priors; theta_j | mu, tau, y is normal
    (BDA3 §5.4; data Rubin 1981, BDA3 Table 5.2)."""
    schools = pd.read_csv(DATA / "eight_schools.csv")
    plan = _plan(tmp_path, schools, {
        "outcome": {"column": "effect", "known_sd": "se"},
        "groups": {"school": {}},
        "priors": {"intercept": {"normal": {"mu": 0, "sigma": 20}},
                   "school.sd": {"half_normal": {"sigma": 10}}}})
    assert paths.best_path(plan)[0] == "collapsed"
    problem = collapsed.collapsed_problem(plan)
    idata = _sample(collapsed.build_collapsed_model(plan, problem), plan, 11, draws=2000)
    collapsed.add_group_effects(idata, plan, 12, problem)
    # No funnel is left; a rare divergence can still come from the half-normal prior's
    # wall on log(tau) (measured here: 1 in 28,000 draws over 7 seeds).
    assert int(idata.sample_stats.diverging.sum()) <= 1

    y, se = schools.effect.to_numpy(float), schools.se.to_numpy(float)
    mu = np.linspace(-60, 70, 1301)[:, None, None]
    tau = np.linspace(1e-6, 50, 1000)[None, :, None]
    logp = (stats.norm.logpdf(mu[..., 0], 0, 20) + stats.halfnorm.logpdf(tau[..., 0], scale=10)
            + stats.norm.logpdf(y, mu, np.sqrt(se**2 + tau**2)).sum(-1))
    w = np.exp(logp - logp.max())
    w /= w.sum()
    theta_mean = (y / se**2 + mu / tau**2) / (1 / se**2 + 1 / tau**2)
    exact = {"mu": (w * mu[..., 0]).sum(), "tau": (w * tau[..., 0]).sum(),
             "theta": (w[..., None] * theta_mean).sum((0, 1))}

    post = idata.posterior
    theta = post["b"].sel(term="intercept") + post["school__effect"].sel(school__term="intercept")
    for name, draws in [("mu", post["b"].sel(term="intercept")),
                        ("tau", post["school__sd"].sel(school__term="intercept")), ("theta", theta)]:
        est = draws.mean(("chain", "draw")).values
        mcse = az.mcse(draws.to_dataset(name="v"))["v"].values
        assert np.all(np.abs(est - exact[name]) < 4 * mcse + 0.01), (name, est, exact[name], mcse)


@pytest.mark.slow
def test_collapsed_posterior_matches_plain_model(tmp_path):
    """Small one-factor problem with a varying slope: posterior means and SDs of the
    population terms, SDs and every group effect agree with the per-row model."""
    rng = np.random.default_rng(20)
    n_groups = 12
    g = rng.integers(0, n_groups, 150)
    x = rng.normal(size=150)
    y = 3 + 0.5 * x + rng.normal(0, 1.0, n_groups)[g] + rng.normal(0, 0.4, n_groups)[g] * x + rng.normal(size=150)
    frame = pd.DataFrame({"y": y, "x": x, "line": [f"line_{k}" for k in g]})
    plan = _plan(tmp_path, frame, {"outcome": {"column": "y"}, "predictors": ["x"],
                                   "groups": {"line": {"varying": ["intercept", "x"],
                                                       "parameterisation": "non_centred"}}})
    problem = collapsed.collapsed_problem(plan)
    fast = _sample(collapsed.build_collapsed_model(plan, problem), plan, 21)
    collapsed.add_group_effects(fast, plan, 22, problem)
    slow = _sample(build_model(plan), plan, 23, target_accept=0.95)
    for name in ("b", "residual_sd", "line__sd", "line__effect"):
        a, b = fast.posterior[name], slow.posterior[name]
        for stat in ("mean", "std"):
            diff = getattr(a, stat)(("chain", "draw")) - getattr(b, stat)(("chain", "draw"))
            se = np.hypot(_mcse(a, stat), _mcse(b, stat))
            assert float(np.max(np.abs(diff / se))) < 4.5, (name, stat)


def _mcse(x, stat):
    """Monte Carlo SE of a posterior mean, or of an SD by the delta method on the
    mean of squared deviations (Vehtari et al. 2021, Bayesian Analysis 16, 667-718)."""
    dims = ("chain", "draw")
    if stat == "mean":
        return az.mcse(x.to_dataset(name="v"))["v"]
    sq = ((x - x.mean(dims)) ** 2).to_dataset(name="v")
    return az.mcse(sq)["v"] / (2 * x.std(dims))
