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
standard Gaussian identities; see ``fast-path.md``). Each group carries the
noise-weighted products of the residual ``r = y - X b`` and of the design
columns still needed above it: ``rr = r'V^{-1}r``, ``Cr = X_C'V^{-1}r``,
``CC = X_C'V^{-1}X_C`` (at the leaves ``V`` is the noise covariance). A
factor with columns Z and covariance ``S = L L'`` is integrated with

    A = I + L' CC_ZZ L,   R = chol(A),   e = R^{-1} L' Cr_Z,   F = R^{-1} L' CC_ZK,
    rr <- rr - e'e,   Cr_K <- Cr_K - F'e,   CC_KK <- CC_KK - F'F,   log|V| += 2 sum log diag R,

(K: the ancestors' columns), which is Woodbury's identity and the matrix
determinant lemma in the Cholesky-of-S form (stable when an SD tends to
zero); children's products are then summed into their parent. After the top
level, ``rr`` is the whole quadratic form. Given its ancestors' effects
``delta`` (on the columns K) a group's effect is exactly

    u = L R^{-T} (e - F delta + z),   z ~ N(0, I),

the conditional ``N(M^{-1} Z'r, s^2 M^{-1})`` of the design note with
``M = s^2 S^{-1} + Z'Z``.
"""
from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from hierwork.model.cells import CellStats

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

    zpos: tuple        # this level's columns, as positions among the tracked ones
    keep: tuple        # tracked positions passed upwards (the ancestors' columns)
    tracked: tuple     # design columns tracked at this level (own and ancestors')


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
        steps.append(_Step(zpos=tuple(tracked.index(c) for c in level.cols),
                           keep=tuple(i for i, c in enumerate(tracked) if c in above),
                           tracked=tracked))
    return steps


# Small matrices are held as nested lists of (J,) vectors (one per entry), so
# every operation below is elementwise over groups: PyTensor fuses it into a few
# loops with cheap gradients, and numpy runs it vectorised, with no loop over
# groups. Symmetric matrices are dicts keyed by (i, k) with i <= k.

def _sym(S, i, k):
    return S[(i, k) if i <= k else (k, i)]


def _cholesky(xp, A, q):
    """Lower Cholesky factor ``R[i][k]`` (k <= i) of symmetric ``A`` (dict of entries)."""
    R = [[None] * q for _ in range(q)]
    for i in range(q):
        for k in range(i + 1):
            s = _sym(A, i, k)
            for m in range(k):
                s = s - R[i][m] * R[k][m]
            R[i][k] = xp.sqrt(s) if i == k else s / R[k][k]
    return R


def _forward(R, v):
    """``R^{-1} v`` for lower-triangular ``R`` and a list ``v`` of entries."""
    out = []
    for i in range(len(R)):
        s = v[i]
        for m in range(i):
            s = s - R[i][m] * out[m]
        out.append(s / R[i][i])
    return out


def _backward(R, v):
    """``R^{-T} v`` for lower-triangular ``R`` and a list ``v`` of entries."""
    q = len(R)
    w = [None] * q
    for i in range(q - 1, -1, -1):
        s = v[i]
        for m in range(i + 1, q):
            s = s - R[m][i] * w[m]
        w[i] = s / R[i][i]
    return w


def _segment_sum(xp, columns, index, n_out):
    """Sum each (J,) column into ``n_out`` groups given by ``index``.

    One vector scatter per column: PyTensor's scatter-add has C code for
    vectors only (a matrix falls back to numpy's ``add.at`` in Python).
    """
    if xp is np:
        return [np.bincount(index, weights=c, minlength=n_out) for c in columns]
    return [xp.inc_subtensor(xp.zeros(n_out)[index], c) for c in columns]


def _matvec(xp, A, v):
    """``A @ v`` for a constant (J, k) matrix; numpy's BLAS path is slow on tall
    thin operands (and when its threads compete with the chains), einsum is not."""
    return np.einsum("jk,k->j", A, v) if xp is np else xp.dot(A, v)


def _leaf(xp, stats: CellStats, b, cols, sigma):
    """Residual and tracked-column products per cell, scaled by the noise.

    Returns ``rr = r'Wr / s^2``, ``Cr[a] = X_a'Wr / s^2``, ``CC[(a, c)] =
    X_a'WX_c / s^2`` for tracked columns, and ``n log 2 pi + log|noise|``.
    """
    # Split b into the intercept, shifted per cell (d = b_0 - centre_j), and the rest,
    # so products stay free of cancellation and cost a few matrix-vector products.
    d = b[0] - stats.centre
    xtx, xty = stats.xtx, stats.xty
    rr = stats.yty - 2.0 * d * xty[:, 0] + d * d * xtx[:, 0, 0]
    xtx_b = [xtx[:, c, 0] * d for c in cols]                   # (X'X b~)_c, completed below
    if stats.n_terms > 1:
        rest = b[1:]
        p1 = stats.n_terms - 1
        outer = (rest[:, None] * rest[None, :]).reshape((-1,))
        rr = (rr + _matvec(xp, xtx[:, 1:, 1:].reshape(-1, p1 * p1), outer)
              + 2.0 * d * _matvec(xp, xtx[:, 0, 1:], rest) - 2.0 * _matvec(xp, xty[:, 1:], rest))
        xtx_b = [v + _matvec(xp, xtx[:, c, 1:], rest) for v, c in zip(xtx_b, cols)]
    Cr = [xty[:, c] - v for c, v in zip(cols, xtx_b)]
    CC = {(i, k): stats.xtx[:, cols[i], cols[k]] for i in range(len(cols)) for k in range(i, len(cols))}
    return _scaled(xp, rr, Cr, CC, stats.n, stats.log_noise_var, sigma)


def _scaled(xp, rr, Cr, CC, n, log_noise_var, sigma):
    """Products divided by the residual variance (unless SDs are known), with ``n log 2 pi + log|noise|``."""
    acc = n * _LOG_2PI
    if log_noise_var is not None:
        return rr, Cr, CC, acc + log_noise_var
    inv = 1.0 / sigma**2
    return (rr * inv, [v * inv for v in Cr], {key: v * inv for key, v in CC.items()},
            acc + n * xp.log(sigma**2))


def _integrate(xp, rr, Cr, CC, acc, step: _Step, L):
    """Integrate one level's effects out of every group (see module docstring).

    Returns the products passed upwards and, for the draws, ``(R, e, F)``:
    ``e = R^{-1} L'Z'r`` and ``F[i][k] = (R^{-1} L'Z'X_keep)[i, k]``.
    """
    z, keep, q = step.zpos, step.keep, len(step.zpos)
    Lt = [[L[a, i] for a in range(q)] for i in range(q)]             # Lt[i][a] = L[a, i]
    # L'Z'r and L'Z'Z L (L lower triangular: L[a, i] = 0 for a < i).
    c = [sum(Lt[i][a] * Cr[z[a]] for a in range(i, q)) for i in range(q)]
    LtZZ = [[sum(Lt[i][a] * _sym(CC, z[a], z[m]) for a in range(i, q)) for m in range(q)]
            for i in range(q)]
    A = {(i, k): sum(LtZZ[i][m] * L[m, k] for m in range(k, q)) + (1.0 if i == k else 0.0)
         for i in range(q) for k in range(i, q)}
    R = _cholesky(xp, A, q)
    e = _forward(R, c)
    acc = acc + sum(2.0 * xp.log(R[i][i]) for i in range(q))
    rr = rr - sum(v * v for v in e)
    F = []
    if keep:
        LtZK = [[sum(Lt[i][a] * _sym(CC, z[a], kk) for a in range(i, q)) for kk in keep]
                for i in range(q)]
        by_col = [_forward(R, [LtZK[i][k] for i in range(q)]) for k in range(len(keep))]
        F = [[by_col[k][i] for k in range(len(keep))] for i in range(q)]
        Cr = [Cr[kk] - sum(F[i][k] * e[i] for i in range(q)) for k, kk in enumerate(keep)]
        CC = {(k, m): _sym(CC, keep[k], keep[m]) - sum(F[i][k] * F[i][m] for i in range(q))
              for k in range(len(keep)) for m in range(k, len(keep))}
    return rr, Cr, CC, acc, (R, e, F)


def _upward(xp, stats, levels, steps, b, chols, sigma, keep_factors=False):
    """Integrate the chain leaves up; per-top-group log-likelihood (+ factors)."""
    rr, Cr, CC, acc = _leaf(xp, stats, b, steps[0].tracked, sigma)
    factors = []
    for k, (level, step, L) in enumerate(zip(levels, steps, chols)):
        if k > 0:
            keys = list(CC)
            summed = _segment_sum(xp, [rr, acc] + Cr + [CC[key] for key in keys],
                                  levels[k - 1].parent, level.n_groups)
            rr, acc, Cr = summed[0], summed[1], summed[2:2 + len(Cr)]
            CC = dict(zip(keys, summed[2 + len(Cr):]))
        rr, Cr, CC, acc, factor = _integrate(xp, rr, Cr, CC, acc, step, L)
        if keep_factors:
            factors.append(factor)
    return -0.5 * (acc + rr), factors


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
    sigma = _f64(xp, sigma)
    tt = stats.shifted(xp.stack(cell_coefficients(xp, stats, b, effects), axis=1))
    rss = (stats.yty - 2.0 * (tt * stats.xty).sum(axis=-1)
           + (tt * (stats.xtx * tt[:, None, :]).sum(axis=-1)).sum(axis=-1))
    acc = stats.n * _LOG_2PI
    if stats.known_sd:
        return -0.5 * (acc + stats.log_noise_var + rss)
    return -0.5 * (acc + stats.n * xp.log(sigma**2) + rss / sigma**2)


def cell_coefficients(xp, stats: CellStats, b, effects) -> list:
    """The coefficients of every cell, one (J,) vector per design column: ``b`` plus each factor's effects.

    Gathered column by column: the gradient of a vector gather is a vector
    scatter-add, which PyTensor runs in C (a matrix one runs in Python).
    """
    b = _f64(xp, b)
    zeros = np.zeros(len(stats.n))
    tt = [b[a] + zeros for a in range(stats.n_terms)]
    for u, cols, cell_group in effects:
        u = _f64(xp, u)
        for k, a in enumerate(cols):
            tt[a] = tt[a] + u[:, k][np.asarray(cell_group)]
    return tt


@dataclass(frozen=True)
class Integrated:
    """The one factor the partially collapsed likelihood integrates out.

    Parameters
    ----------
    cols : tuple of int
        Design columns its effects multiply.
    cell_group : (J,) int
        Its group of every cell (cells are combinations of every factor's groups).
    n_groups : int
    """

    cols: tuple
    cell_group: np.ndarray = field(compare=False)
    n_groups: int

    def sums(self, xp, columns):
        """Per-group sums of (J,) columns.

        numpy: bincount. PyTensor: with cells sorted by group and every group
        present, differences of cumulative sums at the groups' last cells (a
        cheap gradient); else one scatter-add.
        """
        if xp is np:
            return [np.bincount(self.cell_group, weights=c, minlength=self.n_groups) for c in columns]
        g = np.asarray(self.cell_group)
        if not (np.all(np.diff(g) >= 0) and len(g) and g[0] == 0 and g[-1] == self.n_groups - 1
                and np.all(np.diff(g) <= 1)):
            return _segment_sum(xp, columns, g, self.n_groups)
        last = np.flatnonzero(np.r_[g[1:] != g[:-1], True])
        out = []
        for c in columns:
            at = xp.cumsum(c)[last]
            out.append(xp.concatenate([at[:1], at[1:] - at[:-1]]))
        return out


def integrated_group_loglik(stats: CellStats, b, effects, factor: Integrated, chol, sigma=None, xp=None,
                         keep_factor=False):
    """Log-likelihood of each group of one factor with its effects integrated out, the others' given.

    Given every other factor's effects, the rows of different groups of the
    integrated factor are independent, and each group is a one-level collapsed
    problem with the residual ``r = y - X t_cell`` (``t_cell`` from ``b`` and the
    given effects, :func:`reduced_loglik`): its residual products ``r'r`` and
    ``Z'r`` are summed over the group's cells, then integrated as in the module
    docstring. Exact; O(cells x p^2) per evaluation.

    Parameters
    ----------
    stats : CellStats
        Statistics by cells of every factor (including the integrated one).
    b, effects
        As for :func:`reduced_loglik`, without the integrated factor.
    factor : Integrated
    chol : (q, q)
        Cholesky factor of the integrated factor's effect covariance.
    sigma : scalar, optional
        Residual SD; omitted with known SDs.
    xp : module, optional
        ``pytensor.tensor`` (default) or ``numpy``.
    keep_factor : bool
        Also return ``(R, e)`` of the integration (for the exact draws).

    Returns
    -------
    (G,) per-group log-likelihood, or ``(loglik, (R, e))`` with ``keep_factor``.
    """
    xp = _namespace(xp)
    _check_sigma(stats, sigma)
    cols, p = list(factor.cols), stats.n_terms
    # Per-column (J,) vectors, so the products fuse into a few elementwise loops (see above).
    tt = cell_coefficients(xp, stats, b, effects)
    tt[0] = tt[0] - stats.centre
    xtx_t = [sum(stats.xtx[:, a, c] * tt[c] for c in range(p)) for a in range(p)]
    rr = stats.yty + sum(tt[a] * (xtx_t[a] - 2.0 * stats.xty[:, a]) for a in range(p))
    summed = factor.sums(xp, [rr] + [stats.xty[:, c] - xtx_t[c] for c in cols])
    q = len(cols)
    CC = {(i, k): np.bincount(factor.cell_group, weights=stats.xtx[:, cols[i], cols[k]],
                              minlength=factor.n_groups) for i in range(q) for k in range(i, q)}
    n = np.bincount(factor.cell_group, weights=stats.n, minlength=factor.n_groups)
    noise = None if not stats.known_sd else np.bincount(factor.cell_group, weights=stats.log_noise_var,
                                                         minlength=factor.n_groups)
    rr, Cr, CC, acc = _scaled(xp, summed[0], summed[1:], CC, n, noise, _f64(xp, sigma))
    step = _Step(zpos=tuple(range(q)), keep=(), tracked=tuple(cols))
    rr, _, _, acc, (R, e, _) = _integrate(xp, rr, Cr, CC, acc, step, _f64(xp, chol))
    ll = -0.5 * (acc + rr)
    return (ll, (R, e)) if keep_factor else ll


def draw_integrated_effects(stats: CellStats, b, effects, factor: Integrated, chols, sigma=None,
                         rng: np.random.Generator | None = None) -> np.ndarray:
    """Exact draws of the integrated factor's effects given each posterior draw of the rest.

    Parameters
    ----------
    stats, factor
        As for :func:`integrated_group_loglik`.
    b : (D, p) array
        Posterior draws of the population coefficients.
    effects : list of (u, cols, cell_group)
        As for :func:`reduced_loglik`, each ``u`` with a leading draw axis (D, G_f, q_f).
    chols : (D, q, q) array
    sigma : (D,) array, optional
    rng : numpy.random.Generator

    Returns
    -------
    (D, G, q) effects (offsets from the population coefficients, original units).
    """
    if rng is None:
        raise ValueError("pass a seeded numpy Generator")
    n_draws = len(b)
    q = len(factor.cols)
    out = np.empty((n_draws, factor.n_groups, q))
    noise = rng.standard_normal((n_draws, q, factor.n_groups))  # drawn up front: the same for any thread count

    def one(d):
        L = np.asarray(chols[d], float)
        _, (R, e) = integrated_group_loglik(stats, b[d], [(u[d], c, g) for u, c, g in effects], factor, L,
                                         None if sigma is None else float(sigma[d]), xp=np,
                                         keep_factor=True)
        out[d] = np.stack(_backward(R, [e[i] + noise[d, i] for i in range(q)]), axis=1) @ L.T

    # Draws are independent and NumPy's loops over cells release the GIL: threads share the cores.
    with ThreadPoolExecutor(max_workers=os.cpu_count() or 1) as pool:
        list(pool.map(one, range(n_draws)))
    return out


def draw_effects(stats: CellStats, levels: list[Level], b, chols, sigma=None,
                 rng: np.random.Generator | None = None) -> tuple[list, np.ndarray]:
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
            level, step, (R, e, F) = levels[k], steps[k], factors[k]
            v = [e[i] + rng.standard_normal(level.n_groups) for i in range(level.q)]
            for j, kk in enumerate(step.keep):
                delta = above[:, step.tracked[kk]]
                v = [v[i] - F[i][j] * delta for i in range(level.q)]
            u = np.stack(_backward(R, v), axis=1) @ L_d[k].T
            out[k][d] = u
            above[:, list(level.cols)] += u
            if k > 0:
                above = above[levels[k - 1].parent]
    return out, group_ll


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
