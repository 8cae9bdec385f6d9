"""External check on chickweight (Crowder and Hand 1990, Example 5.3): chick
weights over 21 days, 50 chicks, against statsmodels MixedLM (REML) fitted here.

Varying intercepts. Why the posterior means and the REML predictions should agree, and how
closely: given the variance components, the posterior mean of a chick's
intercept under flat priors on the population terms *is* the REML best linear
unbiased predictor (Harville 1976, JASA 71, 320-340; Robinson 1991, Statistical
Science 6, 15-32). The two differ only because the posterior averages over the
uncertainty in the variance components instead of plugging in their REML
estimates. With 50 chicks of about 12 weighings each, that uncertainty is a
few percent of the variance; the chick's shrinkage factor
``B = v / (v + tau^2)`` (about 0.09 here) moves by a few percent of itself, which
shifts a chick's estimate by well under a tenth of its posterior SD. Hence:
``|posterior mean - REML prediction| <= 4 MCSE + 0.1 posterior SD``.

Varying intercepts and day slopes, diet as a chick-level predictor. Here the
REML correlation of intercepts and slopes is close to -1 (-0.98), where the
posterior (LKJ prior) and the plug-in differ visibly, so the plug-in
allowance above would be a guess. Instead the check is exact: given the
covariance parameters (S, sigma), a chick's posterior mean coefficients are
the generalised least squares and best linear unbiased predictions of
Henderson's equations (Robinson 1991, eqs. 1-2), computed here with plain
linear algebra that reproduces statsmodels' REML predictions to 1e-9 when
given the REML covariance. Averaging them over posterior draws of (S, sigma)
gives the posterior mean exactly (a Rao-Blackwellised estimate, Gelfand and
Smith 1990), to be matched within 4 combined Monte Carlo standard errors. The
REML covariance parameters themselves must lie inside the posterior's central
94% intervals.
"""
from __future__ import annotations

from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
import xarray as xr

import hierwork

pytestmark = pytest.mark.slow  # every test here fits a model (MCMC)

DATA = Path(__file__).parent / "data"
PLUG_IN_ALLOWANCE = 0.1   # posterior SDs, see the module docstring


@pytest.fixture(scope="session")
def chick_data(tmp_path_factory):
    """chickweight with diet as 0/1 indicator columns (treatment coding, diet 1 reference)."""
    data = pd.read_csv(DATA / "chickweight.csv")
    for level in (2, 3, 4):
        data[f"diet{level}"] = (data["diet"] == level).astype(int)
    folder = tmp_path_factory.mktemp("chickweight")
    data.to_csv(folder / "chickweight.csv", index=False)
    return folder, data


def conditional_means(X, Z, y, groups, S, sigma2):
    """GLS population coefficients and each group's BLUP, given the covariances.

    Henderson's mixed-model equations in their closed form (Robinson 1991):
    ``b = (sum X'V^-1 X)^-1 sum X'V^-1 y``, ``u_j = S Z_j' V_j^-1 (y_j - X_j b)``
    with ``V_j = Z_j S Z_j' + sigma2 I``. Under a flat prior on ``b`` these are
    the posterior means of ``b`` and ``u_j`` given ``(S, sigma2)``.
    """
    n_groups = groups.max() + 1
    xvx = np.zeros((X.shape[1], X.shape[1]))
    xvy = np.zeros(X.shape[1])
    inverses = []
    for j in range(n_groups):
        rows = groups == j
        v_inv = np.linalg.inv(Z[rows] @ S @ Z[rows].T + sigma2 * np.eye(rows.sum()))
        inverses.append(v_inv)
        xvx += X[rows].T @ v_inv @ X[rows]
        xvy += X[rows].T @ v_inv @ y[rows]
    b = np.linalg.solve(xvx, xvy)
    u = np.array([S @ Z[groups == j].T @ inverses[j] @ (y[groups == j] - X[groups == j] @ b)
                  for j in range(n_groups)])
    return b, u


def _fit(folder: Path, name: str, groups_text: str):
    spec = folder / f"{name}.yaml"
    spec.write_text(f"""format: hierwork/1
name: {name}
data: chickweight.csv
outcome: {{column: weight_g, family: normal}}
predictors: [day]
groups:
  chick: {groups_text}
estimates: {{at: {{day: zero}}}}     # the chicks' intercepts at day 0, as REML reports them
sampling: {{chains: 2, warmup: 500, draws: 1000, seed: 21}}
""", encoding="utf-8")
    return hierwork.fit(spec, out=folder / f"run_{name}", progress=False)


def _rows(run, term: str) -> pd.DataFrame:
    table = run.group_estimates
    return table[(table["factor"] == "chick") & (table["term"] == term)].set_index("group")


def _own_coefficient_draws(run, term: str, data: pd.DataFrame) -> xr.DataArray:
    """Draws of each chick's own coefficient for ``term`` (the table's partial_mean averages these).

    Population value plus the chick's offset; for the intercept also the
    chick-level predictors times their coefficients (run-folder contract:
    ``b``, ``chick__effect``, ``chick__gamma``).
    """
    post = run.posterior.posterior
    own = post["b"].sel(term=term, drop=True) + post["chick__effect"].sel(chick__term=term, drop=True)
    if term == "intercept" and "chick__gamma" in post:
        names = list(post["chick__gamma"]["chick__predictor"].values)
        per_chick = data.groupby("chick")[names].first()
        per_chick.index = per_chick.index.astype(str)
        z = xr.DataArray(per_chick.loc[list(post["chick"].values)].to_numpy(float), dims=("chick", "chick__predictor"),
                         coords={"chick": post["chick"].values, "chick__predictor": names})
        own = own + (post["chick__gamma"] * z).sum("chick__predictor")
    return own


def _assert_close_to_reml(run, term, reml: pd.Series, data):
    rows = _rows(run, term).loc[reml.index]
    draws = _own_coefficient_draws(run, term, data).sel(chick=list(reml.index))
    mcse = az.mcse(xr.Dataset({"x": draws}), method="mean")["x"].values
    tolerance = 4 * mcse + PLUG_IN_ALLOWANCE * rows["partial_sd"].to_numpy()
    gap = np.abs(rows["partial_mean"].to_numpy() - reml.to_numpy())
    assert np.all(gap <= tolerance), pd.DataFrame({"gap": gap, "tolerance": tolerance}, index=reml.index)


@pytest.fixture(scope="session")
def intercept_run(chick_data):
    folder, _ = chick_data
    return _fit(folder, "chick_intercepts", "{column: chick}")


def test_varying_intercepts_match_reml_predictions(intercept_run, chick_data):
    _, data = chick_data
    assert intercept_run.passed, intercept_run.diagnostics
    mixed = smf.mixedlm("weight_g ~ day", data, groups=data["chick"]).fit(reml=True)
    assert mixed.converged
    reml = pd.Series({str(chick): mixed.fe_params["Intercept"] + effect.iloc[0]
                      for chick, effect in mixed.random_effects.items()})
    _assert_close_to_reml(intercept_run, "intercept", reml, data)


# --------------------------------------------------------------------------- varying slopes

DIETS = ["diet2", "diet3", "diet4"]
SLOPE_FORMULA = "weight_g ~ day + diet2 + diet3 + diet4"   # diet enters the chick intercepts


@pytest.fixture(scope="session")
def slope_run(chick_data):
    folder, _ = chick_data
    return _fit(folder, "chick_slopes",
                "{column: chick, varying: [intercept, day], predictors: [diet2, diet3, diet4]}")


@pytest.fixture(scope="session")
def slope_reml(chick_data):
    _, data = chick_data
    fitted = smf.mixedlm(SLOPE_FORMULA, data, groups=data["chick"], re_formula="~day").fit(reml=True)
    assert fitted.converged
    return fitted


def _design(data):
    codes, chicks = pd.factorize(data["chick"], sort=True)
    X = np.column_stack([np.ones(len(data)), data["day"], data[DIETS]]).astype(float)
    return X, X[:, :2], data["weight_g"].to_numpy(float), codes, [str(c) for c in chicks]


def test_conditional_means_reproduce_statsmodels(slope_reml, chick_data):
    _, data = chick_data
    X, Z, y, codes, chicks = _design(data)
    b, u = conditional_means(X, Z, y, codes, slope_reml.cov_re.to_numpy(), slope_reml.scale)
    np.testing.assert_allclose(b, slope_reml.fe_params.to_numpy(), rtol=1e-9)
    reml_u = np.array([slope_reml.random_effects[int(c)].to_numpy() for c in chicks])
    np.testing.assert_allclose(u, reml_u, atol=1e-9 * np.abs(reml_u).max())


def test_slopes_reml_covariance_inside_posterior_intervals(slope_run, slope_reml):
    assert slope_run.passed, slope_run.diagnostics
    post = slope_run.posterior.posterior
    reml_sd = np.sqrt(np.diag(slope_reml.cov_re.to_numpy()))
    reml_corr = slope_reml.cov_re.iloc[0, 1] / (reml_sd[0] * reml_sd[1])
    checks = {
        "chick.sd": (post["chick__sd"].sel(chick__term="intercept"), reml_sd[0]),
        "chick.day.sd": (post["chick__sd"].sel(chick__term="day"), reml_sd[1]),
        "chick.corr": (post["chick__corr"].isel({post["chick__corr"].dims[2]: 0,
                                                 post["chick__corr"].dims[3]: 1}), reml_corr),
        "residual_sd": (post["residual_sd"], np.sqrt(slope_reml.scale)),
    }
    for name, (draws, reml) in checks.items():
        low, high = np.quantile(draws.values, [0.03, 0.97])
        assert low <= reml <= high, (name, low, reml, high)


def test_slopes_posterior_means_are_averaged_conditional_means(slope_run, chick_data):
    _, data = chick_data
    X, Z, y, codes, chicks = _design(data)
    post = slope_run.posterior.posterior
    draws = post[["chick__sd", "chick__corr", "residual_sd"]].stack(sample=("chain", "draw"))
    picks = np.linspace(0, draws.sizes["sample"] - 1, 200).astype(int)   # thinned: near-independent
    diet_of_chick = data.groupby("chick")[DIETS].first().to_numpy(float)
    own = []
    for s in picks:
        sd = draws["chick__sd"].values[:, s]
        S = np.outer(sd, sd) * draws["chick__corr"].values[:, :, s]
        b, u = conditional_means(X, Z, y, codes, S, float(draws["residual_sd"].values[s]) ** 2)
        coef = b[:2] + u
        coef[:, 0] += diet_of_chick @ b[2:]
        own.append(coef)
    own = np.array(own)                                   # (draw, chick, term)
    rao_blackwell = own.mean(axis=0)
    rb_se = own.std(axis=0, ddof=1) / np.sqrt(len(picks))
    for k, term in enumerate(["intercept", "day"]):
        rows = _rows(slope_run, term).loc[chicks]
        coef_draws = _own_coefficient_draws(slope_run, term, data).sel(chick=chicks)
        mcse = az.mcse(xr.Dataset({"x": coef_draws}), method="mean")["x"].values
        tolerance = 4 * np.sqrt(mcse ** 2 + rb_se[:, k] ** 2)
        gap = np.abs(rows["partial_mean"].to_numpy() - rao_blackwell[:, k])
        assert np.all(gap <= tolerance), (term, pd.DataFrame({"gap": gap, "tolerance": tolerance}, index=chicks))
