"""Normal log-likelihoods from cell statistics: reduced and collapsed.

Both are written once over an array namespace ``xp`` (``numpy`` or
``pytensor.tensor``) so the PyMC model and the exact posterior draws of the
group effects run the same algebra.

Reduced (plain) form: every cell's coefficient vector is ``t_j = b + sum_f
E_f u_f[group_f(j)]`` and its log-likelihood is
``-1/2 (n_j log 2 pi + log|noise| + (y'Wy - 2 t'X'Wy + t'X'WX t) / s^2)``.

Collapsed form for a nesting chain of factors (level 0 is the finest and its
groups are the cells; each level's groups sit inside one group of the next).
The effects of every level are integrated out, leaves first (BDA3 §5.4 and
standard Gaussian identities; see ``fast-path.md``). For one group with
tracked Gram matrix ``T`` of the columns still needed above and the residual
``r = y - X b`` (last row/column), a factor with columns Z and covariance
``S = L L'`` is integrated with

    A = I + L' T_ZZ L,   R = chol(A),   F = R^{-1} L' T_Z.
    T  <-  T - F'F,      log|V|  +=  2 sum log diag R,

which is Woodbury's identity and the matrix determinant lemma in the
Cholesky-of-S form (stable when an SD tends to zero). After the last level
``T_rr = r'V^{-1}r``. Given the effects ``delta`` of its ancestors (in
tracked-column coordinates) a group's effect is exactly

    u = L R^{-T} (F_r - F_C delta + z),   z ~ N(0, I),

the conditional ``N(M^{-1} Z'r, s^2 M^{-1})`` of the design note with
``M = s^2 S^{-1} + Z'Z``.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from hierwork.suffstats import CellStats

_LOG_2PI = float(np.log(2.0 * np.pi))


@dataclass(frozen=True)
class Level:
    """One factor of a nesting chain.

    Parameters
    ----------
    cols : tuple of int
        Columns of the population design whose coefficients vary by this
        factor (q of them).
    n_groups : int
        Number of groups of this factor.
    parent : (n_groups,) int array, optional
        Group of the next (coarser) level containing each group; None for
        the top level.
    """

    cols: tuple[int, ...]
    n_groups: int
    parent: np.ndarray | None = field(default=None, compare=False)

    @property
    def q(self) -> int:
        return len(self.cols)


@dataclass(frozen=True)
class _Step:
    """Index bookkeeping of one level of the upward pass."""

    zpos: np.ndarray   # this level's columns inside the tracked ones
    keep: np.ndarray   # tracked positions passed upwards (r is last)
    tracked: tuple[int, ...]


def _layout(levels: list[Level], n_cells: int) -> list[_Step]:
    if not levels:
        raise ValueError("a nesting chain needs at least one level")
    if levels[0].n_groups != n_cells:
        raise ValueError(f"level 0 has {levels[0].n_groups} groups but the statistics have "
                         f"{n_cells} cells; compute the statistics by the finest factor")
    for lower, upper in zip(levels[:-1], levels[1:]):
        parent = np.asarray(lower.parent)
        if lower.parent is None or parent.shape != (lower.n_groups,) or (
                parent.size and (parent.min() < 0 or parent.max() >= upper.n_groups)):
            raise ValueError("every level but the top needs a parent index into the next level")
    if levels[-1].parent is not None:
        raise ValueError("the top level has no parent")
    steps = []
    for k, level in enumerate(levels):
        tracked = tuple(sorted(set().union(*(lv.cols for lv in levels[k:]))))
        above = set().union(*(lv.cols for lv in levels[k + 1:])) if k + 1 < len(levels) else set()
        pos = {c: i for i, c in enumerate(tracked)}
        keep = [pos[c] for c in tracked if c in above] + [len(tracked)]
        steps.append(_Step(zpos=np.array([pos[c] for c in level.cols]),
                           keep=np.array(keep), tracked=tracked))
    return steps


def _cholesky(xp, A, q):
    """Lower Cholesky factor of a batch of small SPD matrices, unrolled.

    ``A`` is (J, q, q); returns nested lists ``R[i][k]`` (k <= i) of (J,)
    entries. Unrolled over the static q so it vectorises over groups in both
    numpy and PyTensor (with gradients) without a loop over groups.
    """
    R = [[None] * q for _ in range(q)]
    for i in range(q):
        for k in range(i + 1):
            s = A[:, i, k]
            for m in range(k):
                s = s - R[i][m] * R[k][m]
            R[i][k] = xp.sqrt(s) if i == k else s / R[k][k]
    return R


def _forward_solve(xp, R, B):
    """``R^{-1} B`` for lower-triangular ``R`` (nested lists) and B (J, q, c)."""
    q = len(R)
    rows = []
    for i in range(q):
        s = B[:, i, :]
        for m in range(i):
            s = s - R[i][m][:, None] * rows[m]
        rows.append(s / R[i][i][:, None])
    return xp.stack(rows, axis=1)


def _segment_sum(xp, values, index, n_out):
    """Sum ``values`` (leading axis) into ``n_out`` slots given by ``index``."""
    if xp is np:
        out = np.zeros((n_out,) + values.shape[1:])
        np.add.at(out, index, values)
        return out
    return xp.inc_subtensor(xp.zeros((n_out,) + tuple(values.shape[1:]))[index], values)


def _leaf_gram(xp, stats: CellStats, b, cols, sigma):
    """Tracked Gram ``[X_C, r]' W [X_C, r] / s^2`` per cell, and n log 2 pi + log|noise|."""
    bt = stats.shifted(b)                                  # (J, p)
    xtx_b = (stats.xtx * bt[:, None, :]).sum(axis=-1)      # (J, p)
    rr = stats.yty - 2.0 * (bt * stats.xty).sum(axis=-1) + (bt * xtx_b).sum(axis=-1)
    cols = list(cols)
    Cr = stats.xty[:, cols] - xtx_b[:, cols]               # (J, c)
    CC = stats.xtx[:, cols][:, :, cols]                    # (J, c, c) constant
    top = xp.concatenate([CC, Cr[:, :, None]], axis=2)
    bottom = xp.concatenate([Cr[:, None, :], rr[:, None, None]], axis=2)
    T = xp.concatenate([top, bottom], axis=1)
    acc = stats.n * _LOG_2PI
    if stats.known_sd:
        return T, acc + stats.log_noise_var
    return T / sigma**2, acc + stats.n * xp.log(sigma**2)


def _upward(xp, stats, levels, steps, b, chols, sigma, keep_factors=False):
    """Integrate the chain leaves up; per-top-group log-likelihood (+ factors)."""
    T, acc = _leaf_gram(xp, stats, b, steps[0].tracked, sigma)
    factors = []
    for k, (level, step, L) in enumerate(zip(levels, steps, chols)):
        if k > 0:
            T = _segment_sum(xp, T, levels[k - 1].parent, level.n_groups)
            acc = _segment_sum(xp, acc, levels[k - 1].parent, level.n_groups)
        q = level.q
        LtB = (L.T[None, :, :, None] * T[:, step.zpos, :][:, None, :, :]).sum(axis=2)       # L'T_Z
        A = (LtB[:, :, step.zpos][:, :, :, None] * L[None, None, :, :]).sum(axis=2)
        A = A + np.eye(q)[None]
        R = _cholesky(xp, A, q)
        F = _forward_solve(xp, R, LtB)                                            # (J, q, c+1)
        for i in range(q):
            acc = acc + 2.0 * xp.log(R[i][i])
        Fk = F[:, :, step.keep]
        T = T[:, step.keep][:, :, step.keep] - (Fk[:, :, :, None] * Fk[:, :, None, :]).sum(axis=1)
        if keep_factors:
            factors.append((R, F))
    return -0.5 * (acc + T[:, 0, 0]), factors


def collapsed_group_loglik(stats: CellStats, levels: list[Level], b, chols, sigma=None, xp=None):
    """Log-likelihood of each top-level group with every level's effects integrated out.

    Parameters
    ----------
    stats : CellStats
        Statistics by the finest level's groups (cells == level-0 groups).
    levels : list of Level
        The nesting chain, finest first.
    b : (p,) tensor or array
        Population coefficients (original scale).
    chols : list of (q_k, q_k) tensors or arrays
        Lower Cholesky factor of each level's effect covariance,
        ``diag(sd) @ corr_chol``.
    sigma : scalar tensor or float, optional
        Residual SD; omitted when the statistics carry known SDs.
    xp : module, optional
        ``pytensor.tensor`` (default) or ``numpy``.

    Returns
    -------
    (G_top,) tensor or array.
    """
    xp = _namespace(xp)
    _check_sigma(stats, sigma)
    ll, _ = _upward(xp, stats, levels, _layout(levels, stats.n_cells), _f64(xp, b),
                    [_f64(xp, L) for L in chols], _f64(xp, sigma))
    return ll


def collapsed_loglik(stats: CellStats, levels: list[Level], b, chols, sigma=None, xp=None):
    """Total collapsed log-likelihood; see :func:`collapsed_group_loglik`."""
    return collapsed_group_loglik(stats, levels, b, chols, sigma, xp).sum()


def reduced_loglik(stats: CellStats, b, effects, sigma=None, xp=None):
    """Per-row normal log-likelihood summed, from cell statistics.

    Exact for any model whose coefficients are constant within a cell
    (one factor, nesting, crossed factors with cells as group combinations).

    Parameters
    ----------
    stats : CellStats
    b : (p,) tensor or array
        Population coefficients.
    effects : list of (u, cols, cell_group)
        ``u`` (G_f, q_f) effects of factor f, ``cols`` their design columns,
        ``cell_group`` (J,) int the factor's group of every cell.
    sigma : scalar, optional
        Residual SD; omitted with known SDs.
    xp : module, optional
        ``pytensor.tensor`` (default) or ``numpy``.

    Returns
    -------
    (J,) per-cell log-likelihood.
    """
    xp = _namespace(xp)
    _check_sigma(stats, sigma)
    p = stats.n_terms
    sigma = _f64(xp, sigma)
    t = _f64(xp, b)[None, :]
    for u, cols, cell_group in effects:
        u = _f64(xp, u)
        embed = np.zeros((len(cols), p))
        embed[np.arange(len(cols)), list(cols)] = 1.0
        t = t + (u[np.asarray(cell_group)][:, :, None] * embed[None]).sum(axis=1)
    tt = stats.shifted(t)
    rss = (stats.yty - 2.0 * (tt * stats.xty).sum(axis=-1)
           + (tt * (stats.xtx * tt[:, None, :]).sum(axis=-1)).sum(axis=-1))
    acc = stats.n * _LOG_2PI
    if stats.known_sd:
        return -0.5 * (acc + stats.log_noise_var + rss)
    return -0.5 * (acc + stats.n * xp.log(sigma**2) + rss / sigma**2)


def draw_effects(stats: CellStats, levels: list[Level], b, chols, sigma=None,
                 rng: np.random.Generator | None = None) -> list[np.ndarray]:
    """Exact draws of every level's group effects given each posterior draw.

    Parameters
    ----------
    stats, levels
        As for :func:`collapsed_loglik`.
    b : (D, p) array
        Posterior draws of the population coefficients.
    chols : list of (D, q_k, q_k) arrays
        Draws of each level's covariance Cholesky factor.
    sigma : (D,) array, optional
        Draws of the residual SD (omit with known SDs).
    rng : numpy.random.Generator
        Seeded by the caller.

    Returns
    -------
    effects : list of (D, G_k, q_k) arrays
        Finest level first: the effects (offsets from the population
        coefficients, original units).
    group_loglik : (D, G_top) array
        Collapsed log-likelihood of each top-level group at each draw (for
        leave-one-group-out comparisons).
    """
    if rng is None:
        raise ValueError("pass a seeded numpy Generator")
    _check_sigma(stats, sigma)
    steps = _layout(levels, stats.n_cells)
    b = np.asarray(b, float)
    n_draws, p = b.shape
    out = [np.empty((n_draws, lv.n_groups, lv.q)) for lv in levels]
    group_ll = np.empty((n_draws, levels[-1].n_groups))
    for d in range(n_draws):
        L_d = [np.asarray(c[d], float) for c in chols]
        group_ll[d], factors = _upward(np, stats, levels, steps, b[d], L_d,
                             None if sigma is None else float(sigma[d]), keep_factors=True)
        above = np.zeros((levels[-1].n_groups, p))          # ancestors' effects, by column
        for k in range(len(levels) - 1, -1, -1):
            level, step, (R, F) = levels[k], steps[k], factors[k]
            delta = above[:, list(step.tracked)]
            v = F[:, :, -1] - (F[:, :, :-1] * delta[:, None, :]).sum(axis=-1)
            v = v + rng.standard_normal(v.shape)
            w = _backward_solve(R, v)
            u = w @ L_d[k].T
            out[k][d] = u
            above[:, list(level.cols)] += u
            if k > 0:
                above = above[levels[k - 1].parent]
    return out, group_ll


def _backward_solve(R, v):
    """``R^{-T} v`` for lower-triangular ``R`` (nested lists of (J,)) and v (J, q)."""
    q = len(R)
    w = [None] * q
    for i in range(q - 1, -1, -1):
        s = v[:, i]
        for m in range(i + 1, q):
            s = s - R[m][i] * w[m]
        w[i] = s / R[i][i]
    return np.stack(w, axis=1)


def _f64(xp, x):
    """Compute in double precision whatever the inputs' dtype (PyTensor keeps float32 constants)."""
    return x if xp is np or x is None else xp.cast(x, "float64")


def _namespace(xp):
    if xp is None:
        import pytensor.tensor as pt
        return pt
    return xp


def _check_sigma(stats: CellStats, sigma):
    if stats.known_sd and sigma is not None:
        raise ValueError("known per-row SDs replace the residual SD; do not pass sigma")
    if not stats.known_sd and sigma is None:
        raise ValueError("a residual SD is needed when per-row SDs are not known")
