"""Rank-normalised split R-hat, bulk ESS and tail ESS, vectorised over parameters.

The definitions are those of Vehtari, Gelman, Simpson, Carpenter and Bürkner
(2021), "Rank-normalization, folding, and localization: an improved R-hat",
Bayesian Analysis 16, 667-718, with the autocorrelation estimate truncated by
Geyer's (1992) initial monotone sequence. The arithmetic follows ArviZ's
implementation step for step (``tests/test_convergence.py`` checks agreement to
rounding error), but works on every parameter at once: ArviZ loops in Python
over parameters, which costs about a minute for the 20,000 group effects of a
large fit, where this takes a second or two.

:func:`diagnose` takes draws shaped ``(chains, draws, K)`` and returns three
``(K,)`` arrays. A parameter with a non-finite draw gets NaN; a constant one
gets NaN R-hat and the full draw count as its ESS (as in ArviZ).
"""
from __future__ import annotations

import os

import numpy as np
from scipy import fft
from scipy.fft import next_fast_len
from scipy.special import ndtri

__all__ = ["diagnose", "ess_mean"]

#: Offset of the rank back-transformation (Blom 1958), as in the paper.
_BLOM = 3.0 / 8.0
#: Tail probabilities whose quantile indicators define the tail ESS (the paper's 5% and 95%).
_TAIL = (0.05, 0.95)
#: Threads for the FFTs (the gate runs after sampling, when the cores are free).
_WORKERS = os.cpu_count() or 1
#: Parameters processed together: bounds the working memory to a few hundred MB.
_BLOCK_CELLS = 2_000_000


def _split(x: np.ndarray) -> np.ndarray:
    """(K, C, N) -> (K, 2C, N // 2): each chain's first and last halves as separate chains."""
    half = x.shape[2] // 2
    return np.concatenate([x[:, :, :half], x[:, :, x.shape[2] - half:]], axis=1)


def _z_scale(x: np.ndarray) -> np.ndarray:
    """Normal scores of the pooled ranks of each parameter's draws, (K, C, N) -> (K, C, N).

    Rank r (1-based; ties get their average rank, as ``scipy.stats.rankdata``)
    maps to ``ndtri((r - 3/8) / (m + 1/4))`` for m draws. Average ranks are
    multiples of 1/2, so the normal scores come from a table of 2m + 1 values.
    """
    k, c, n = x.shape
    m = c * n
    rows = x.reshape(k, m)
    order = np.argsort(rows, axis=1)
    ordered = np.take_along_axis(rows, order, axis=1)
    starts_here = np.ones((k, m), bool)
    starts_here[:, 1:] = ordered[:, 1:] != ordered[:, :-1]
    flat = starts_here.ravel()
    if flat.all():  # no ties: sorted position p has rank p + 1
        doubled = np.broadcast_to(2 * np.arange(1, m + 1), (k, m))
    else:
        group = np.cumsum(flat) - 1  # tie groups never straddle rows: each row starts a group
        starts = np.flatnonzero(flat)
        ends = np.append(starts[1:], flat.size)
        doubled = (2 * (starts % m) + ends - starts + 1)[group].reshape(k, m)  # 2 x average rank
    table = ndtri((np.arange(2 * m + 1) / 2.0 - _BLOM) / (m - 2 * _BLOM + 1))
    z = np.empty((k, m))
    np.put_along_axis(z, order, table[doubled], axis=1)
    return z.reshape(x.shape)


def _rhat_plain(x: np.ndarray) -> np.ndarray:
    """Classic potential scale reduction of (K, C, N) chains."""
    n = x.shape[2]
    between = n * np.var(x.mean(axis=2), axis=1, ddof=1)
    within = np.var(x, axis=2, ddof=1).mean(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.sqrt((between / within + n - 1) / n)


def _mean_autocov(x: np.ndarray) -> np.ndarray:
    """(K, C, N) -> (K, N): autocovariance at every lag (biased 1/N), averaged over chains.

    Averaging the power spectra before the inverse FFT gives the same numbers as
    averaging the chains' autocovariances, with one inverse transform per parameter.
    """
    n = x.shape[-1]
    m = next_fast_len(2 * n)
    centred = x - x.mean(axis=-1, keepdims=True)
    spectrum = fft.rfft(centred, n=m, axis=-1, workers=_WORKERS)
    power = (spectrum.real ** 2 + spectrum.imag ** 2).mean(axis=1)
    return fft.irfft(power, n=m, axis=-1, workers=_WORKERS)[:, :n] / n


def _ess(x: np.ndarray) -> np.ndarray:
    """Effective sample size of (K, C, N) chains, Geyer's initial monotone sequence."""
    k, c, n = x.shape
    total = c * n
    acov = _mean_autocov(x)
    mean_var = acov[:, 0] * n / (n - 1.0)
    var_plus = mean_var * (n - 1.0) / n
    if c > 1:
        var_plus = var_plus + np.var(x.mean(axis=2), axis=1, ddof=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = 1.0 - (mean_var[:, None] - acov) / var_plus[:, None]
    rho[:, 0] = 1.0
    # Pair sums Q_j = rho[2j] + rho[2j+1]. Geyer's positive-sequence scan, step i,
    # runs while Q_i > 0 and i < bound, and computes Q_{i+1}; it keeps L pairs
    # Q_0 .. Q_{L-1} (L = steps run), then the monotone pass takes their running minimum.
    n_pairs = n // 2
    pairs = rho[:, : 2 * n_pairs].reshape(k, n_pairs, 2).sum(axis=2)
    bound = max(0, (n - 3) // 2)
    stop = np.concatenate([pairs[:, :bound] <= 0, np.ones((k, 1), bool)], axis=1)
    kept = stop.argmax(axis=1)  # first stop, or ``bound`` if none
    monotone = np.minimum.accumulate(pairs[:, : max(bound, 1)], axis=1)
    cum = np.concatenate([np.zeros((k, 1)), np.cumsum(monotone, axis=1)], axis=1)
    rows = np.arange(k)
    summed = cum[rows, kept]  # sum of the monotone pair sums Q'_0 .. Q'_{L-1}
    last_even = rho[rows, np.minimum(2 * kept, n - 1)]
    last_sum = pairs[rows, np.minimum(kept, n_pairs - 1)]
    scanned_ok = (kept >= 1) & (last_sum >= 0)  # last computed pair stored by the scan
    tail_term = np.where(kept == 0, 1.0, np.where(scanned_ok | (last_even > 0), last_even, 0.0))
    tau = -1.0 + 2.0 * summed + tail_term
    tau = np.maximum(tau, 1.0 / np.log10(total))
    ess = total / tau
    ess[np.isnan(rho).any(axis=1)] = np.nan
    return ess


def _constant(x: np.ndarray) -> np.ndarray:
    return (x.max(axis=(1, 2)) - x.min(axis=(1, 2))) < np.finfo(float).resolution


def _ess_of(x: np.ndarray) -> np.ndarray:
    """ESS with the constant-parameter rule (a constant has the full draw count)."""
    out = np.full(x.shape[0], float(x.shape[1] * x.shape[2]))
    varying = ~_constant(x)
    if varying.any():
        with np.errstate(divide="ignore", invalid="ignore"):
            out[varying] = _ess(x[varying])
    return out


def diagnose(draws) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rank-normalised split R-hat, bulk ESS and tail ESS of every parameter.

    R-hat is the larger of the bulk and folded-tail values; bulk ESS is the ESS
    of the rank-normalised split chains; tail ESS the smaller ESS of the 5% and
    95% quantile indicators.

    Parameters
    ----------
    draws : array (chains, draws, K)

    Returns
    -------
    rhat, ess_bulk, ess_tail : ndarray (K,) each
        NaN where a parameter has a non-finite draw or fewer than 4 draws
        (R-hat also: fewer than 2 chains, or no variation).
    """
    out = _by_block(draws, _diagnose, 3)
    if np.shape(draws)[0] < 2:
        out[0] = np.nan
    return out[0], out[1], out[2]


def ess_mean(draws) -> np.ndarray:
    """ESS of the mean (split chains, no rank normalisation), as ArviZ's ``ess(method="mean")``.

    Parameters
    ----------
    draws : array (chains, draws, K)

    Returns
    -------
    ndarray (K,)
    """
    return _by_block(draws, lambda x: _ess_of(_split(x))[None], 1)[0]


def _by_block(draws, fn, rows: int) -> np.ndarray:
    """(rows, K): ``fn`` over blocks of parameters with finite draws; NaN elsewhere or if under 4 draws."""
    draws = np.asarray(draws, dtype=float)
    chains, n_draws, k = draws.shape
    out = np.full((rows, k), np.nan)
    if n_draws < 4:
        return out
    width = max(1, _BLOCK_CELLS // max(1, chains * n_draws))
    for start in range(0, k, width):
        x = np.moveaxis(draws[:, :, start:start + width], 2, 0)
        ok = np.isfinite(x).all(axis=(1, 2))
        if ok.any():
            out[:, start:start + width][:, ok] = fn(x[ok])
    return out


def _diagnose(x: np.ndarray) -> np.ndarray:
    """(3, K) R-hat, bulk ESS, tail ESS of finite (K, C, N) draws."""
    split = _split(x)
    z = _z_scale(split)
    median = np.median(split.reshape(len(split), -1), axis=1)
    bulk = _rhat_plain(z)
    tail = _rhat_plain(_z_scale(np.abs(split - median[:, None, None])))
    with np.errstate(invalid="ignore"):
        rhat = np.where(tail > bulk, tail, bulk)  # max(bulk, tail) as ArviZ takes it, NaN included
    quantiles = np.quantile(x.reshape(len(x), -1), _TAIL, axis=1)  # R's type 7, as ArviZ
    ess_tail = np.minimum(*[_ess_of(_split((x <= q[:, None, None]).astype(float))) for q in quantiles])
    return np.stack([rhat, _ess_of(z), ess_tail])
