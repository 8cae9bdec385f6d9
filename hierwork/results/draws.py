"""Posterior draws and the rows they are applied to: the linear predictor of any draw and row.

Every path (plain, reduced, collapsed) stores the same posterior variables, so
the linear predictor of any draw is computed here once, in NumPy, the same way
for all of them (``F__effect`` is the offset from the population value, also
for the factor that carries the population values on the centred path)::

    eta = X b + sum_F (effect_F[index_F] * X[:, varying_F]).sum(-1) + (W_F gamma_F)[index_F]

The family then adds its offset (log exposure) and gives densities, simulated
outcomes and means. Work is streamed over row chunks of about
:data:`CHUNK_CELLS` numbers.
"""
from __future__ import annotations

from dataclasses import dataclass, field, fields

import numpy as np

from hierwork.plan.families.base import OutcomeRows

#: Draws x rows handled at once while streaming over rows.
CHUNK_CELLS = 2_000_000


@dataclass
class Draws:
    """Posterior (or prior) draws flattened over chains: ``D`` draws.

    ``effects[F]`` (D, J, q), ``gammas[F]`` (D, r), ``params`` the family's own
    parameters (D,), ``spreads[F]`` (D, J) the log offsets of the groups' residual
    SDs of factors with ``spread: varying`` (:mod:`hierwork.model.spread`).
    """

    b: np.ndarray
    effects: dict
    gammas: dict
    params: dict
    shape: tuple  # (chains, draws per chain)
    spreads: dict = field(default_factory=dict)

    @property
    def n(self) -> int:
        return self.b.shape[0]

    def subset(self, index: np.ndarray) -> "Draws":
        """The draws at ``index`` (flat positions), as one chain unless all are kept."""
        if len(index) == self.n:
            return self
        return Draws(self.b[index], {k: v[index] for k, v in self.effects.items()},
                     {k: v[index] for k, v in self.gammas.items()},
                     {k: v[index] for k, v in self.params.items()}, (1, len(index)),
                     {k: v[index] for k, v in self.spreads.items()})

    def family_params(self, rows: "Rows | None" = None, sl: slice = slice(None)) -> dict:
        """The family parameters shaped ``(D, 1)`` to broadcast over rows.

        With ``rows`` and varying spreads, ``residual_sd`` is per row of ``rows[sl]``: ``(D, m)``.
        """
        params = {k: v[:, None] for k, v in self.params.items()}
        if rows is not None and self.spreads and "residual_sd" in params:
            offset = sum(self.spreads[name][:, index[sl]] for name, index, _, _ in rows.groups if name in self.spreads)
            params["residual_sd"] = params["residual_sd"] * np.exp(offset)
        return params


def draws_of(group, factors, parameters) -> Draws:
    """Flatten an InferenceData group (posterior or prior) into :class:`Draws`.

    Parameters
    ----------
    group : xarray.Dataset
    factors : sequence
        Objects with ``name`` and ``predictors`` (FactorPlan, or plan.json entries as dicts).
    parameters : sequence of str
        The family's parameter names (those absent from ``group`` are skipped).
    """
    def flat(name):
        v = np.asarray(group[name].values, dtype=float)
        return v.reshape((-1,) + v.shape[2:])

    names = [f.name if hasattr(f, "name") else f["name"] for f in factors]
    preds = [f.predictors if hasattr(f, "predictors") else f["predictors"] for f in factors]
    return Draws(b=flat("b"),
                 effects={n: flat(f"{n}__effect") for n in names},
                 gammas={n: flat(f"{n}__gamma") for n, p in zip(names, preds) if p},
                 params={k: flat(k) for k in parameters if k in group},
                 shape=(group.sizes["chain"], group.sizes["draw"]),
                 spreads={n: flat(f"{n}__spread_effect") for n in names if f"{n}__spread_effect" in group})


@dataclass
class Rows:
    """The rows to evaluate: design, group of each row per factor, outcome columns.

    ``groups`` is a list of ``(factor name, index (n,), varying columns of X,
    W (J, r) or None)``; indices point into the draws' effect arrays.
    """

    X: np.ndarray
    groups: list
    outcome: OutcomeRows

    @property
    def n(self) -> int:
        return self.X.shape[0]

    def subset(self, index) -> "Rows":
        """The rows at ``index`` (a slice or positions)."""
        return Rows(self.X[index], [(name, rows[index], cols, W) for name, rows, cols, W in self.groups],
                    self.outcome.rows(index))


def rows_of(plan) -> Rows:
    """The fitted rows of a plan."""
    return Rows(plan.X, [(f.name, f.index, list(f.varying_cols), f.W if f.predictors else None)
                         for f in plan.factors], plan.outcome)


@dataclass(frozen=True)
class Distinct:
    """Rows that share every input of a per-row quantity, each represented once.

    ``rows`` the U representatives, ``inverse`` (n,) the representative of each
    row, ``counts`` (U,) the rows each represents.
    """

    rows: Rows
    inverse: np.ndarray
    counts: np.ndarray


def distinct_rows(rows: Rows, outcome: bool = True) -> Distinct:
    """Rows with identical design, group memberships and outcome columns, once each.

    Such rows have the same linear predictor at every draw and so the same
    predictive distribution; with ``outcome`` (the observed outcome in the key
    too) also the same log density. Per-row work on counts and proportions
    (1,000,000 bernoulli rows in a few thousand cells) is then done once per
    representative and gathered, with the same result.
    """
    from hierwork.model.cells import row_cells

    columns = [f.name for f in fields(rows.outcome) if f.name != "levels" and (outcome or f.name != "y")]
    values = [np.broadcast_to(np.asarray(v, dtype=float), (rows.n,)) for v in
              (getattr(rows.outcome, name) for name in columns) if v is not None]
    cells = row_cells(np.column_stack([rows.X, *values]), [index for _, index, _, _ in rows.groups])
    return Distinct(rows.subset(cells.first), cells.cell, np.bincount(cells.cell, minlength=cells.n_cells))


def linear_predictor(draws: Draws, rows: Rows, sl: slice = slice(None)) -> np.ndarray:
    """``eta`` (D, m) of the rows ``sl`` for every draw (without exposure offset)."""
    X = rows.X[sl]
    eta = draws.b @ X.T
    for name, index, cols, W in rows.groups:
        idx = index[sl]
        eta += np.einsum("dmq,mq->dm", draws.effects[name][:, idx, :], X[:, cols])
        if W is not None:
            eta += (draws.gammas[name] @ W.T)[:, idx]
    return eta


def within_budget(n_draws: int, cells_per_draw: int, budget: int, minimum: int = 100) -> np.ndarray:
    """Flat positions of evenly spaced draws whose total work ``draws x cells_per_draw`` fits ``budget``.

    Every draw when it fits; otherwise as many as fit, but at least ``minimum``
    (or all there are).
    """
    wanted = max(minimum, budget // max(cells_per_draw, 1))
    if wanted >= n_draws:
        return np.arange(n_draws)
    return np.unique(np.linspace(0, n_draws - 1, wanted).round().astype(np.int64))


def chunks(n_draws: int, n_rows: int):
    """Row slices of about :data:`CHUNK_CELLS` draws x rows each."""
    step = max(1, CHUNK_CELLS // max(n_draws, 1))
    for start in range(0, n_rows, step):
        yield slice(start, min(start + step, n_rows))


def pointwise_log_likelihood(draws: Draws, rows: Rows, family) -> np.ndarray:
    """Log density (D, n) of each observed row at each draw."""
    ll = np.empty((draws.n, rows.n))
    for sl in chunks(draws.n, rows.n):
        eta = linear_predictor(draws, rows, sl)
        ll[:, sl] = family.log_density(rows.outcome.y[sl], eta, rows.outcome.rows(sl), draws.family_params(rows, sl))
    return ll
