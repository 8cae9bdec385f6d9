"""The Metropolis-within-Gibbs refresh of sampled group effects (hierwork.model.refresh).

External checks: the conditional of one group's effect under a Poisson
likelihood and a normal prior, normalised by numerical quadrature on a grid
(numpy), and compared by scipy's Kolmogorov-Smirnov test; the conditional of
two correlated effects under a normal likelihood, a closed form (normal-normal
conjugacy: precision ``X'X / s^2 + S^-1``, mean ``precision^-1 X'r / s^2``).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from hierwork.model.refresh import NEWTON_REACH, _Group
from hierwork.plan.families import get_family
from hierwork.plan.families.base import OutcomeRows

D = 4000
SD = 0.8
H, REACH = 1e-3 * 0.5, NEWTON_REACH * 0.5  # as refresh_effects takes them on the log scale


def _poisson_groups():
    """Three groups of 1, 4 and 40 rows; the rest of the linear predictor fixed per row."""
    rng = np.random.default_rng(3)
    index = np.repeat([0, 1, 2], [1, 4, 40])
    rest = rng.normal(0.5, 0.3, len(index))
    y = rng.poisson(np.exp(rest + np.array([1.5, -1.0, 0.7])[index])).astype(float)
    family = get_family("poisson")
    outcome = OutcomeRows(y)

    def loglik(eta):
        return family.log_density(y, eta, outcome, {})

    return index, rest, y, loglik


def _grid_cdfs(index, rest, y):
    """Each group's conditional on a fine grid: (grid, cdf per group), by quadrature."""
    grid = np.linspace(-6, 6, 24001)
    cdfs = []
    for j in range(3):
        eta = rest[index == j][:, None] + grid[None, :]
        logp = stats.poisson.logpmf(y[index == j][:, None], np.exp(eta)).sum(0) + stats.norm.logpdf(grid, 0, SD)
        p = np.exp(logp - logp.max())
        cdf = np.cumsum(p)
        cdfs.append(cdf / cdf[-1])
    return grid, cdfs


def _refresh(group, prior, start, rest, loglik, seed=1):
    mode, precision = group.laplace(rest, prior, loglik, H)
    return group.metropolis(start, mode, precision, rest, prior, loglik, np.random.default_rng(seed))


def test_refresh_keeps_and_reaches_a_poisson_conditional():
    """Started from exact draws the kernel keeps the conditional; started far away it reaches it."""
    index, rest, y, loglik = _poisson_groups()
    grid, cdfs = _grid_cdfs(index, rest, y)
    group, prior = _Group(np.ones((len(index), 1)), index, 3, REACH), np.full((D, 1, 1), 1 / SD ** 2)
    rng = np.random.default_rng(7)
    exact = np.stack([np.interp(rng.random(D), cdf, grid) for cdf in cdfs], axis=1)[:, :, None]
    rest_d = np.broadcast_to(rest, (D, len(index)))

    kept, rate = _refresh(group, prior, exact, rest_d, loglik)
    assert rate > 0.8  # the normal approximation at the mode is close for every group size
    far, _ = _refresh(group, prior, np.full((D, 3, 1), 4.0), rest_d, loglik, seed=2)
    for j, cdf in enumerate(cdfs):
        def conditional(v, cdf=cdf):
            return np.interp(v, grid, cdf)
        assert stats.kstest(kept[:, j, 0], conditional).pvalue > 1e-3
        # Far starts are replaced unless every proposal is rejected (about (1 - rate)^MH_STEPS of them)
        assert np.mean(far[:, j, 0] == 4.0) < 0.05
        assert stats.kstest(far[far[:, j, 0] != 4.0, j, 0], conditional).pvalue > 1e-3


def test_refresh_draws_two_correlated_effects_from_the_normal_closed_form():
    """Normal rows, a varying intercept and slope: the Laplace proposal is exact, so every draw is accepted."""
    rng = np.random.default_rng(11)
    n, s = 12, 0.5
    x = np.column_stack([np.ones(n), rng.normal(0, 1, n)])
    index = np.zeros(n, dtype=np.int64)
    cov = np.array([[0.6 ** 2, 0.3 * 0.6 * 0.4], [0.3 * 0.6 * 0.4, 0.4 ** 2]])
    rest = rng.normal(0, 1, n)
    y = rest + x @ np.array([0.5, -0.3]) + rng.normal(0, s, n)
    family = get_family("normal")
    outcome = OutcomeRows(y)

    def loglik(eta):
        return family.log_density(y, eta, outcome, {"residual_sd": s})

    group, prior = _Group(x, index, 1, REACH), np.broadcast_to(np.linalg.inv(cov), (D, 2, 2))
    draws, rate = _refresh(group, prior, np.zeros((D, 1, 2)), np.broadcast_to(rest, (D, n)), loglik)
    precision = x.T @ x / s ** 2 + np.linalg.inv(cov)
    mean = np.linalg.solve(precision, x.T @ (y - rest) / s ** 2)
    assert rate == pytest.approx(1.0, abs=1e-3)
    v = draws[:, 0, :]
    se = np.sqrt(np.diag(np.linalg.inv(precision)) / D)
    assert np.all(np.abs(v.mean(0) - mean) < 4 * se)
    assert np.allclose(np.cov(v.T), np.linalg.inv(precision), rtol=0.1, atol=1e-4)


def test_a_log_link_group_far_from_zero_is_reached():
    """A count of 200 where the rest predicts 1: the limited Newton steps from 0 still find the mode.

    (Started from exact draws: an independence sampler's normal proposal is
    lighter-tailed than a count's conditional, so a start far out in the tail
    is rarely left; NUTS's draws are in the bulk.)
    """
    y, rest = np.array([200.0]), np.zeros(1)
    family = get_family("poisson")

    def loglik(eta):
        return family.log_density(y, eta, OutcomeRows(y), {})

    group, prior = _Group(np.ones((1, 1)), np.zeros(1, dtype=np.int64), 1, REACH), np.full((D, 1, 1), 1 / 2.0 ** 2)
    grid = np.linspace(0, 10, 20001)
    logp = stats.poisson.logpmf(200, np.exp(grid)) + stats.norm.logpdf(grid, 0, 2.0)
    cdf = np.cumsum(np.exp(logp - logp.max()))
    exact = np.interp(np.random.default_rng(5).random(D), cdf / cdf[-1], grid)[:, None, None]
    mode, _ = group.laplace(np.broadcast_to(rest, (D, 1)), prior, loglik, H)
    draws, rate = _refresh(group, prior, exact, np.broadcast_to(rest, (D, 1)), loglik)
    assert mode[0, 0, 0] == pytest.approx(grid[np.argmax(logp)], abs=1e-3)
    assert rate > 0.9
    assert stats.kstest(draws[:, 0, 0], lambda v: np.interp(v, grid, cdf / cdf[-1])).pvalue > 1e-3


@pytest.fixture(scope="module")
def cbpp_refreshed(tmp_path_factory):
    """cbpp (Lesnoff et al. 2004, tests/data/SOURCES.md) with herd and an observation-level factor.

    Returns NUTS's own effects and the idata after the refresh.
    """
    import pandas as pd

    from hierwork.inference.sampling import run_sampler
    from hierwork.model.refresh import refresh_effects
    from hierwork.pipeline import check, path_model
    from conftest import write_spec

    folder = tmp_path_factory.mktemp("cbpp")
    data = pd.read_csv(Path(__file__).parent / "data" / "cbpp.csv")
    data["visit"] = [f"h{h}p{p}" for h, p in zip(data["herd"], data["period"])]
    data.to_csv(folder / "cbpp.csv", index=False)
    spec = write_spec(folder, """
        format: hierwork/1
        name: cbpp
        data: cbpp.csv
        outcome: {column: incidence, family: binomial, trials: size}
        predictors: [{column: period, type: categorical}]
        groups: {herd: {}, visit: {}}
        sampling: {chains: 2, warmup: 500, draws: 500, seed: 5}
        """)
    report = check(spec)
    model, _ = path_model(report.plan, report.path)
    idata = run_sampler(model, report.plan.spec.sampling, report.engine, False)
    before = {f.name: idata.posterior[f"{f.name}__effect"].copy() for f in report.plan.factors}
    return before, refresh_effects(idata, report.plan, 5), report.plan


@pytest.mark.slow
def test_refresh_moves_the_effects_within_their_posterior(cbpp_refreshed):
    """The refreshed effects have NUTS's posterior (means within Monte Carlo error), mix at least as well,
    and the sampled forms they replace are set aside for reading, not gating."""
    import arviz as az

    from hierwork.model.refresh import AS_SAMPLED

    before, idata, plan = cbpp_refreshed
    for name, old in before.items():
        new = idata.posterior[f"{name}__effect"]
        sd = old.std(("chain", "draw")).values
        assert np.max(np.abs(new.mean(("chain", "draw")).values - old.mean(("chain", "draw")).values) / sd) < 0.35
        assert np.allclose(new.std(("chain", "draw")).values, sd, rtol=0.2)
        assert np.median(az.ess(new.to_dataset(), method="tail")[f"{name}__effect"].values) >= \
            0.9 * np.median(az.ess(old.to_dataset(), method="tail")[f"{name}__effect"].values)
        assert float(new.attrs["refresh"].split(", ")[1].split("%")[0]) > 80
    assert AS_SAMPLED in idata.groups()
    sampled = set(idata[AS_SAMPLED].data_vars)
    assert sampled and not sampled & set(idata.posterior.data_vars)
    assert all(v.startswith(("herd__", "visit__", "b_shifted")) for v in sampled)
