"""Per-cell sufficient statistics of a normal linear model.

A *cell* is a set of rows that share every group membership (for one grouping
factor or a nesting chain, the cell is the finest group). The normal
log-likelihood of any model whose coefficients are constant within a cell
depends on the data only through the statistics below (design note
``fast-path.md``; the weighted form is ordinary weighted least squares algebra).

The outcome is centred per cell (``y - centre_j``) before the products are
formed. Because column 0 of the design is the intercept, a coefficient vector
``t`` on the original scale becomes ``t - centre_j * e_0`` on the centred one,
which is exact and keeps ``y'y - 2 t'X'y + t'X'X t`` free of cancellation when
the outcome's level is large compared with its spread.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Upper bound on the scratch memory of one chunk of row outer products.
_CHUNK_BYTES = 64 * 2**20


@dataclass(frozen=True)
class CellStats:
    """Weighted products of the rows in each cell.

    Attributes
    ----------
    n : (J,) int
        Rows per cell.
    xtx : (J, p, p)
        ``X_j' W_j X_j``.
    xty : (J, p)
        ``X_j' W_j (y_j - centre_j)``.
    yty : (J,)
        ``(y_j - centre_j)' W_j (y_j - centre_j)``.
    centre : (J,)
        Per-cell outcome centre (0 when column 0 is not an intercept).
    log_noise_var : (J,) or None
        ``sum_i log sd_i^2`` per cell when per-row SDs are known, else None
        (then ``W = I`` and the residual SD is a parameter).
    """

    n: np.ndarray
    xtx: np.ndarray
    xty: np.ndarray
    yty: np.ndarray
    centre: np.ndarray
    log_noise_var: np.ndarray | None

    @property
    def n_cells(self) -> int:
        return self.n.shape[0]

    @property
    def n_terms(self) -> int:
        return self.xtx.shape[1]

    @property
    def known_sd(self) -> bool:
        return self.log_noise_var is not None

    def shifted(self, coef):
        """Per-cell coefficients on the centred scale.

        Parameters
        ----------
        coef : (p,) or (J, p) array or tensor
            Coefficients on the original scale.

        Returns
        -------
        (J, p) array or tensor ``coef - centre_j * e_0``.
        """
        e0 = np.zeros(self.n_terms)
        e0[0] = 1.0
        return coef - (self.centre[:, None] * e0[None, :])


def cell_index(*codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cells from several integer group codes.

    Parameters
    ----------
    *codes : (n,) int arrays
        One group code per factor.

    Returns
    -------
    cell : (n,) int
        Cell of each row (cells sorted by their codes).
    cell_groups : (n_cells, k) int
        The group codes of each cell, one column per factor.
    """
    stacked = np.column_stack([np.asarray(c, dtype=np.int64) for c in codes])
    cell_groups, cell = np.unique(stacked, axis=0, return_inverse=True)
    return cell.reshape(-1), cell_groups


def cell_stats(
    y: np.ndarray,
    X: np.ndarray,
    cell: np.ndarray,
    n_cells: int | None = None,
    known_sd: np.ndarray | None = None,
) -> CellStats:
    """Compute the sufficient statistics once, in O(rows x p^2).

    Rows are sorted by cell and their outer products summed chunk by chunk
    (``np.add.reduceat``), so scratch memory stays bounded (about 64 MiB)
    whatever the number of rows.

    Parameters
    ----------
    y : (n,) float
        Outcome.
    X : (n, p) float
        Population design; column 0 should be the intercept (all ones) for
        the outcome to be centred per cell.
    cell : (n,) int
        Cell (finest group) of each row, in ``0 .. n_cells - 1``.
    n_cells : int, optional
        Number of cells (default ``cell.max() + 1``); empty cells get zeros.
    known_sd : (n,) float, optional
        Known per-row standard errors; rows are then weighted by ``1/sd^2``.

    Returns
    -------
    CellStats
    """
    y = np.asarray(y, dtype=float)
    X = np.asarray(X, dtype=float)
    cell = np.asarray(cell, dtype=np.int64)
    n_rows, p = X.shape
    J = int(cell.max()) + 1 if n_cells is None else int(n_cells)
    w = np.ones(n_rows) if known_sd is None else 1.0 / np.asarray(known_sd, float) ** 2

    counts = np.bincount(cell, minlength=J)
    if np.all(X[:, 0] == 1.0):
        wsum = np.bincount(cell, weights=w, minlength=J)
        centre = np.divide(np.bincount(cell, weights=w * y, minlength=J), wsum,
                           out=np.zeros(J), where=wsum > 0)
    else:
        centre = np.zeros(J)
    yc = y - centre[cell]

    # [X, y] products in one pass: the last column carries the centred outcome.
    xtx = np.zeros((J, p, p))
    xty = np.zeros((J, p))
    yty = np.zeros(J)
    order = np.argsort(cell, kind="stable")
    chunk = max(1, _CHUNK_BYTES // (8 * (p + 1) ** 2))
    for start in range(0, n_rows, chunk):
        idx = order[start:start + chunk]
        c = cell[idx]
        A = np.column_stack([X[idx], yc[idx]])
        outer = (A * w[idx, None])[:, :, None] * A[:, None, :]
        starts = np.flatnonzero(np.r_[True, c[1:] != c[:-1]])
        sums = np.add.reduceat(outer, starts, axis=0)
        ids = c[starts]
        xtx[ids] += sums[:, :p, :p]
        xty[ids] += sums[:, :p, p]
        yty[ids] += sums[:, p, p]

    log_noise_var = None
    if known_sd is not None:
        log_noise_var = np.bincount(cell, weights=-np.log(w), minlength=J)
    return CellStats(n=counts, xtx=xtx, xty=xty, yty=yty, centre=centre,
                     log_noise_var=log_noise_var)


@dataclass(frozen=True)
class RowCells:
    """Rows grouped by identical predictors and group memberships (cells of counts and proportions).

    Attributes
    ----------
    first : (C,) int
        One row of each cell (its predictors and groups are the cell's).
    cell : (n,) int
        Cell of each row.
    """

    first: np.ndarray
    cell: np.ndarray

    @property
    def n_cells(self) -> int:
        return len(self.first)


def row_cells(X: np.ndarray, codes: list) -> RowCells:
    """Cells of rows sharing every column of ``X`` and every group code (exact equality).

    Parameters
    ----------
    X : (n, p) float
        Population design.
    codes : list of (n,) int
        One group code per factor.
    """
    import pandas as pd

    key = pd.DataFrame(np.column_stack([X] + [np.asarray(c, dtype=float) for c in codes]))
    cell = key.groupby(list(key.columns), sort=False).ngroup().to_numpy().astype(np.int64)
    first = np.full(int(cell.max()) + 1 if len(cell) else 0, -1, dtype=np.int64)
    first[cell[::-1]] = np.arange(len(cell))[::-1]
    return RowCells(first=first, cell=cell)
