"""Row checks and the messages that name rows, shared by fitting and ``predict``.

Row numbers in messages are the file's own line numbers for CSV files (the
header is line 1) and 1-based positions for Parquet files and in-memory tables.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from hierwork.errors import DataError

#: Largest magnitude of a number the model computes with: its square and products of a few such
#: values stay finite in double precision (largest about 1.8e308). Our own bound.
MAX_MAGNITUDE = 1e100
#: Rows named in a message; the rest are counted.
MAX_ROWS_SHOWN = 5


@dataclass(frozen=True)
class RowRef:
    """Where rows come from, for messages: the source and each row's line or position."""

    where: str
    line_of: np.ndarray
    unit: str  # "lines" or "rows"

    @classmethod
    def of(cls, where: str, n: int, csv: bool) -> "RowRef":
        """Rows of a CSV file (header on line 1) or of a table (1-based positions)."""
        return cls(where, np.arange(n) + (2 if csv else 1), "lines" if csv else "rows")

    def subset(self, keep: np.ndarray) -> "RowRef":
        """The same reference for the rows kept by a mask."""
        return RowRef(self.where, self.line_of[np.asarray(keep)], self.unit)

    def text(self, mask) -> str:
        """``3 rows (lines 4, 9, 12)``: how many rows ``mask`` marks, and the first few."""
        bad = self.line_of[np.asarray(mask)]
        shown = ", ".join(str(int(r)) for r in bad[:MAX_ROWS_SHOWN])
        more = f" and {len(bad) - MAX_ROWS_SHOWN} more" if len(bad) > MAX_ROWS_SHOWN else ""
        return f"{len(bad)} row{'s' if len(bad) != 1 else ''} ({self.unit} {shown}{more})"


def blank(values: pd.Series) -> np.ndarray:
    """Missing cells of a column: NaN/None, or text that is empty after stripping spaces."""
    mask = values.isna().to_numpy().copy()
    if values.dtype == object or pd.api.types.is_string_dtype(values):
        mask |= values.astype(str).str.strip().eq("").to_numpy()
    return mask


def check_missing(frame: pd.DataFrame, used: dict, ref: RowRef) -> None:
    """No missing values in the used columns (``used``: column -> what needs it)."""
    for column in used:
        mask = blank(frame[column])
        if mask.any():
            raise DataError(f"column {column!r} has missing values in {ref.text(mask)}", where=ref.where,
                            hint="fill them in, drop those rows, or set 'missing: drop' in the spec")


def missing_rows(frame: pd.DataFrame, used: dict) -> tuple[np.ndarray, dict]:
    """Rows with a missing value in any used column, and how many each column has.

    Returns
    -------
    mask : ndarray of bool (n,)
        Rows to remove for ``missing: drop``.
    by_column : dict
        Column -> number of its missing cells (a row missing two columns counts in both),
        only columns with any.
    """
    mask, by_column = np.zeros(len(frame), dtype=bool), {}
    for column in used:
        gaps = blank(frame[column])
        if gaps.any():
            by_column[column] = int(gaps.sum())
            mask |= gaps
    return mask, by_column


def numeric(frame: pd.DataFrame, column: str, role: str, ref: RowRef) -> np.ndarray:
    """The column as finite floats, or a message naming the rows that are not.

    The frame's column is replaced by the floats, so later steps see numbers.
    """
    values = pd.to_numeric(frame[column], errors="coerce")
    bad = values.isna().to_numpy()
    if bad.any():
        first = frame[column].to_numpy()[bad][0]
        raise DataError(f"{role} column {column!r} must be numeric; {ref.text(bad)} are not "
                        f"(first: {first!r})", where=ref.where)
    arr = values.to_numpy(dtype=float)
    if not np.isfinite(arr).all():
        mask = ~np.isfinite(arr)
        raise DataError(f"{role} column {column!r} has infinite values in {ref.text(mask)}", where=ref.where)
    if (np.abs(arr) > MAX_MAGNITUDE).any():
        raise DataError(f"{role} column {column!r} has values beyond +/-{MAX_MAGNITUDE:g} in "
                        f"{ref.text(np.abs(arr) > MAX_MAGNITUDE)}", where=ref.where,
                        hint="the model cannot be evaluated with numbers that large; rescale the column")
    frame[column] = arr
    return arr
