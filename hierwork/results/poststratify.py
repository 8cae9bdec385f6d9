"""Post-stratified estimates: the fitted cells weighted by how many units of the population fall in each.

A population table has one row per cell (a combination of the spec's predictor
and group columns) and a count of the population's units in it. For every
posterior draw ``s`` the expected outcome of each cell ``c`` on the outcome's
scale, ``mu_cs`` (the cell's linear predictor through the family's mean, times
``estimates.rate_per`` for rates, exactly as ``predict`` computes
``outcome_mean``), is averaged over the cells of an area with the counts
``N_c`` as weights::

    theta_as = sum_{c in a} N_c mu_cs / sum_{c in a} N_c

and the area's estimate is the posterior mean, SD and central interval of
``theta_as`` (Gelman and Little 1997, Survey Methodology 23:127; Park, Gelman
and Bafumi 2004, Political Analysis 12:375). Cells in groups the fit never
saw get effects drawn per draw from the fitted population distribution, one
draw per new group shared by all its cells, as in ``predict``.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import sparse

from hierwork.data.labels import group_labels
from hierwork.data.rows import RowRef, blank
from hierwork.errors import DataError, HierworkError
from hierwork.results.draws import chunks, linear_predictor
from hierwork.results.predict import new_rows, read_rows, text_columns
from hierwork.runfolder import Run

#: Columns of the output, one row per area and one for the whole population.
COLUMNS = ("by", "area", "count", "mean", "sd", "lower", "upper")
#: ``by`` and ``area`` of the row for the whole population.
ALL = "all"


def poststratify(run, population, by=(), count: str = "count", seed: int | None = None,
                 interval: float | None = None) -> pd.DataFrame:
    """Population-weighted expected outcome per area and for the whole population.

    Parameters
    ----------
    run : Run, str or Path
        Run folder written by ``hierwork fit``.
    population : pandas.DataFrame, str or Path
        One row per population cell: the run's predictor, group and group-level
        predictor columns, and a column of counts (units of the population in
        the cell; non-negative, need not be whole numbers).
    by : sequence of str
        Areas to estimate for: a factor of the run (its groups) or any column
        of the table. The whole population is always estimated.
    count : str
        Name of the count column.
    seed : int, optional
        Seed of the draws of unseen groups (default: the run's seed).
    interval : float, optional
        Probability of the central interval (default: the run's ``estimates.interval``).

    Returns
    -------
    pandas.DataFrame
        Columns ``by, area, count, mean, sd, lower, upper``: per ``by`` one row
        per area (in the order first seen in the table), then ``by = area =
        "all"``; ``count`` is the area's population, the other columns
        summarise the weighted expected outcome on the outcome's scale (no
        estimate for an area of count 0).

    Raises
    ------
    DataError
        Missing columns or values, unknown categorical levels, bad counts, an unknown area.
    RunFolderError
        ``run`` is not a complete run folder.
    """
    run = run if isinstance(run, Run) else Run.load(run)
    if interval is not None and not 0.5 <= interval < 1:
        raise HierworkError(f"interval must be at least 0.5 and below 1, got {interval:g}", where="--interval")
    interval = interval or run.interval
    frame, ref = read_rows(population, "population table", "the population table has no rows",
                           hint="give one row per population cell with its count", text_columns=text_columns(run))
    weights = _counts(frame, count, ref)
    factors = {f["name"]: f for f in run.plan["factors"]}
    cells = new_rows(run, frame, ref, seed, "poststratify", outcome_columns=False)
    areas = [(name, _area_labels(frame, name, factors, ref)) for name in dict.fromkeys(by)]
    index = [(name, *_codes(labels)) for name, labels in areas]
    D = cells.draws.n
    sums = [np.zeros((D, len(levels))) for _, _, levels in index]
    total = np.zeros(D)
    params = cells.draws.family_params()
    for sl in chunks(D, cells.rows.n):
        weighted = cells.estimands.outcome(cells.family, linear_predictor(cells.draws, cells.rows, sl), params) \
            * weights[sl]
        total += weighted.sum(axis=1)
        for k, (_, codes, levels) in enumerate(index):
            m = weighted.shape[1]
            members = sparse.csr_matrix((np.ones(m), (np.arange(m), codes[sl])), shape=(m, len(levels)))
            sums[k] += np.asarray((members.T @ weighted.T).T)  # (D, areas): each area's weighted sum
    rows = []
    for k, (name, codes, levels) in enumerate(index):
        counts = np.bincount(codes, weights=weights, minlength=len(levels))
        rows += [_row(name, level, counts[j], sums[k][:, j], interval) for j, level in enumerate(levels)]
    rows.append(_row(ALL, ALL, weights.sum(), total, interval))
    table = pd.DataFrame(rows, columns=list(COLUMNS))
    if np.all(weights == np.round(weights)):
        table["count"] = table["count"].round().astype(np.int64)  # whole units stay whole in the CSV
    return table


def _counts(frame: pd.DataFrame, column: str, ref: RowRef) -> np.ndarray:
    """The count column, checked: present, numeric, finite, non-negative, not all zero."""
    if column not in frame.columns:
        raise DataError(f"no count column {column!r}", where=ref.where,
                        hint="add a column of population counts per cell, or name yours with --count")
    mask = blank(frame[column])
    if mask.any():
        raise DataError(f"count column {column!r} has missing values in {ref.text(mask)}", where=ref.where,
                        hint="give every cell a count (0 for an empty cell)")
    values = pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=float)
    for bad, what in ((~np.isfinite(values), "is not a number"), (values < 0, "is negative")):
        if bad.any():
            raise DataError(f"count column {column!r} {what} in {ref.text(bad)}", where=ref.where,
                            hint="counts are how many units of the population fall in each cell: 0 or more")
    if values.sum() <= 0:
        raise DataError(f"count column {column!r} sums to 0", where=ref.where,
                        hint="a population needs at least one unit")
    return values


def _area_labels(frame: pd.DataFrame, name: str, factors: dict, ref: RowRef) -> np.ndarray:
    """Each cell's area under ``name``: a factor's group labels, or the values of a table column."""
    if name in factors:
        from types import SimpleNamespace

        return np.asarray(group_labels(frame, [SimpleNamespace(**f) for f in factors.values()])[name], dtype=object)
    if name not in frame.columns:
        raise DataError(f"--by {name!r} is neither a factor of the run nor a column of the table",
                        where=ref.where, hint=f"factors: {', '.join(map(repr, factors))}; or add the column")
    mask = blank(frame[name])
    if mask.any():
        raise DataError(f"column {name!r} has missing values in {ref.text(mask)}", where=ref.where,
                        hint="every cell needs an area")
    return frame[name].astype(str).str.strip().to_numpy(dtype=object)


def _codes(labels: np.ndarray) -> tuple:
    """Integer code of each cell's area and the areas in first-seen order."""
    codes, levels = pd.factorize(pd.Series(labels, dtype=object), sort=False)
    return codes, [str(v) for v in levels]


def _row(by: str, area: str, count: float, weighted_sum: np.ndarray, interval: float) -> tuple:
    count = round(float(count), 9)  # a sum of decimal counts, without its binary round-off
    if count <= 0:
        return by, area, count, np.nan, np.nan, np.nan, np.nan
    theta = weighted_sum / count
    lower, upper = np.quantile(theta, [(1 - interval) / 2, (1 + interval) / 2])
    return by, area, count, float(theta.mean()), float(theta.std(ddof=1)), float(lower), float(upper)
