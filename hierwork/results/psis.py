"""Pareto-smoothed importance sampling for leave-one-out, vectorised over observations.

PSIS-LOO (Vehtari, Gelman and Gabry 2017, "Practical Bayesian model evaluation
using leave-one-out cross-validation and WAIC", Statistics and Computing 27,
1413-1432; Zhang and Stephens 2009 for the generalised Pareto fit). The
arithmetic follows ArviZ's ``psislw`` and ``loo`` step for step
(``tests/test_psis.py`` checks agreement to rounding error), but works on
every observation at once: ArviZ loops in Python over observations, about
20 s for 73,000 rows, where this takes a second or two. Observations whose
tail is not the regular one (ties at the cut-off, a cut-off below the
smallest positive float, a failed Pareto fit) are passed to ``arviz.psislw``
itself.
"""
from __future__ import annotations

from hierwork import runtime  # noqa: F401  (before ArviZ)

import arviz as az
import numpy as np

__all__ = ["psis_log_weights", "loo_pointwise"]

#: Observations fitted together: bounds the (rows, grid, tail) working array to about 16 MB.
_BLOCK_CELLS = 2_000_000
#: Zhang and Stephens' prior for the scale grid and ArviZ's weak prior on k (k shrunk towards 0.5).
_PRIOR_BS, _PRIOR_K = 3.0, 10.0


def psis_log_weights(log_ratios: np.ndarray, reff: float) -> tuple[np.ndarray, np.ndarray]:
    """Smoothed, normalised log importance weights and Pareto ``k`` of each observation.

    Parameters
    ----------
    log_ratios : ndarray (S, N)
        Log importance ratios, draws first (for LOO: minus the pointwise log-likelihood).
    reff : float
        Relative efficiency of the draws (ESS of the mean per draw).

    Returns
    -------
    log_weights : ndarray (S, N)
    k : ndarray (N,)
    """
    weights, k = _smoothed_rows(np.ascontiguousarray(np.asarray(log_ratios, dtype=float).T), reff)
    return weights.T, k


def loo_pointwise(log_lik: np.ndarray, reff: float) -> tuple[np.ndarray, np.ndarray]:
    """``elpd_loo`` of each observation and its Pareto ``k`` (ArviZ's ``loo_i`` and ``pareto_k``).

    Parameters
    ----------
    log_lik : ndarray (S, N)
        Pointwise log-likelihood, draws first.
    reff : float

    Returns
    -------
    loo_i, k : ndarray (N,) each
    """
    rows = np.ascontiguousarray(np.asarray(log_lik, dtype=float).T)
    weights, k = _smoothed_rows(-rows, reff)
    weights += rows
    return _logsumexp_rows(weights), k


def _smoothed_rows(x: np.ndarray, reff: float) -> tuple[np.ndarray, np.ndarray]:
    """:func:`psis_log_weights` on log ratios ``x`` (N, S), one observation per row (overwritten)."""
    n_obs, n_samples = x.shape
    tail = int(np.ceil(min(n_samples / 5.0, 3 * (n_samples / reff) ** 0.5)))
    x -= x.max(axis=1, keepdims=True)
    # The tail + 1 largest values of each row, ascending (a partition, then a sort of those only).
    top = np.argpartition(x, n_samples - tail - 1, axis=1)[:, n_samples - tail - 1:]
    values = np.take_along_axis(x, top, axis=1)
    within = np.argsort(values, axis=1)
    order = np.take_along_axis(top, within, axis=1)[:, 1:]
    ordered = np.take_along_axis(values, within, axis=1)
    cutoff = np.maximum(ordered[:, 0], np.log(np.finfo(float).tiny))
    # Regular: exactly the ``tail`` largest values lie above the cut-off.
    regular = (ordered[:, 1] > cutoff) if tail > 4 else np.zeros(n_obs, bool)
    ordered = ordered[:, 1:]
    k = np.full(n_obs, np.nan)
    probs = np.arange(0.5, tail) / tail
    step = max(1, _BLOCK_CELLS // (tail * (30 + int(tail ** 0.5))))
    rows = np.flatnonzero(regular)
    for start in range(0, len(rows), step):
        block = rows[start:start + step]
        exp_cut = np.exp(cutoff[block])[:, None]
        k[block], sigma = _gpd_fit(np.exp(ordered[block]) - exp_cut)
        fitted = np.isfinite(k[block]) & (sigma > 0)
        regular[block[~fitted]] = False  # left to ArviZ
        keep = block[fitted]
        smoothed = np.log(_gpd_quantile(probs, k[keep], sigma[fitted]) + exp_cut[fitted])
        part = x[keep]
        np.put_along_axis(part, order[keep], smoothed, axis=1)
        x[keep] = np.minimum(part, 0.0)  # no smoothed weight above the largest raw one
    x -= _logsumexp_rows(x)[:, None]
    irregular = np.flatnonzero(~regular)
    if irregular.size:  # still the raw ratios up to a constant per row, which PSIS does not see
        x[irregular], k[irregular] = az.psislw(x[irregular], reff=reff)
    return x, k


def _logsumexp_rows(x: np.ndarray) -> np.ndarray:
    """``log(sum(exp(x)))`` of each row of a finite-or-minus-infinity (N, S) array."""
    top = x.max(axis=1)
    top = np.where(np.isfinite(top), top, 0.0)
    return top + np.log(np.exp(x - top[:, None]).sum(axis=1))


def _gpd_fit(tail: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Zhang-Stephens empirical-Bayes estimate of the generalised Pareto ``(k, sigma)`` of each row.

    ``tail`` (R, M): each row's exceedances over its cut-off, ascending.
    """
    n = tail.shape[1]
    m = 30 + int(n ** 0.5)
    grid = 1.0 - np.sqrt(m / (np.arange(1, m + 1, dtype=float) - 0.5))
    b = grid[None, :] / (_PRIOR_BS * tail[:, int(n / 4 + 0.5) - 1])[:, None] + 1.0 / tail[:, -1:]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        k_grid = np.log1p(-b[:, :, None] * tail[:, None, :]).mean(axis=2)
        profile = n * (np.log(-(b / k_grid)) - k_grid - 1.0)
        weights = 1.0 / np.exp(profile[:, None, :] - profile[:, :, None]).sum(axis=2)
    weights = np.where(weights >= 10 * np.finfo(float).eps, weights, 0.0)  # negligible weights dropped
    weights = weights / weights.sum(axis=1, keepdims=True)
    b_post = (b * weights).sum(axis=1)
    k_post = np.log1p(-b_post[:, None] * tail).mean(axis=1)
    sigma = -k_post / b_post
    return (n * k_post + _PRIOR_K * 0.5) / (n + _PRIOR_K), sigma


def _gpd_quantile(probs: np.ndarray, k: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """Quantiles ``probs`` (M,) in (0, 1) of generalised Pareto distributions ``(k, sigma)`` (R,): (R, M)."""
    log_survival = np.log1p(-probs)[None, :]
    small = np.abs(k) < np.finfo(float).eps
    safe = np.where(small, 1.0, k)[:, None]
    q = np.where(small[:, None], -log_survival, np.expm1(-safe * log_survival) / safe)
    return q * sigma[:, None]
