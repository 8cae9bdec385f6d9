"""The exact fast path for normal outcomes, checked against direct computations.

References: per-row densities from scipy.stats.norm; the marginal of a linear
Gaussian model ``y ~ N(X b, s^2 I + Z S Z')`` from scipy.stats.multivariate_normal
on the dense covariance; integrals over a group effect by scipy.integrate.quad;
the conditional of the effects from the dense joint Gaussian (standard
identities: posterior precision = prior precision + Z'Z/s^2).
"""
from pathlib import Path

import numpy as np
import pandas as pd
import pytensor
import pytensor.tensor as pt
import pytest
from scipy import integrate, stats

from hierwork.model import cells as suffstats
from hierwork.model.marginal import (Level, collapsed_group_loglik, collapsed_loglik, draw_effects,
                                reduced_loglik)
from hierwork.model.cells import cell_index, cell_stats

DATA = Path(__file__).parent / "data"


def _problem(seed, n_groups=6, n_rows=60, p=3, level=0.0, known_sd=False):
    rng = np.random.default_rng(seed)
    g = rng.integers(0, n_groups, n_rows)
    g[:n_groups] = np.arange(n_groups)
    X = np.column_stack([np.ones(n_rows)] + [rng.normal(size=n_rows) for _ in range(p - 1)])
    y = level + X @ rng.normal(size=p) + rng.normal(size=n_groups)[g] + rng.normal(size=n_rows)
    sd = rng.uniform(0.5, 2.0, n_rows) if known_sd else None
    return rng, g, X, y, sd


def _random_chol(rng, q):
    if q == 1:
        return np.array([[rng.uniform(0.3, 2.0)]])
    eigs = rng.uniform(0.2, 1.0, q)
    corr = stats.random_correlation.rvs(eigs * q / eigs.sum(), random_state=rng)
    return rng.uniform(0.3, 2.0, q)[:, None] * np.linalg.cholesky(corr)


def _pt_eval(fn, *args, **kw):
    """Evaluate an expression builder on PyTensor tensors (compiled, as in a model)."""
    sym = [pt.as_tensor_variable(np.asarray(a, float)) for a in args]
    return pytensor.function([], fn(*sym, **kw))()


# --- sufficient statistics -------------------------------------------------------

def test_cell_stats_match_per_group_sums_and_chunking(monkeypatch):
    rng, g, X, y, sd = _problem(0, known_sd=True)
    whole = cell_stats(y, X, g, known_sd=sd)
    monkeypatch.setattr(suffstats, "_CHUNK_BYTES", 8 * 16 * 7)  # 7 rows per chunk
    chunked = cell_stats(y, X, g, known_sd=sd)
    for j in range(6):
        m = g == j
        w = 1 / sd[m] ** 2
        yc = y[m] - whole.centre[j]
        np.testing.assert_allclose(whole.xtx[j], (X[m] * w[:, None]).T @ X[m], rtol=1e-12)
        np.testing.assert_allclose(whole.xty[j], (X[m] * w[:, None]).T @ yc, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(whole.yty[j], np.sum(w * yc**2), rtol=1e-12)
        np.testing.assert_allclose(whole.log_noise_var[j], np.sum(np.log(sd[m] ** 2)), rtol=1e-12)
        assert whole.n[j] == m.sum()
    for name in ("xtx", "xty", "yty"):
        np.testing.assert_allclose(getattr(chunked, name), getattr(whole, name), rtol=1e-12, atol=1e-12)


def test_no_centring_without_an_intercept_column():
    _, g, X, y, _ = _problem(1)
    s = cell_stats(y, X[:, 1:], g)
    assert np.all(s.centre == 0)
    np.testing.assert_allclose(s.yty, np.bincount(g, weights=y**2))


# --- reduced log density == per-row log density -------------------------------------

@pytest.mark.parametrize("known_sd", [False, True])
def test_reduced_equals_per_row_one_factor(known_sd):
    rng, g, X, y, sd = _problem(2, level=1e4, known_sd=known_sd)  # large level: centring matters
    st_ = cell_stats(y, X, g, known_sd=sd)
    b = rng.normal(size=3) + [1e4, 0, 0]
    u = rng.normal(size=(6, 2))
    s = None if known_sd else 1.3
    t = np.tile(b, (6, 1))
    t[:, [0, 2]] += u
    ref = stats.norm.logpdf(y, (X * t[g]).sum(1), sd if known_sd else s).sum()  # scipy reference
    got = _pt_eval(lambda b_, u_, *s_: reduced_loglik(st_, b_, [(u_, (0, 2), np.arange(6))],
                                                      *s_).sum(), b, u, *([] if known_sd else [s]))
    np.testing.assert_allclose(got, ref, rtol=1e-9)


def test_reduced_equals_per_row_crossed_factors():
    rng = np.random.default_rng(3)
    n = 200
    a, c = rng.integers(0, 5, n), rng.integers(0, 4, n)
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    y = X @ [2.0, 1.0] + rng.normal(size=5)[a] + rng.normal(size=4)[c] + rng.normal(size=n)
    cell, cell_groups = cell_index(a, c)
    st_ = cell_stats(y, X, cell)
    b, ua, uc, s = rng.normal(size=2), rng.normal(size=(5, 2)), rng.normal(size=(4, 1)), 0.8
    mean = X @ b + (X * ua[a]).sum(1) + uc[c, 0]
    ref = stats.norm.logpdf(y, mean, s).sum()
    got = reduced_loglik(st_, b, [(ua, (0, 1), cell_groups[:, 0]), (uc, (0,), cell_groups[:, 1])],
                         s, xp=np).sum()
    np.testing.assert_allclose(got, ref, rtol=1e-9)


# --- collapsed log density == dense marginal ----------------------------------------

def _dense_marginal(g, X, y, b, levels_rows, chols, noise_var, top_of_row):
    """log N(y | X b, diag(noise) + sum_k Z_k blockdiag(S_k) Z_k') by top-level group."""
    out = []
    for top in np.unique(top_of_row):
        m = top_of_row == top
        V = np.diag(noise_var[m])
        for (cols, group_of_row), L in zip(levels_rows, chols):
            Z = X[m][:, list(cols)]
            same = group_of_row[m][:, None] == group_of_row[m][None, :]
            V += (Z @ L @ L.T @ Z.T) * same
        out.append(stats.multivariate_normal(X[m] @ b, V).logpdf(y[m]))
    return np.array(out)


@pytest.mark.parametrize("cols", [(0,), (0, 1), (0, 1, 2)])
@pytest.mark.parametrize("known_sd", [False, True])
def test_collapsed_equals_dense_marginal_one_factor(cols, known_sd):
    rng, g, X, y, sd = _problem(4, known_sd=known_sd)
    st_ = cell_stats(y, X, g, known_sd=sd)
    b, L, s = rng.normal(size=3), _random_chol(rng, len(cols)), 0.7
    noise = sd**2 if known_sd else np.full(len(y), s**2)
    ref = _dense_marginal(g, X, y, b, [(cols, g)], [L], noise, g)
    args = (b, L) if known_sd else (b, L, s)
    got = _pt_eval(lambda b_, L_, *s_: collapsed_group_loglik(st_, [Level(cols, 6)], b_, [L_], *s_),
                   *args)
    np.testing.assert_allclose(got, ref, rtol=1e-9)


@pytest.mark.parametrize("known_sd", [False, True])
def test_collapsed_equals_dense_marginal_nesting_chain(known_sd):
    """Plot within farm within region: intercepts at all levels, a farm slope."""
    rng = np.random.default_rng(5)
    n_region, n_farm, n_plot, n = 3, 7, 16, 120
    farm_region = np.r_[np.arange(n_region), rng.integers(0, n_region, n_farm - n_region)]
    plot_farm = np.r_[np.arange(n_farm), rng.integers(0, n_farm, n_plot - n_farm)]
    plot = np.r_[np.arange(n_plot), rng.integers(0, n_plot, n - n_plot)]
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    y = X @ [3.0, 0.5] + rng.normal(size=n)
    sd = rng.uniform(0.3, 1.5, n) if known_sd else None
    st_ = cell_stats(y, X, plot, known_sd=sd)
    levels = [Level((0,), n_plot, plot_farm), Level((0, 1), n_farm, farm_region),
              Level((0,), n_region)]
    b, s = rng.normal(size=2), 0.6
    chols = [_random_chol(rng, 1), _random_chol(rng, 2), _random_chol(rng, 1)]
    farm, region = plot_farm[plot], farm_region[plot_farm[plot]]
    ref = _dense_marginal(plot, X, y, b, [((0,), plot), ((0, 1), farm), ((0,), region)], chols,
                          sd**2 if known_sd else np.full(n, s**2), region)
    sigma = [] if known_sd else [s]
    got = _pt_eval(lambda b_, L0, L1, L2, *s_: collapsed_group_loglik(st_, levels, b_, [L0, L1, L2],
                                                                      *s_), b, *chols, *sigma)
    np.testing.assert_allclose(got, ref, rtol=1e-9)
    np.testing.assert_allclose(collapsed_loglik(st_, levels, b, chols, *sigma, xp=np), ref.sum(),
                               rtol=1e-9)


def test_collapsed_q1_equals_quadrature_over_the_effect():
    rng, g, X, y, _ = _problem(6, n_rows=30)
    st_ = cell_stats(y, X, g)
    b, tau, s = rng.normal(size=3), 0.8, 1.1
    got = collapsed_group_loglik(st_, [Level((0,), 6)], b, [np.array([[tau]])], s, xp=np)
    for j in range(6):
        m = g == j
        mu = X[m] @ b
        # scipy.integrate.quad over u_j of prod_i N(y_i | mu_i + u, s) N(u | 0, tau);
        # scaled by the integrand's value at the mode so quad works near 1.
        def log_f(u):
            return stats.norm.logpdf(y[m], mu + u, s).sum() + stats.norm.logpdf(u, 0, tau)
        mode = np.sum(y[m] - mu) / (m.sum() + s**2 / tau**2)
        val, _ = integrate.quad(lambda u: np.exp(log_f(u) - log_f(mode)), -np.inf, np.inf,
                                epsabs=0, epsrel=1e-12)
        np.testing.assert_allclose(got[j], np.log(val) + log_f(mode), rtol=1e-9)


def test_collapsed_with_zero_sd_is_the_model_without_the_effect():
    rng, g, X, y, _ = _problem(7)
    st_ = cell_stats(y, X, g)
    b, s = rng.normal(size=3), 0.9
    got = collapsed_loglik(st_, [Level((0, 1), 6)], b, [np.zeros((2, 2))], s, xp=np)
    np.testing.assert_allclose(got, stats.norm.logpdf(y, X @ b, s).sum(), rtol=1e-12)


def test_collapsed_gradient_matches_finite_differences():
    rng, g, X, y, _ = _problem(8)
    st_ = cell_stats(y, X, g)
    L0 = _random_chol(rng, 2)
    pytensor.gradient.verify_grad(
        lambda b_, L_, s_: collapsed_loglik(st_, [Level((0, 2), 6)], b_, [L_], s_),
        [rng.normal(size=3), L0, np.array(0.8)], rng=rng, abs_tol=1e-5, rel_tol=1e-5)
    # One-sided differences with PyTensor's float64 step (1e-7) are off by about 1e-6 on this
    # problem as the BLAS's rounding varies; a wrong gradient is off by far more.


# --- exact conditional draws --------------------------------------------------------

def _dense_conditional(X, y, b, s, blocks):
    """Mean and covariance of all effects of one top group given y (dense algebra).

    ``blocks`` lists (design of the rows for this effect vector, prior covariance).
    """
    Zfull = np.hstack([Z for Z, _ in blocks])
    prior_prec = np.linalg.inv(np.block([[S if i == k else np.zeros((S.shape[0], S2.shape[0]))
                                          for k, (_, S2) in enumerate(blocks)]
                                         for i, (_, S) in enumerate(blocks)]))
    cov = np.linalg.inv(prior_prec + Zfull.T @ Zfull / s**2)
    return cov @ Zfull.T @ (y - X @ b) / s**2, cov


def _assert_draws_match(draws, mean, cov):
    n = draws.shape[0]
    z = (draws.mean(0) - mean) / np.sqrt(np.diag(cov) / n)
    assert np.max(np.abs(z)) < 4.5, z  # Monte Carlo error of a mean, 4.5 standard errors
    # covariance entries: standard error of a sample covariance ~ sqrt((s_ii s_kk + s_ik^2) / n)
    se = np.sqrt((np.outer(np.diag(cov), np.diag(cov)) + cov**2) / n)
    assert np.max(np.abs(np.cov(draws.T) - cov) / se) < 4.5


def test_draws_match_dense_conditional_one_factor():
    rng, g, X, y, _ = _problem(9, n_groups=3, n_rows=12)
    st_ = cell_stats(y, X, g)
    b, L, s, D = rng.normal(size=3), _random_chol(rng, 2), 0.8, 6000
    u = draw_effects(st_, [Level((0, 1), 3)], np.tile(b, (D, 1)), [np.tile(L, (D, 1, 1))],
                     np.full(D, s), rng=np.random.default_rng(10))[0][0]
    for j in range(3):
        m = g == j
        mean, cov = _dense_conditional(X[m], y[m], b, s, [(X[m][:, [0, 1]], L @ L.T)])
        _assert_draws_match(u[:, j, :], mean, cov)


def test_draws_match_dense_conditional_nested():
    rng = np.random.default_rng(11)
    n_farm, n_plot, n = 2, 5, 30
    plot_farm = np.array([0, 0, 1, 1, 1])
    plot = np.r_[np.arange(n_plot), rng.integers(0, n_plot, n - n_plot)]
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    y = X @ [1.0, -1.0] + rng.normal(size=n)
    st_ = cell_stats(y, X, plot)
    levels = [Level((0,), n_plot, plot_farm), Level((0, 1), n_farm)]
    b, s, D = np.array([0.8, -0.7]), 0.7, 6000
    chols = [np.array([[0.6]]), _random_chol(rng, 2)]
    (plots_u, farms_u), ll = draw_effects(st_, levels, np.tile(b, (D, 1)),
                                          [np.tile(c, (D, 1, 1)) for c in chols], np.full(D, s),
                                          rng=np.random.default_rng(12))
    np.testing.assert_allclose(ll[0], collapsed_group_loglik(st_, levels, b, chols, s, xp=np))
    for f in range(n_farm):
        m = plot_farm[plot] == f
        kids = np.flatnonzero(plot_farm == f)
        blocks = [(X[m][:, [0, 1]], chols[1] @ chols[1].T)]
        blocks += [((plot[m] == k)[:, None].astype(float), chols[0] @ chols[0].T) for k in kids]
        mean, cov = _dense_conditional(X[m], y[m], b, s, blocks)
        _assert_draws_match(np.column_stack([farms_u[:, f, :], plots_u[:, kids, 0]]), mean, cov)


# --- eight schools (Rubin 1981; BDA3 Table 5.2) -------------------------------------

@pytest.fixture(scope="module")
def schools():
    return pd.read_csv(DATA / "eight_schools.csv")


def test_eight_schools_marginal_is_closed_form(schools):
    """p(y | mu, tau) = prod_j N(y_j | mu, se_j^2 + tau^2) (BDA3 §5.4; equation number
    quoted from memory as about 5.18)."""
    y, se = schools.effect.to_numpy(float), schools.se.to_numpy(float)
    st_ = cell_stats(y, np.ones((8, 1)), np.arange(8), known_sd=se)
    for mu, tau in [(0.0, 0.1), (7.7, 5.0), (-3.0, 25.0)]:
        got = _pt_eval(lambda b_, L_: collapsed_loglik(st_, [Level((0,), 8)], b_, [L_]),
                       [mu], [[tau]])
        ref = stats.norm.logpdf(y, mu, np.sqrt(se**2 + tau**2)).sum()
        np.testing.assert_allclose(got, ref, rtol=1e-10)


def test_eight_schools_conditional_draws(schools):
    """theta_j | mu, tau, y ~ N((y_j/se_j^2 + mu/tau^2) / (1/se_j^2 + 1/tau^2),
    1 / (1/se_j^2 + 1/tau^2)) (BDA3 §5.4, quoted from memory as about eq. 5.17)."""
    y, se = schools.effect.to_numpy(float), schools.se.to_numpy(float)
    st_ = cell_stats(y, np.ones((8, 1)), np.arange(8), known_sd=se)
    mu, tau, D = 5.0, 8.0, 8000
    u = draw_effects(st_, [Level((0,), 8)], np.full((D, 1), mu), [np.full((D, 1, 1), tau)],
                     rng=np.random.default_rng(13))[0][0][:, :, 0]
    prec = 1 / se**2 + 1 / tau**2
    z = (mu + u.mean(0) - (y / se**2 + mu / tau**2) / prec) / np.sqrt(1 / prec / D)
    assert np.max(np.abs(z)) < 4.5
    np.testing.assert_allclose(u.var(0), 1 / prec, rtol=0.1)  # ~8% = 4.5 x sqrt(2/D)
