"""The vectorised convergence diagnostics against ArviZ, a general-purpose reference library.

Reference: ArviZ 0.23 ``az.rhat`` (method "rank"), ``az.ess`` (methods "bulk"
and "tail"), which implement Vehtari et al. (2021), Bayesian Analysis 16,
667-718. hierwork's :func:`hierwork.inference.convergence.diagnose` must give the same
numbers to rounding error on every kind of input the gate meets: mixing and
sticky chains, chains that disagree, ties, constants, non-finite draws, odd and
tiny draw counts, one chain.
"""
from __future__ import annotations

import warnings

import arviz as az
import numpy as np
import pytest

from hierwork.inference.convergence import diagnose, ess_mean
from hierwork.results.loo import relative_efficiency


def _ar1(rng, chains, draws, k, phi):
    x = np.empty((chains, draws, k))
    x[:, 0] = rng.normal(size=(chains, k))
    for t in range(1, draws):
        x[:, t] = phi * x[:, t - 1] + rng.normal(size=(chains, k))
    return x


def _arviz(x):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        columns = [x[:, :, j] for j in range(x.shape[2])]
        return np.array([[float(az.rhat(c)) for c in columns],
                         [float(az.ess(c, method="bulk")) for c in columns],
                         [float(az.ess(c, method="tail")) for c in columns]])


@pytest.mark.parametrize("chains,draws", [(2, 1000), (4, 250), (1, 100), (3, 7), (2, 8), (2, 9),
                                          (2, 4), (4, 1001), (2, 3)])
@pytest.mark.parametrize("phi", [0.0, 0.5, 0.95, -0.6, 0.999])
def test_matches_arviz(chains, draws, phi):
    rng = np.random.default_rng([chains, draws, int(1000 * phi) % 997])
    x = _ar1(rng, chains, draws, 7, phi)
    x[:, :, 1] += 2.0 * np.arange(chains)[:, None]  # chains that disagree
    x[:, :, 2] = np.round(x[:, :, 2])  # ties
    x[:, :, 3] = 1.5  # constant
    x[0, 0, 4] = np.nan  # a non-finite draw
    x[:, :, 5] = x[:, :, 5] > 0.8  # a 0/1 indicator
    ours, ref = np.stack(diagnose(x)), _arviz(x)
    assert np.array_equal(np.isnan(ours), np.isnan(ref))
    both = np.isfinite(ref)
    np.testing.assert_allclose(ours[both], ref[both], rtol=1e-9, atol=1e-9)
    assert np.array_equal(ours[~both & ~np.isnan(ref)], ref[~both & ~np.isnan(ref)])  # +-inf alike


def test_blocks_do_not_change_results(monkeypatch):
    """Many parameters are processed in blocks; the block size must not matter."""
    import hierwork.inference.convergence as convergence

    x = _ar1(np.random.default_rng(3), 2, 200, 50, 0.7)
    whole = np.stack(diagnose(x))
    monkeypatch.setattr(convergence, "_BLOCK_CELLS", 400 * 7)  # 7 parameters per block
    np.testing.assert_array_equal(np.stack(diagnose(x)), whole)


def test_flags_what_it_should():
    """A stuck chain gives a large R-hat; strong autocorrelation gives a small ESS."""
    rng = np.random.default_rng(4)
    x = _ar1(rng, 4, 500, 2, 0.0)
    x[0, :, 0] += 3.0
    x[:, :, 1] = _ar1(rng, 4, 500, 1, 0.99)[:, :, 0]
    r_hat, bulk, tail = diagnose(x)
    assert r_hat[0] > 1.1
    assert bulk[1] < 100 and tail[1] < 100


def test_ess_mean_and_relative_efficiency_match_arviz():
    """``ess(method="mean")`` per element, and the r_eff ArviZ's ``loo`` derives from it."""
    rng = np.random.default_rng(5)
    x = _ar1(rng, 3, 300, 6, 0.8)
    x[:, :, 2] = 0.25  # constant: full draw count in both
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = np.array([float(az.ess(x[:, :, j], method="mean")) for j in range(6)])
    np.testing.assert_allclose(ess_mean(x), ref, rtol=1e-9)

    idata = az.from_dict(posterior={"a": x[:, :, :2], "b": x[:, :, 2:]},
                         log_likelihood={"y": rng.normal(size=(3, 300, 4))})
    ours = az.loo(idata, reff=relative_efficiency(idata.posterior))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        theirs = az.loo(idata)
    assert ours.elpd_loo == pytest.approx(theirs.elpd_loo, rel=1e-12)
    assert ours.p_loo == pytest.approx(theirs.p_loo, rel=1e-9)
