"""Predictions for new rows from a finished run folder.

A new row's linear predictor uses the run's population terms and, per factor,
its group's posterior effects when the group was fitted ("known"), or, for a
group never seen ("new"), effects drawn for every posterior draw from the
fitted population distribution ``N(0, S)`` with ``S = diag(sd) R diag(sd)``
(``F__sd``, ``F__corr``); a new group's group-level predictors enter through
``F__gamma`` as for fitted groups. Nested labels are composed ``parent/child``
as when fitting, so plot 3 of a new farm is a new plot. The outcome is then
drawn from the family for every draw (posterior predictive), streamed over row
chunks within :data:`hierwork.predictive.MAX_CELLS`.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from . import predictive
from .data import read_table
from .errors import DataError, RunFolderError
from .runs import Run


def predict(run, new_data, seed: int | None = None, interval: float | None = None) -> pd.DataFrame:
    """Posterior predictive summaries for new rows.

    Parameters
    ----------
    run : Run, str or Path
        Run folder written by ``hierwork fit``.
    new_data : pandas.DataFrame, str or Path
        Rows to predict: the run's predictor, group and group-level predictor
        columns (and trials / exposure / known_sd columns when the family uses
        them); the outcome column is not needed.
    seed : int, optional
        Seed of the draws (default: the run's seed).
    interval : float, optional
        Probability of the central interval (default: the run's ``estimates.interval``).

    Returns
    -------
    pandas.DataFrame
        The input columns, then ``pred_mean, pred_sd, pred_lower, pred_upper``
        (the outcome), ``link_mean, link_lower, link_upper`` (the linear
        predictor, without exposure offset), and ``group_status`` (``known`` or
        ``new``; ``farm=known; plot=new`` with several factors).

    Raises
    ------
    DataError
        Missing columns, missing or non-numeric values, unknown categorical levels.
    """
    run = run if isinstance(run, Run) else Run.load(run)
    where = str(new_data) if isinstance(new_data, (str, Path)) else "new data"
    frame = read_table(Path(new_data)) if isinstance(new_data, (str, Path)) else new_data.copy()
    frame.columns = [str(c).strip() for c in frame.columns]
    spec, plan = run.spec, run.plan
    idata = run.posterior
    constants = getattr(idata, "constant_data", None)
    if constants is None:
        raise RunFolderError(f"run folder {str(run.path)!r} has no constant_data in posterior.nc",
                             hint="refit it with this version of hierwork to enable predictions")
    interval = interval or spec.get("estimates", {}).get("interval", 0.94)
    seed = spec["sampling"]["seed"] if seed is None else seed
    _check_columns(frame, _required_columns(spec, plan), where)
    X = _design(frame, plan["terms"], constants, where)
    draws = predictive.draws_of(idata.posterior, plan["factors"])
    rng = np.random.default_rng([int(seed), predictive.STREAM_PREDICT])
    groups, status = [], {}
    labels = _labels(frame, plan["factors"])
    for f in plan["factors"]:
        name = f["name"]
        known = [str(v) for v in idata.posterior[name].values]
        index, new_levels = _group_index(labels[name], known)
        status[name] = np.where(index < len(known), "known", "new")
        draws.effects[name] = np.concatenate(
            [draws.effects[name], _new_effects(idata.posterior, f, len(new_levels), rng)], axis=1)
        W = None
        if f["predictors"]:
            W_known = constants[f"{name}__W"].sel({f"{name}__predictor": f["predictors"]}).values
            W = np.vstack([W_known, _new_group_values(frame, f, labels[name], new_levels, where)])
        cols = [plan["terms"].index(t) for t in f["varying"]]
        groups.append((name, index, cols, W))
    out = spec["outcome"]
    rows = predictive.Rows(X, groups,
                           trials=_numeric(frame, out.get("trials"), where),
                           exposure=_numeric(frame, out.get("exposure"), where),
                           known_sd=_numeric(frame, out.get("known_sd"), where))
    result = frame.copy()
    for key, values in _summaries(draws, rows, plan["family"], rng, interval).items():
        result[key] = values
    names = list(status)
    result["group_status"] = (status[names[0]] if len(names) == 1 else
                              [("; ".join(f"{n}={status[n][i]}" for n in names)) for i in range(len(frame))])
    return result


def _summaries(draws, rows, family, rng, interval) -> dict:
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    keys = ("pred_mean", "pred_sd", "pred_lower", "pred_upper", "link_mean", "link_lower", "link_upper")
    out = {k: np.empty(rows.n) for k in keys}
    for sl in predictive._chunks(draws.n, rows.n):
        eta = predictive.linear_predictor(draws, rows, sl)
        rep = predictive.simulate(family, rng, eta, draws, rows, sl)
        out["pred_mean"][sl], out["pred_sd"][sl] = rep.mean(axis=0), rep.std(axis=0, ddof=1)
        out["pred_lower"][sl], out["pred_upper"][sl] = np.quantile(rep, [lo_q, hi_q], axis=0)
        out["link_mean"][sl] = eta.mean(axis=0)
        out["link_lower"][sl], out["link_upper"][sl] = np.quantile(eta, [lo_q, hi_q], axis=0)
    return out


def _required_columns(spec: dict, plan: dict) -> dict:
    """Column -> what needs it."""
    need = {}
    for p in spec.get("predictors") or []:
        column = p if isinstance(p, str) else p["column"]
        need.setdefault(column, "a population predictor")
    for f in plan["factors"]:
        need.setdefault(f["column"], f"the group labels of {f['name']}")
        for t in f["varying"][1:]:
            need.setdefault(t, f"a varying slope of {f['name']}")
        for c in f["predictors"]:
            need.setdefault(c, f"a group-level predictor of {f['name']}")
    out = spec["outcome"]
    for key in ("trials", "exposure", "known_sd"):
        if out.get(key):
            need.setdefault(out[key], f"outcome.{key}")
    return need


def _check_columns(frame, need: dict, where: str) -> None:
    missing = [c for c in need if c not in frame.columns]
    if missing:
        listed = ", ".join(f"{c!r} ({need[c]})" for c in missing)
        raise DataError(f"missing column{'s' if len(missing) > 1 else ''} {listed}", where=where,
                        hint="the new rows need the same predictor and group columns as the fitted data")
    for column in need:
        blank = frame[column].isna().to_numpy() | frame[column].astype(str).str.strip().eq("").to_numpy()
        if blank.any():
            raise DataError(f"column {column!r} has missing values in {int(blank.sum())} row(s) "
                            f"(first: data row {int(np.argmax(blank)) + 1})", where=where,
                            hint="fill them in or drop those rows; hierwork does not guess")
    if frame.empty:
        raise DataError("no rows to predict", where=where)


def _numeric(frame, column, where) -> np.ndarray | None:
    if column is None:
        return None
    values = pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    if bad.any():
        raise DataError(f"column {column!r} must be numeric; {int(bad.sum())} row(s) are not "
                        f"(first: data row {int(np.argmax(bad)) + 1}, {frame[column].iloc[int(np.argmax(bad))]!r})",
                        where=where)
    return values


def _design(frame, terms, constants, where) -> np.ndarray:
    """The run's population design for the new rows (intercept, numeric, categorical indicators)."""
    columns = [np.ones(len(frame))]
    categorical = {}
    for term in terms[1:]:
        if "[" in term and term.endswith("]") and f"levels__{term.split('[')[0]}" in constants:
            column, level = term[:-1].split("[", 1)
            if column not in categorical:
                known = [str(v) for v in constants[f"levels__{column}"].values]
                labels = frame[column].astype(str).str.strip()
                unknown = sorted(set(labels) - set(known))
                if unknown:
                    raise DataError(f"column {column!r} has level{'s' if len(unknown) > 1 else ''} "
                                    f"{', '.join(map(repr, unknown))} not seen when fitting", where=where,
                                    hint=f"the run knows: {', '.join(map(repr, known))}")
                categorical[column] = labels.to_numpy()
            columns.append((categorical[column] == level).astype(float))
        else:
            columns.append(_numeric(frame, term, where))
    return np.column_stack(columns)


def _labels(frame, factors) -> dict:
    """Group labels per factor, composed ``parent/child`` for nested factors (as in hierwork.data)."""
    raw = {f["name"]: frame[f["column"]].astype(str).str.strip().to_numpy().astype(object) for f in factors}
    parent = {f["name"]: f["within"] for f in factors}
    labels = {}

    def composite(name):
        if name not in labels:
            own = raw[name]
            if parent[name] is not None:
                own = np.array([f"{p}/{c}" for p, c in zip(composite(parent[name]), own)], dtype=object)
            labels[name] = own
        return labels[name]

    for name in raw:
        composite(name)
    return labels


def _group_index(labels, known: list) -> tuple:
    """Index of each row's group in ``known + new levels``, and the new levels (first-seen order)."""
    position = {g: k for k, g in enumerate(known)}
    new_levels = list(pd.unique(pd.Series([g for g in labels if g not in position], dtype=object)))
    position.update({g: len(known) + k for k, g in enumerate(new_levels)})
    return np.array([position[g] for g in labels], dtype=np.int64), new_levels


def _new_effects(posterior, factor: dict, count: int, rng) -> np.ndarray:
    """Effects of ``count`` unseen groups, one independent ``N(0, S)`` draw per posterior draw: (D, count, q)."""
    name, q = factor["name"], len(factor["varying"])
    sd = np.asarray(posterior[f"{name}__sd"].values, dtype=float).reshape(-1, q)
    chol = sd[:, :, None] * (np.linalg.cholesky(np.asarray(posterior[f"{name}__corr"].values).reshape(-1, q, q))
                             if q > 1 else np.ones((1, 1, 1)))
    z = rng.standard_normal((sd.shape[0], count, q))
    return np.einsum("dij,dkj->dki", chol, z)


def _new_group_values(frame, factor: dict, labels, new_levels, where) -> np.ndarray:
    """Group-level predictor values of the new groups (one value per group, checked)."""
    out = np.zeros((len(new_levels), len(factor["predictors"])))
    for k, column in enumerate(factor["predictors"]):
        values = pd.Series(_numeric(frame, column, where))
        spread = values.groupby(pd.Series(labels, dtype=object)).agg(["min", "max", "first"])
        for j, g in enumerate(new_levels):
            lo, hi, first = spread.loc[g]
            if hi - lo > 1e-9 * max(1.0, abs(hi)):
                raise DataError(f"group-level predictor {column!r} is not constant within new "
                                f"{factor['name']} {g!r} (from {lo:g} to {hi:g})", where=where,
                                hint="a group-level predictor takes one value per group")
            out[j, k] = first
    return out
