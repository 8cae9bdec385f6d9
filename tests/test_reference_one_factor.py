"""External checks of one-factor models against published data and exact results.

* Eight schools (Rubin 1981; Gelman et al., *Bayesian Data Analysis*, 3rd ed.
  (BDA3), Table 5.2) with known standard errors: complete pooling against the
  published precision-weighted mean, partial pooling against the exact
  posterior computed here by quadrature over the hyperparameters (BDA3 §5.4).
* Dyestuff (Davies and Goldsmith 1972; Box and Tiao 1973, §5.1) and rail
  (Devore 2000, Example 10.10; Pinheiro and Bates 2000, App. A.26): baselines
  against the grand and group means, the population mean and between-group SD
  against the REML figures in tests/data/SOURCES.md, and every group effect
  against the exact posterior by quadrature over (mu, tau, sigma).
* cbpp (Lesnoff et al. 2004): binomial complete- and no-pooling baselines
  against statsmodels GLM(family=Binomial()) fitted here.
* The pooling weight of every group (``pooling_weight``, the posterior mean of
  ``v_j / (v_j + tau^2)``; Efron and Morris 1975, BDA3 §5.5) against the same
  exact posterior: dyestuff and rail are balanced one-factor normal designs
  (``v_j = sigma^2 / n``), eight schools has known, unequal SDs.

Monte Carlo tolerances: a posterior mean or SD estimated from draws is compared
with the exact value within 4 Monte Carlo standard errors (MCSE from ArviZ,
Vehtari et al. 2021), plus the quadrature's own error, estimated as the change
between a grid and one four times finer.
"""
from __future__ import annotations

from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
import xarray as xr
from scipy import stats

import hierwork

DATA = Path(__file__).parent / "data"
MCSE_TOLERANCE = 4.0   # |estimate - exact| <= 4 MCSE fails by chance with probability ~6e-5


def _fit(tmp_path_factory, name: str, spec_text: str):
    """Write ``spec_text`` into a fresh folder and fit it through the public API."""
    folder = tmp_path_factory.mktemp(name)
    spec_path = folder / f"{name}.yaml"
    spec_path.write_text(spec_text.replace("DATA", str(DATA)), encoding="utf-8")
    return hierwork.fit(hierwork.load_spec(spec_path), out=folder / "run", progress=False)


def _group_values(run, factor: str) -> xr.DataArray:
    """Posterior draws of each group's own intercept (population intercept + offset)."""
    post = run.posterior.posterior
    offset = post[f"{factor}__effect"].sel({f"{factor}__term": "intercept"}, drop=True)
    return post["b"].sel(term="intercept", drop=True) + offset


def _mcse(draws: xr.DataArray, method: str, **kwargs) -> np.ndarray:
    """Monte Carlo standard error per group of ``draws`` (dims chain, draw, ...).

    ``method="sd"`` uses the delta method on the squared deviations with their
    effective sample size, as ArviZ does (Vehtari et al. 2021, Bayesian
    Analysis 16, 667-718); it is computed here because ArviZ 0.23's compiled
    version of it fails under NumPy 2.4.
    """
    if method == "sd":
        squares = (draws - draws.mean(("chain", "draw"))) ** 2
        ess = az.ess(xr.Dataset({"x": squares}), method="mean")["x"]
        variance = squares.mean(("chain", "draw"))
        var_of_var = ((squares ** 2).mean(("chain", "draw")) - variance ** 2) / ess
        return np.sqrt(var_of_var / variance / 4).values
    return az.mcse(xr.Dataset({"x": draws}), method=method, **kwargs)["x"].values


def _intercept_rows(run, factor: str) -> pd.DataFrame:
    table = run.group_estimates
    return table[(table["factor"] == factor) & (table["term"] == "intercept")].set_index("group")


# --------------------------------------------------------------------------- exact posterior

def exact_one_way(ybar, n, *, mu_prior, tau_prior, tau_max, se=None, ssw=0.0,
                  sigma_prior=None, sigma_range=None, points=2000):
    """Exact posterior of the normal one-way model by quadrature (BDA3 §5.4).

    Model: ``y_ij ~ N(theta_j, sigma^2)`` (or the group mean ``ybar_j ~ N(theta_j,
    se_j^2)`` with known ``se``), ``theta_j ~ N(mu, tau^2)``, ``mu ~ N(m0, s0^2)``.
    ``mu`` and ``theta`` are integrated analytically given ``(tau, sigma)``;
    ``(tau, sigma)`` by the midpoint rule on a grid of ``points`` per axis.
    The group data enter through their means ``ybar``, sizes ``n`` and the
    pooled within-group sum of squares ``ssw``, which are sufficient.

    Returns
    -------
    dict
        ``theta_mean``, ``theta_sd`` (per group), ``mu_mean``, ``tau`` grid and
        its posterior weights ``tau_w``, ``pooling_weight`` (per group, the
        posterior mean of ``v_j / (v_j + tau^2)``: the weight of ``mu`` in
        ``E[theta_j | mu, tau, sigma, y]``), and ``edge``: the posterior weight of
        the grid's last tau and sigma points relative to the largest (to check
        the grid covers the posterior).
    """
    ybar, n = np.asarray(ybar, float), np.asarray(n, float)
    m0, s0 = mu_prior
    tau = (np.arange(points) + 0.5) * tau_max / points
    if se is not None:
        v = (np.asarray(se, float) ** 2)[None, None, :]
        log_sigma_part = np.zeros((1, 1))
    else:
        lo, hi = sigma_range
        sigma = lo + (np.arange(points) + 0.5) * (hi - lo) / points
        v = sigma[None, :, None] ** 2 / n
        within_df = float(np.sum(n - 1))
        log_sigma_part = (-0.5 * within_df * np.log(sigma ** 2) - ssw / (2 * sigma ** 2)
                          + sigma_prior.logpdf(sigma))[None, :]
    t2 = (tau ** 2)[:, None, None]
    V = t2 + v                                        # var of ybar_j given mu: (tau, sigma, group)
    P = 1 / s0 ** 2 + np.sum(1 / V, axis=-1)          # precision of mu given tau, sigma, y
    M = (m0 / s0 ** 2 + np.sum(ybar / V, axis=-1)) / P
    log_post = (-0.5 * np.sum(np.log(V) + ybar ** 2 / V, axis=-1) + 0.5 * M ** 2 * P - 0.5 * np.log(P)
                + log_sigma_part + tau_prior.logpdf(tau)[:, None])
    w = np.exp(log_post - log_post.max())
    w /= w.sum()
    Q = 1 / v + 1 / t2                                # precision of theta_j given mu, tau, sigma, y
    cond_mean = (ybar / v + M[..., None] / t2) / Q
    cond_var = 1 / Q + (1 / (t2 * Q)) ** 2 / P[..., None]
    theta_mean = np.einsum("ts,tsg->g", w, cond_mean)
    theta_sd = np.sqrt(np.einsum("ts,tsg->g", w, cond_var + cond_mean ** 2) - theta_mean ** 2)
    tau_w, sigma_w = w.sum(axis=1), w.sum(axis=0)
    edge = tau_w[-1] / tau_w.max()
    if se is None:
        edge = max(edge, sigma_w[-1] / sigma_w.max(), sigma_w[0] / sigma_w.max())
    pooling_weight = np.einsum("ts,tsg->g", w, np.broadcast_to(v / V, V.shape))
    return {"theta_mean": theta_mean, "theta_sd": theta_sd, "mu_mean": float(np.sum(w * M)),
            "tau": tau, "tau_w": tau_w, "pooling_weight": pooling_weight, "edge": edge}


QUARTILES = (0.25, 0.5, 0.75)


def tau_quantile(exact, q):
    """Quantile of tau from the quadrature weights (midpoint rule, linear interpolation)."""
    cumulative = np.cumsum(exact["tau_w"]) - exact["tau_w"] / 2
    return float(np.interp(q, cumulative, exact["tau"]))


def exact_with_grid_error(**kwargs):
    """The exact posterior on a fine grid, and the grid error (fine vs 4x coarser).

    Besides the fields of :func:`exact_one_way`, the result holds ``tau_q``:
    tau's quartiles (``QUARTILES``).
    """
    fine = exact_one_way(points=2000, **kwargs)
    coarse = exact_one_way(points=500, **kwargs)
    assert fine["edge"] < 1e-4, "quadrature grid does not cover the posterior"
    for result in (fine, coarse):
        result["tau_q"] = np.array([tau_quantile(result, q) for q in QUARTILES])
    error = {k: np.abs(np.asarray(fine[k]) - np.asarray(coarse[k]))
             for k in ("theta_mean", "theta_sd", "mu_mean", "tau_q", "pooling_weight")}
    return fine, error


def test_quadrature_matches_conjugate_limit():
    # Self-check of the quadrature (no hierwork involved): with tau's prior
    # concentrated near 0 every group effect equals mu, whose posterior with
    # known SDs and a normal prior is the conjugate normal (BDA3 §2.5).
    y, se = np.array([3.0, -1.0, 4.0]), np.array([1.0, 2.0, 1.5])
    exact = exact_one_way(y, np.ones(3), se=se, mu_prior=(0.0, 10.0), tau_prior=stats.halfnorm(scale=1e-6),
                          tau_max=1e-5)
    precision = 1 / 10.0 ** 2 + np.sum(1 / se ** 2)
    np.testing.assert_allclose(exact["theta_mean"], np.sum(y / se ** 2) / precision, rtol=1e-6)
    np.testing.assert_allclose(exact["theta_sd"], np.sqrt(1 / precision), rtol=1e-4)


# --------------------------------------------------------------------------- eight schools

EIGHT_SCHOOLS_PRIORS = {"mu": (0.0, 50.0), "tau_beta": 25.0}


@pytest.fixture(scope="session")
def eight_schools(tmp_path_factory):
    # Half-Cauchy(25) on tau as in Gelman (2006), "Prior distributions for
    # variance parameters in hierarchical models", Bayesian Analysis 1, 515-534.
    return _fit(tmp_path_factory, "eight_schools", """
        format: hierwork/1
        name: eight_schools
        data: DATA/eight_schools.csv
        outcome: {column: effect, family: normal, known_sd: se}
        groups:
          school: {column: school}
        priors:
          intercept: {normal: {mu: 0, sigma: 50}}
          school.sd: {half_cauchy: {beta: 25}}
        sampling: {chains: 2, warmup: 1000, draws: 2000, seed: 8}
        """.replace("\n        ", "\n"))


@pytest.mark.slow
def test_eight_schools_passes_gate(eight_schools):
    assert eight_schools.passed, eight_schools.diagnostics


@pytest.mark.slow
def test_eight_schools_baselines(eight_schools):
    rows = _intercept_rows(eight_schools, "school")
    data = pd.read_csv(DATA / "eight_schools.csv").set_index("school")
    # Complete pooling: precision-weighted mean 7.686 (SE 4.072), tests/data/SOURCES.md;
    # BDA3 §5.5 quotes 7.7 and 4.1.
    np.testing.assert_allclose(rows["complete_pooling"], 7.686, atol=5e-4)
    # No pooling with known SDs: each school's own estimate (BDA3 §5.5).
    np.testing.assert_allclose(rows.loc[data.index, "no_pooling"], data["effect"], rtol=1e-10)


def _eight_schools_exact():
    """The data, and the exact posterior with its grid error (BDA3 §5.4), under the fixture's priors."""
    data = pd.read_csv(DATA / "eight_schools.csv")
    exact, grid_error = exact_with_grid_error(
        ybar=data["effect"], n=np.ones(len(data)), se=data["se"], mu_prior=EIGHT_SCHOOLS_PRIORS["mu"],
        tau_prior=stats.halfcauchy(scale=EIGHT_SCHOOLS_PRIORS["tau_beta"]), tau_max=800.0)
    return data, exact, grid_error


@pytest.mark.slow
def test_eight_schools_partial_pooling_is_the_exact_posterior(eight_schools):
    data, exact, grid_error = _eight_schools_exact()
    rows = _intercept_rows(eight_schools, "school").loc[data["school"]]
    draws = _group_values(eight_schools, "school").sel(school=list(data["school"]))
    mean_tol = MCSE_TOLERANCE * _mcse(draws, "mean") + grid_error["theta_mean"] + 1e-9
    sd_tol = MCSE_TOLERANCE * _mcse(draws, "sd") + grid_error["theta_sd"] + 1e-9
    assert np.all(np.abs(rows["partial_mean"].to_numpy() - exact["theta_mean"]) <= mean_tol), (
        rows["partial_mean"].to_numpy(), exact["theta_mean"], mean_tol)
    assert np.all(np.abs(rows["partial_sd"].to_numpy() - exact["theta_sd"]) <= sd_tol), (
        rows["partial_sd"].to_numpy(), exact["theta_sd"], sd_tol)
    # The population mean too.
    mu = eight_schools.posterior.posterior["b"].sel(term="intercept", drop=True)
    assert abs(float(mu.mean()) - exact["mu_mean"]) <= MCSE_TOLERANCE * _mcse(mu, "mean") + grid_error["mu_mean"]


@pytest.mark.slow
def test_eight_schools_pooling_weight_is_the_exact_posterior_mean(eight_schools):
    # Known SDs: v_j = se_j^2 exactly; the weight is the posterior mean of se_j^2 / (se_j^2 + tau^2).
    data, exact, grid_error = _eight_schools_exact()
    rows = _intercept_rows(eight_schools, "school").loc[data["school"]]
    tau = eight_schools.posterior.posterior["school__sd"].sel(school__term="intercept", drop=True)
    v = xr.DataArray(data["se"].to_numpy() ** 2, dims="school")
    draws = v / (v + tau ** 2)
    tol = MCSE_TOLERANCE * _mcse(draws, "mean") + grid_error["pooling_weight"] + 1e-9
    assert np.all(np.abs(rows["pooling_weight"].to_numpy() - exact["pooling_weight"]) <= tol), (
        rows["pooling_weight"].to_numpy(), exact["pooling_weight"], tol)
    # The school with the largest SE is pooled most (Efron and Morris 1975): the order follows the SEs.
    assert list(rows["pooling_weight"].rank()) == list(data["se"].rank())


# --------------------------------------------------------------------------- dyestuff and rail

# name, outcome, factor, REML mean and between-group SD and the ANOVA mean
# squares between and within (tests/data/SOURCES.md),
# priors: mu ~ N(m0, s0), tau ~ half-normal(s_tau), sigma ~ half-normal(s_sigma).
ONE_WAY = {
    "dyestuff": dict(outcome="yield_g", factor="batch", reml_mean=1527.5, reml_sd=42.00, anova=(11271.5, 2451.25),
                     mu=(0.0, 10000.0), tau_sd=100.0, sigma_sd=100.0),
    "rail": dict(outcome="travel_ns", factor="rail", reml_mean=66.5, reml_sd=24.80, anova=(1862.1, 16.17),
                 mu=(0.0, 1000.0), tau_sd=50.0, sigma_sd=20.0),
}


@pytest.fixture(scope="session", params=sorted(ONE_WAY))
def one_way(request, tmp_path_factory):
    name = request.param
    c = ONE_WAY[name]
    run = _fit(tmp_path_factory, name, f"""
format: hierwork/1
name: {name}
data: DATA/{name}.csv
outcome: {{column: {c['outcome']}, family: normal}}
groups:
  {c['factor']}: {{column: {c['factor']}}}
priors:
  intercept: {{normal: {{mu: {c['mu'][0]}, sigma: {c['mu'][1]}}}}}
  {c['factor']}.sd: {{half_normal: {{sigma: {c['tau_sd']}}}}}
  residual_sd: {{half_normal: {{sigma: {c['sigma_sd']}}}}}
sampling: {{chains: 2, warmup: 1000, draws: 2000, seed: 11}}
""")
    data = pd.read_csv(DATA / f"{name}.csv", dtype={c["factor"]: str})
    return name, c, run, data


def _exact_for(c, data):
    groups = data.groupby(c["factor"])[c["outcome"]]
    ybar, n = groups.mean(), groups.size()
    ssw = float(((data[c["outcome"]] - groups.transform("mean")) ** 2).sum())
    within_sd = np.sqrt(ssw / (len(data) - len(n)))
    exact, error = exact_with_grid_error(
        ybar=ybar.to_numpy(), n=n.to_numpy(), ssw=ssw, mu_prior=c["mu"], tau_prior=stats.halfnorm(scale=c["tau_sd"]),
        sigma_prior=stats.halfnorm(scale=c["sigma_sd"]), tau_max=10 * ybar.std(),
        sigma_range=(0.05 * within_sd, 4 * within_sd))
    return ybar, exact, error


@pytest.mark.slow
def test_one_way_passes_gate(one_way):
    name, _, run, _ = one_way
    assert run.passed, (name, run.diagnostics)


@pytest.mark.slow
def test_one_way_data_match_the_published_anova(one_way):
    # The copied data reproduce the published mean squares (SOURCES.md), so the
    # REML figures below belong to these very numbers.
    name, c, _, data = one_way
    groups = data.groupby(c["factor"])[c["outcome"]]
    n, k = len(data), groups.ngroups
    msb = float((groups.size() * (groups.mean() - data[c["outcome"]].mean()) ** 2).sum()) / (k - 1)
    msw = float(((data[c["outcome"]] - groups.transform("mean")) ** 2).sum()) / (n - k)
    np.testing.assert_allclose([msb, msw], c["anova"], rtol=5e-4)


@pytest.mark.slow
def test_one_way_baselines_are_grand_and_group_means(one_way):
    # Closed forms (no pooling: group means; complete pooling: the grand mean,
    # which for a balanced design is also the REML mean, SOURCES.md: 1527.5 and
    # 66.5): equal up to floating-point rounding.
    name, c, run, data = one_way
    rows = _intercept_rows(run, c["factor"])
    np.testing.assert_allclose(data[c["outcome"]].mean(), c["reml_mean"], rtol=1e-12)
    np.testing.assert_allclose(rows["complete_pooling"], c["reml_mean"], rtol=1e-10)
    means = data.groupby(c["factor"])[c["outcome"]].mean()
    np.testing.assert_allclose(rows.loc[means.index, "no_pooling"], means, rtol=1e-10)


@pytest.mark.slow
def test_one_way_population_mean_and_sd_against_reml(one_way):
    name, c, run, data = one_way
    post = run.posterior.posterior
    mu = post["b"].sel(term="intercept", drop=True)
    _, exact, error = _exact_for(c, data)
    # The exact posterior mean of mu differs from REML's only by the (weak)
    # prior's pull; allow that difference on top of the Monte Carlo error.
    prior_pull = abs(exact["mu_mean"] - c["reml_mean"])
    assert prior_pull < 0.01 * np.std(data[c["outcome"]]), prior_pull
    tol = MCSE_TOLERANCE * _mcse(mu, "mean") + error["mu_mean"]
    assert abs(float(mu.mean()) - exact["mu_mean"]) <= tol, (float(mu.mean()), exact["mu_mean"], tol)
    assert abs(float(mu.mean()) - c["reml_mean"]) <= tol + prior_pull
    # REML between-group SD inside the posterior central 50% interval.
    tau = post[f"{c['factor']}__sd"].sel({f"{c['factor']}__term": "intercept"}, drop=True)
    low, high = np.quantile(tau.values, [0.25, 0.75])
    assert low <= c["reml_sd"] <= high, (name, low, c["reml_sd"], high)
    # And the quartiles of tau themselves against the exact posterior.
    for i, q in enumerate(QUARTILES):
        got = float(np.quantile(tau.values, q))
        tol = MCSE_TOLERANCE * _mcse(tau, "quantile", prob=q) + error["tau_q"][i]
        assert abs(got - exact["tau_q"][i]) <= tol, (name, q, got, exact["tau_q"][i], tol)


@pytest.mark.slow
def test_one_way_group_effects_are_the_exact_posterior(one_way):
    name, c, run, data = one_way
    ybar, exact, error = _exact_for(c, data)
    rows = _intercept_rows(run, c["factor"]).loc[ybar.index]
    draws = _group_values(run, c["factor"]).sel({c["factor"]: list(ybar.index)})
    mean_tol = MCSE_TOLERANCE * _mcse(draws, "mean") + error["theta_mean"]
    sd_tol = MCSE_TOLERANCE * _mcse(draws, "sd") + error["theta_sd"]
    assert np.all(np.abs(rows["partial_mean"].to_numpy() - exact["theta_mean"]) <= mean_tol), (
        name, rows["partial_mean"].to_numpy(), exact["theta_mean"], mean_tol)
    assert np.all(np.abs(rows["partial_sd"].to_numpy() - exact["theta_sd"]) <= sd_tol), (
        name, rows["partial_sd"].to_numpy(), exact["theta_sd"], sd_tol)


# --------------------------------------------------------------------------- cbpp

@pytest.fixture(scope="session")
def cbpp(tmp_path_factory):
    # Only the baselines are checked here: they do not depend on the draws.
    return _fit(tmp_path_factory, "cbpp", """
format: hierwork/1
name: cbpp
data: DATA/cbpp.csv
outcome: {column: incidence, family: binomial, trials: size}
predictors:
  - {column: period, type: categorical, reference: "1"}
groups:
  herd: {column: herd}
sampling: {chains: 2, warmup: 300, draws: 300, seed: 5}
""")


@pytest.mark.slow
def test_cbpp_baselines_against_binomial_glm(cbpp):
    data = pd.read_csv(DATA / "cbpp.csv")
    data["healthy"] = data["size"] - data["incidence"]
    family = sm.families.Binomial()
    # Complete pooling: one intercept for all herds, period as in the spec (logit scale, period 1).
    pooled = smf.glm("incidence + healthy ~ C(period)", data, family=family).fit(tol=1e-12)
    # No pooling: one intercept per herd, the same period terms.
    separate = smf.glm("incidence + healthy ~ 0 + C(herd) + C(period)", data, family=family).fit(tol=1e-12)
    rows = _intercept_rows(cbpp, "herd")
    herds = sorted(data["herd"].unique())
    np.testing.assert_allclose(rows["complete_pooling"], pooled.params["Intercept"], atol=1e-6)
    expected = [separate.params[f"C(herd)[{h}]"] for h in herds]
    np.testing.assert_allclose(rows.loc[[str(h) for h in herds], "no_pooling"], expected, atol=1e-6)
    assert rows.loc[[str(h) for h in herds], "rows"].tolist() == data.groupby("herd").size().loc[herds].tolist()
    totals = data.groupby("herd")[["size", "incidence"]].sum().loc[herds]
    assert rows.loc[[str(h) for h in herds], "trials"].tolist() == totals["size"].tolist()
    assert rows.loc[[str(h) for h in herds], "events"].tolist() == totals["incidence"].tolist()


@pytest.mark.slow
def test_one_way_pooling_weight_is_the_exact_posterior_mean(one_way):
    # A balanced one-factor normal design: v = sigma^2 / n for every group, so every group has the same
    # weight, the posterior mean of (sigma^2 / n) / (sigma^2 / n + tau^2) over (tau, sigma).
    name, c, run, data = one_way
    ybar, exact, error = _exact_for(c, data)
    rows = _intercept_rows(run, c["factor"]).loc[ybar.index]
    post = run.posterior.posterior
    n = data.groupby(c["factor"]).size().iloc[0]
    tau = post[f"{c['factor']}__sd"].sel({f"{c['factor']}__term": "intercept"}, drop=True)
    v = post["residual_sd"] ** 2 / n
    draws = v / (v + tau ** 2)
    tol = MCSE_TOLERANCE * _mcse(draws, "mean") + error["pooling_weight"].max()
    assert np.all(np.abs(rows["pooling_weight"].to_numpy() - exact["pooling_weight"]) <= tol), (
        name, rows["pooling_weight"].to_numpy(), exact["pooling_weight"], tol)
    assert rows["pooling_weight"].nunique() == 1 and 0 < rows["pooling_weight"].iloc[0] < 1
