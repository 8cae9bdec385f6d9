"""Data file -> validated :class:`Dataset`.

Everything the model will rely on is checked here, before any sampling: the
columns exist, values are finite and of the right kind for the family (the
family's own :meth:`~hierwork.plan.families.base.Family.check_data`), group
labels are present, nested labels are composed with their parents' labels
(:mod:`hierwork.data.labels`), and group-level predictors are constant within
each group.
"""
from __future__ import annotations

import csv
import hashlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from hierwork.data.labels import group_labels
from hierwork.data.rows import RowRef, check_missing, missing_rows, numeric
from hierwork.errors import DataError, SpecError, choices_hint
from hierwork.plan.design import check_transform
from hierwork.plan.families import get_family
from hierwork.plan.families.base import OutcomeRows

#: Largest count taken as exact: 2^53, beyond which doubles skip whole numbers.
MAX_COUNT = float(2 ** 53)
#: Outcome keys holding extra columns, in the order they are checked.
OUTCOME_COLUMNS = ("trials", "exposure", "known_sd")


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
    ref : RowRef
        Line number (CSV) or row position (Parquet) of each kept row, for messages.
    labels : dict
        Factor name -> array of string group labels, composed with their
        parents' for nested factors (``"north/7"``).
    categorical : dict
        Predictor column -> levels with the reference level first.
    missing : dict
        What ``missing`` did: ``policy`` (``error`` or ``drop``), ``rows_read``,
        ``rows_removed`` and ``by_column`` (column -> rows with a gap there).
    """

    frame: pd.DataFrame
    path: Path
    sha256: str
    ref: RowRef
    labels: dict = field(default_factory=dict)
    categorical: dict = field(default_factory=dict)
    missing: dict = field(default_factory=dict)
    outcome_levels: tuple | None = None

    @property
    def n(self) -> int:
        return len(self.frame)

    def outcome_rows(self, outcome) -> OutcomeRows:
        """The outcome and its family's columns as arrays."""
        get = lambda column: None if column is None else self.frame[column].to_numpy(dtype=float)  # noqa: E731
        return OutcomeRows(get(outcome.column), *(get(getattr(outcome, k)) for k in OUTCOME_COLUMNS),
                           levels=self.outcome_levels)


def read_table(path: Path, text_columns=()) -> pd.DataFrame:
    """Read a CSV or Parquet file into a DataFrame, as a user error if unreadable.

    ``text_columns`` (group labels, categorical levels) are read as the text
    written in the file: ``07`` and ``7`` stay apart, and only an empty cell is
    missing (``NA``, ``null``, ``None``, ``N/A``, ``nan`` are labels). In the
    other columns pandas' usual markers of missing values apply. A header that
    names a column twice is refused.
    """
    suffix = path.suffix.lower()
    try:
        if suffix in (".parquet", ".pq"):
            table = pd.read_parquet(path)
        elif suffix in (".csv", ".txt", ".tsv"):
            sep = "\t" if suffix == ".tsv" else ","
            with open(path, newline="", encoding="utf-8") as handle:
                header = next(csv.reader(handle, delimiter=sep, skipinitialspace=True), [])
            _refuse_duplicates(header, path)
            text = [c for c in header if c.strip() in set(text_columns)]
            table = pd.read_csv(path, sep=sep, skipinitialspace=True, dtype={c: str for c in text},
                                keep_default_na=False,
                                na_values={c: [""] if c in text else _MISSING_MARKERS for c in header})
        else:
            raise DataError(f"unsupported data file type {suffix!r}", where=str(path),
                            hint="use .csv, .tsv or .parquet")
    except (OSError, ValueError, pd.errors.ParserError, UnicodeDecodeError, csv.Error) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise DataError(f"cannot read the data file: {first}", where=str(path),
                        hint="it must be a comma-separated text file with a header row, or Parquet") from None
    _refuse_duplicates(list(table.columns), path)
    return table


#: Cells read as missing outside the text columns (pandas' default markers).
_MISSING_MARKERS = ["", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND", "1.#QNAN",
                    "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null"]


def _refuse_duplicates(header, path) -> None:
    names = [str(c).strip() for c in header]
    for i, name in enumerate(names):
        if name in names[:i]:
            raise DataError(f"column {name!r} appears twice in the header (columns {names.index(name) + 1} "
                            f"and {i + 1})", where=str(path), hint="rename one of them")


def text_columns_of(spec) -> list:
    """Columns read as text: group labels and the levels of predictors declared categorical."""
    return [f.column for f in spec.factors] + [p.column for p in spec.predictors if p.type == "categorical"]


def is_csv(path: Path) -> bool:
    return Path(path).suffix.lower() not in (".parquet", ".pq")


def load_dataset(spec) -> Dataset:
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
    table = read_table(path, text_columns_of(spec))
    if table.empty:
        raise DataError("the data file has no rows", where=str(path))
    table.columns = [str(c).strip() for c in table.columns]
    ref = RowRef.of(str(path), len(table), is_csv(path))
    used = used_columns(spec)
    for column, key in used.items():
        if column not in table.columns:
            raise DataError(f"column {column!r} (from {key}) is not in the data file",
                            where=f"{spec.where(key)} -> {path}",
                            hint=choices_hint(column, list(table.columns)))
    frame = table[list(used)].copy()
    frame, ref, missing = _handle_missing(spec, frame, used, ref)
    levels = None
    if get_family(spec.outcome.family).ordered:
        frame, levels = _ordered_outcome(spec, frame, ref)
    _check_outcome(spec, frame, ref, levels)
    categorical = _check_predictors(spec, frame, ref)
    labels = group_labels(frame, spec.factors)
    _check_groups(spec, labels, path)
    _check_group_predictors(spec, frame, labels, path)
    frame = frame.reset_index(drop=True)
    return Dataset(frame=frame, path=path, sha256=hashlib.sha256(raw_bytes).hexdigest(), ref=ref,
                   labels=labels, categorical=categorical, missing=missing, outcome_levels=levels)


def _handle_missing(spec, frame, used: dict, ref: RowRef):
    """Apply the spec's ``missing`` policy: refuse gaps (``error``) or remove their rows (``drop``)."""
    summary = {"policy": spec.values["missing"], "rows_read": len(frame), "rows_removed": 0, "by_column": {}}
    if summary["policy"] == "error":
        check_missing(frame, used, ref)
        return frame, ref, summary
    mask, by_column = missing_rows(frame, used)
    if mask.all():
        raise DataError(f"every row has a missing value in a column the model uses "
                        f"({', '.join(map(repr, by_column))})", where=ref.where,
                        hint="'missing: drop' would leave no rows; fill in the values")
    summary.update(rows_removed=int(mask.sum()), by_column=by_column)
    return frame.loc[~mask].reset_index(drop=True), ref.subset(~mask), summary


def used_columns(spec) -> dict:
    """Column -> the spec key that asks for it (first mention wins)."""
    used: dict = {}

    def add(column, key):
        if column is not None and column not in used:
            used[column] = key

    add(spec.outcome.column, "outcome.column")
    for key in OUTCOME_COLUMNS:
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


def _level_text(value) -> str:
    """A value of an ordered outcome as a level label (whole numbers without a decimal point)."""
    if isinstance(value, (int, float, np.number)) and not isinstance(value, bool) and float(value).is_integer():
        return str(int(value))
    return str(value).strip()


def _ordered_outcome(spec, frame, ref: RowRef):
    """Replace an ordered outcome's labels or scores by their positions 1..K in ``outcome.levels``.

    Without ``outcome.levels`` the outcome must be whole-number scores; the levels
    are then every whole number from the smallest to the largest observed.
    """
    column, given = spec.outcome.column, spec.outcome.levels
    values = frame[column]
    if given is None:
        numeric(frame, column, "outcome", ref)
        scores = values.to_numpy(dtype=float)
        bad = scores != np.round(scores)
        if bad.any():
            raise DataError(f"outcome column {column!r} has scores that are not whole numbers in {ref.text(bad)}",
                            where=ref.where, hint="list the levels in order under outcome.levels, "
                                                  "or use whole-number scores")
        low, high = int(scores.min()), int(scores.max())
        if low == high:
            raise DataError(f"outcome column {column!r} holds only the score {low}", where=ref.where,
                            hint="an ordered outcome needs two or more levels: list them under outcome.levels")
        levels = tuple(str(k) for k in range(low, high + 1))
    else:
        levels = tuple(given)
    position = {label: k + 1 for k, label in enumerate(levels)}
    labels = values.map(_level_text)
    bad = ~labels.isin(levels).to_numpy()
    if bad.any():
        unknown = sorted(set(labels[bad]))[:5]
        raise DataError(f"outcome column {column!r} has values not in outcome.levels "
                        f"({', '.join(map(repr, unknown))}) in {ref.text(bad)}", where=ref.where,
                        hint=f"the levels are {', '.join(levels)}; add the missing ones in their place or fix the data")
    frame = frame.copy()
    frame[column] = labels.map(position).astype(float)
    return frame, levels


def _check_outcome(spec, frame, ref: RowRef, levels=None) -> None:
    out = spec.outcome
    columns = {"outcome": out.column}
    numeric(frame, out.column, "outcome", ref)
    for key in OUTCOME_COLUMNS:
        column = getattr(out, key)
        if column is not None:
            columns[key] = column
            numeric(frame, column, key, ref)

    def fail(mask, role, what, hint):
        raise DataError(f"{role} column {columns[role]!r} {what} in {ref.text(mask)}", where=ref.where, hint=hint)

    get = lambda key: None if key not in columns else frame[columns[key]].to_numpy(dtype=float)  # noqa: E731
    rows = OutcomeRows(get("outcome"), *(get(k) for k in OUTCOME_COLUMNS), levels=levels)
    family = get_family(out.family)
    family.check_data(rows, fail)
    if family.discrete:
        for role in ("outcome", "trials"):
            if role in columns and (get(role) > MAX_COUNT).any():
                fail(get(role) > MAX_COUNT, role, f"has counts above 2^53 ({MAX_COUNT:.4g})",
                     "counts that large are not exact in floating point; model a rate or rescale")
    per = rows.trials if rows.trials is not None else rows.exposure
    ratio = rows.y / per if per is not None else rows.y
    if np.ptp(ratio) == 0:
        what = "the same value" if per is None else f"the same value per {'trial' if rows.trials is not None else 'exposure'}"
        raise DataError(f"outcome column {out.column!r} has {what} ({ratio[0]:g}) in every row", where=ref.where,
                        hint="an outcome that never varies has nothing to model; check the column")


def _check_predictors(spec, frame, ref: RowRef) -> dict:
    """Type every population and group-level predictor column; categorical ones -> their levels."""
    categorical = {}
    entries = [(p, f"predictors[{i}]", "predictor") for i, p in enumerate(spec.predictors)]
    entries += [(p, f"groups.{f.name}.predictors[{i}]", "group-level predictor")
                for f in spec.factors for i, p in enumerate(f.predictor_settings)]
    for p, key, role in entries:
        values = frame[p.column]
        is_numeric = pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)
        kind = p.type if p.type != "auto" else ("numeric" if is_numeric and p.reference is None else "categorical")
        if kind == "numeric":
            if p.reference is not None:
                raise SpecError("'reference' applies to categorical predictors only",
                                where=spec.where(f"{key}.reference"),
                                hint="remove it, or set type: categorical")
            values = numeric(frame, p.column, role, ref)
            check_transform(values, p.transform, p.column, ref)
            if np.ptp(values) == 0:
                raise DataError(f"{role} {p.column!r} has the same value ({values[0]:g}) in every row",
                                where=ref.where, hint="a predictor that never changes cannot be estimated; remove it")
            continue
        if p.transform is not None:
            raise SpecError(f"transform {p.transform} applies to numeric predictors; {p.column!r} is categorical",
                            where=spec.where(f"{key}.transform"),
                            hint="remove the transform, or set type: numeric if the column holds numbers")
        labels = values.astype(str).str.strip()
        frame[p.column] = labels
        levels = sorted(labels.unique())
        if len(levels) < 2:
            raise DataError(f"categorical {role} {p.column!r} has a single level {levels[0]!r}",
                            where=ref.where, hint="a predictor that never changes cannot be estimated; remove it")
        reference = levels[0] if p.reference is None else str(p.reference)
        if reference not in levels:
            raise SpecError(f"reference level {reference!r} does not occur in column {p.column!r}",
                            where=spec.where(f"{key}.reference"), hint=choices_hint(reference, levels))
        categorical[p.column] = [reference] + [lv for lv in levels if lv != reference]
    for f in spec.factors:
        for i, term in enumerate(f.varying):
            if term == "intercept":
                continue
            if term in categorical:
                raise SpecError(f"varying slope {term!r} is categorical; only numeric slopes can vary",
                                where=spec.where(f"groups.{f.name}.varying[{i}]"),
                                hint="add a numeric 0/1 column for the contrast you want to vary")
            numeric(frame, term, "varying slope", ref)
    return categorical


def _check_groups(spec, labels: dict, path) -> None:
    for f in spec.factors:
        levels = pd.unique(labels[f.name])
        if len(levels) < 2:
            raise DataError(f"grouping factor {f.name!r} (column {f.column!r}) has only one group "
                            f"{levels[0]!r}", where=str(path),
                            hint="partial pooling needs at least 2 groups; remove the factor or add data")


def _check_group_predictors(spec, frame, labels, path) -> None:
    for f in spec.factors:
        for col in f.predictors:
            varying = varying_within(frame[col], labels[f.name])
            if len(varying):
                g, lo, hi = varying[0]
                raise DataError(f"group-level predictor {col!r} is not constant within {f.name} {g!r} "
                                f"(from {shown_value(lo)} to {shown_value(hi)}; {len(varying)} group(s) affected)",
                                where=f"{spec.where(f'groups.{f.name}.predictors')} -> {path}",
                                hint="group-level predictors take one value per group; "
                                     "list a row-level column under 'predictors' instead")


def varying_within(values, labels) -> list:
    """``(group, min, max)`` of every group whose values are not constant.

    Numbers within a relative tolerance of 1e-9 count as equal; labels (text) must be identical.
    """
    values = pd.Series(np.asarray(values))
    spread = values.groupby(pd.Series(labels, dtype=object), sort=False).agg(["min", "max"])
    if pd.api.types.is_numeric_dtype(values):
        top = spread["max"].to_numpy(dtype=float)
        bad = np.abs(top - spread["min"].to_numpy(dtype=float)) > 1e-9 * np.maximum(1.0, np.abs(top))
    else:
        bad = (spread["max"] != spread["min"]).to_numpy()
    return [(g, spread.loc[g, "min"], spread.loc[g, "max"]) for g in spread.index[bad]]


def shown_value(value) -> str:
    """A value in a message: numbers as `%g`, labels quoted."""
    return f"{value:g}" if isinstance(value, (int, float, np.number)) else repr(value)
