"""Data file -> validated :class:`Dataset`.

Everything the model will rely on is checked here, before any sampling: the
columns exist, values are finite and of the right kind for the family, group
labels are present, nested labels are made unique within their parents, and
group-level predictors are constant within each group. Row numbers in messages
are the file's own line numbers (header = line 1) for CSV, and 1-based row
positions for Parquet.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import DataError, SpecError, choices_hint
from .spec import Spec

_MAX_ROWS_SHOWN = 5


@dataclass(frozen=True)
class Dataset:
    """Validated data for one spec.

    Attributes
    ----------
    frame : pandas.DataFrame
        The used columns, in file order, with a fresh 0..n-1 index.
    path : Path
        The data file.
    sha256 : str
        Hash of the file's bytes (provenance; staleness of saved runs).
    rows : numpy.ndarray
        Line number (CSV) or row position (Parquet) of each kept row, for messages.
    labels : dict
        Factor name -> array of string group labels, made unique within parents
        for nested factors (``"north/7"``).
    categorical : dict
        Predictor column -> sorted levels with the reference level first.
    """

    frame: pd.DataFrame
    path: Path
    sha256: str
    rows: np.ndarray
    labels: dict = field(default_factory=dict)
    categorical: dict = field(default_factory=dict)

    @property
    def n(self) -> int:
        return len(self.frame)


def read_table(path: Path) -> pd.DataFrame:
    """Read a CSV or Parquet file into a DataFrame, as a user error if unreadable."""
    suffix = path.suffix.lower()
    try:
        if suffix in (".parquet", ".pq"):
            return pd.read_parquet(path)
        if suffix in (".csv", ".txt", ".tsv"):
            return pd.read_csv(path, sep="\t" if suffix == ".tsv" else ",", skipinitialspace=True)
    except (OSError, ValueError, pd.errors.ParserError, UnicodeDecodeError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise DataError(f"cannot read the data file: {first}", where=str(path),
                        hint="it must be a comma-separated text file with a header row, or Parquet") from None
    raise DataError(f"unsupported data file type {suffix!r}", where=str(path),
                    hint="use .csv, .tsv or .parquet")


def load_dataset(spec: Spec) -> Dataset:
    """Read the spec's data file and check it against the spec.

    Parameters
    ----------
    spec : Spec

    Returns
    -------
    Dataset

    Raises
    ------
    DataError
        What is wrong, in which column and rows, and how to fix it.
    """
    path = spec.data_path
    raw_bytes = path.read_bytes()
    table = read_table(path)
    if table.empty:
        raise DataError("the data file has no rows", where=str(path))
    table.columns = [str(c).strip() for c in table.columns]
    line_of = np.arange(len(table)) + (2 if path.suffix.lower() != ".parquet" else 1)
    used = _used_columns(spec)
    for column, key in used.items():
        if column not in table.columns:
            raise DataError(f"column {column!r} (from {key}) is not in the data file",
                            where=f"{spec.where(key)} -> {path}",
                            hint=choices_hint(column, list(table.columns)))
    frame = table[list(used)].copy()
    _check_missing(frame, used, line_of, path)
    _check_outcome(spec, frame, line_of, path)
    categorical = _check_predictors(spec, frame, line_of, path)
    labels = _group_labels(spec, frame, path)
    _check_group_predictors(spec, frame, labels, path)
    frame = frame.reset_index(drop=True)
    return Dataset(frame=frame, path=path, sha256=hashlib.sha256(raw_bytes).hexdigest(),
                   rows=line_of, labels=labels, categorical=categorical)


def _used_columns(spec: Spec) -> dict:
    """Column -> the spec key that asks for it (first mention wins)."""
    used: dict = {}

    def add(column, key):
        if column is not None and column not in used:
            used[column] = key

    add(spec.outcome.column, "outcome.column")
    for key in ("trials", "exposure", "known_sd"):
        add(getattr(spec.outcome, key), f"outcome.{key}")
    for i, p in enumerate(spec.predictors):
        add(p.column, f"predictors[{i}]")
    for f in spec.factors:
        add(f.column, f"groups.{f.name}.column")
        for i, term in enumerate(f.varying):
            if term != "intercept":
                add(term, f"groups.{f.name}.varying[{i}]")
        for i, col in enumerate(f.predictors):
            add(col, f"groups.{f.name}.predictors[{i}]")
    return used


def _rows_text(line_of: np.ndarray, mask: np.ndarray, path: Path) -> str:
    bad = line_of[np.asarray(mask)]
    shown = ", ".join(str(int(r)) for r in bad[:_MAX_ROWS_SHOWN])
    more = f" and {len(bad) - _MAX_ROWS_SHOWN} more" if len(bad) > _MAX_ROWS_SHOWN else ""
    unit = "lines" if path.suffix.lower() != ".parquet" else "rows"
    return f"{len(bad)} row{'s' if len(bad) != 1 else ''} ({unit} {shown}{more})"


def _check_missing(frame, used, line_of, path) -> None:
    for column, key in used.items():
        values = frame[column]
        mask = values.isna().to_numpy().copy()
        if values.dtype == object or pd.api.types.is_string_dtype(values):
            mask |= values.astype(str).str.strip().eq("").to_numpy()
        if mask.any():
            raise DataError(f"column {column!r} has missing values in {_rows_text(line_of, mask, path)}",
                            where=str(path),
                            hint="fill them in or drop those rows before fitting; hierwork does not guess")


def _numeric(frame, column, line_of, path, role) -> np.ndarray:
    values = pd.to_numeric(frame[column], errors="coerce")
    bad = values.isna().to_numpy()
    if bad.any():
        first = frame[column].to_numpy()[bad][0]
        raise DataError(f"{role} column {column!r} must be numeric; {_rows_text(line_of, bad, path)} "
                        f"are not (first: {first!r})", where=str(path))
    arr = values.to_numpy(dtype=float)
    if not np.isfinite(arr).all():
        mask = ~np.isfinite(arr)
        raise DataError(f"{role} column {column!r} has infinite values in {_rows_text(line_of, mask, path)}",
                        where=str(path))
    frame[column] = arr
    return arr


def _check_outcome(spec: Spec, frame, line_of, path) -> None:
    out = spec.outcome
    y = _numeric(frame, out.column, line_of, path, "outcome")
    fam = out.family

    def fail(mask, what, hint):
        raise DataError(f"outcome {out.column!r} {what} in {_rows_text(line_of, mask, path)}",
                        where=str(path), hint=hint)

    if fam == "bernoulli" and not np.isin(y, (0.0, 1.0)).all():
        fail(~np.isin(y, (0.0, 1.0)), "must be 0 or 1 for family bernoulli",
             "code the outcome as 0/1, or use binomial with a trials column")
    if fam in ("binomial", "poisson", "negative_binomial"):
        bad = (y < 0) | (y != np.round(y))
        if bad.any():
            fail(bad, f"must be a non-negative whole number for family {fam}", "counts cannot be negative or fractional")
    if out.trials is not None:
        n = _numeric(frame, out.trials, line_of, path, "trials")
        bad = (n <= 0) | (n != np.round(n))
        if bad.any():
            raise DataError(f"trials column {out.trials!r} must be a positive whole number in "
                            f"{_rows_text(line_of, bad, path)}", where=str(path))
        if (y > n).any():
            fail(y > n, f"exceeds trials {out.trials!r}", "successes must be at most the number of trials")
    if out.exposure is not None:
        e = _numeric(frame, out.exposure, line_of, path, "exposure")
        if (e <= 0).any():
            raise DataError(f"exposure column {out.exposure!r} must be positive in "
                            f"{_rows_text(line_of, e <= 0, path)}", where=str(path))
    if out.known_sd is not None:
        s = _numeric(frame, out.known_sd, line_of, path, "known_sd")
        if (s <= 0).any():
            raise DataError(f"known_sd column {out.known_sd!r} must be positive in "
                            f"{_rows_text(line_of, s <= 0, path)}", where=str(path))


def _check_predictors(spec: Spec, frame, line_of, path) -> dict:
    categorical = {}
    for i, p in enumerate(spec.predictors):
        values = frame[p.column]
        is_numeric = pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)
        kind = p.type if p.type != "auto" else ("numeric" if is_numeric and p.reference is None else "categorical")
        if kind == "numeric":
            if p.reference is not None:
                raise SpecError("'reference' applies to categorical predictors only",
                                where=spec.where(f"predictors[{i}].reference"),
                                hint="remove it, or set type: categorical")
            values = _numeric(frame, p.column, line_of, path, "predictor")
            if np.ptp(values) == 0:
                raise DataError(f"predictor {p.column!r} has the same value ({values[0]:g}) in every row",
                                where=str(path), hint="a predictor that never changes cannot be estimated; remove it")
            continue
        labels = values.astype(str).str.strip()
        frame[p.column] = labels
        levels = sorted(labels.unique())
        if len(levels) < 2:
            raise DataError(f"categorical predictor {p.column!r} has a single level {levels[0]!r}",
                            where=str(path), hint="a predictor that never changes cannot be estimated; remove it")
        reference = levels[0] if p.reference is None else str(p.reference)
        if reference not in levels:
            raise SpecError(f"reference level {reference!r} does not occur in column {p.column!r}",
                            where=spec.where(f"predictors[{i}].reference"), hint=choices_hint(reference, levels))
        categorical[p.column] = [reference] + [lv for lv in levels if lv != reference]
    for f in spec.factors:
        for i, term in enumerate(f.varying):
            if term == "intercept" or term in categorical:
                if term in categorical:
                    raise SpecError(f"varying slope {term!r} is categorical; only numeric slopes can vary",
                                    where=spec.where(f"groups.{f.name}.varying[{i}]"),
                                    hint="add a numeric 0/1 column for the contrast you want to vary")
                continue
            _numeric(frame, term, line_of, path, "varying slope")
        for col in f.predictors:
            _numeric(frame, col, line_of, path, "group-level predictor")
    return categorical


def _group_labels(spec: Spec, frame, path) -> dict:
    raw = {f.name: frame[f.column].astype(str).str.strip().to_numpy() for f in spec.factors}
    labels = {}
    parent = {f.name: f.within for f in spec.factors}

    def composite(name):
        if name in labels:
            return labels[name]
        own = raw[name]
        if parent[name] is not None:
            up = composite(parent[name])
            own = np.char.add(np.char.add(up.astype(str), "/"), own.astype(str))
        labels[name] = own.astype(object)
        return labels[name]

    for f in spec.factors:
        composite(f.name)
        levels = pd.unique(labels[f.name])
        if len(levels) < 2:
            raise DataError(f"grouping factor {f.name!r} (column {f.column!r}) has only one group "
                            f"{levels[0]!r}", where=str(path),
                            hint="partial pooling needs at least 2 groups; remove the factor or add data")
    return labels


def _check_group_predictors(spec: Spec, frame, labels, path) -> None:
    for f in spec.factors:
        for col in f.predictors:
            spread = pd.Series(frame[col].to_numpy()).groupby(labels[f.name]).agg(["min", "max"])
            varying = spread.index[(spread["max"] - spread["min"]).abs().to_numpy() > 1e-9 *
                                   np.maximum(1.0, spread["max"].abs().to_numpy())]
            if len(varying):
                g = varying[0]
                lo, hi = spread.loc[g, "min"], spread.loc[g, "max"]
                raise DataError(f"group-level predictor {col!r} is not constant within {f.name} {g!r} "
                                f"(from {lo:g} to {hi:g}; {len(varying)} group(s) affected)",
                                where=f"{spec.where(f'groups.{f.name}.predictors')} -> {path}",
                                hint="group-level predictors take one value per group; "
                                     "list a row-level column under 'predictors' instead")
