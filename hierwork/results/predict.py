"""Predictions for new rows from a finished run folder.

A new row's linear predictor uses the run's population terms (the design stored
in ``plan.json``, so the columns are exactly those of the fit) and, per factor,
its group's posterior effects when the group was fitted ("known"), or, for a
group never seen ("new"), effects drawn for every posterior draw from the
fitted population distribution ``N(0, S)`` with ``S = diag(sd) R diag(sd)``
(``F__sd``, ``F__corr``), and, with ``spread: varying``, a log residual-SD offset
from ``N(0, F__spread_sd^2)``; a new group's group-level predictors enter through
``F__gamma`` as for fitted groups. Group labels follow the fit's rule
(:mod:`hierwork.data.labels`), so plot 3 of a new farm is a new plot. The
outcome is then drawn from the family for every draw (posterior predictive),
streamed over row chunks.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd

from hierwork.data.labels import group_labels
from hierwork.data.reading import is_csv, read_table, shown_value, varying_within
from hierwork.data.rows import RowRef, blank, numeric
from hierwork.errors import DataError, RunFolderError
from hierwork.inference import seeds
from hierwork.plan.design import Design, Term
from hierwork.plan.estimands import Estimands
from hierwork.plan.families import get_family
from hierwork.plan.families.base import OutcomeRows
from hierwork.results.draws import Draws, Rows, chunks, draws_of, linear_predictor
from hierwork.runfolder import Run

#: The columns ``predict`` adds to the input rows.
COLUMNS = ("pred_mean", "pred_sd", "pred_lower", "pred_upper", "outcome_mean", "outcome_lower", "outcome_upper",
           "link_mean", "link_lower", "link_upper")


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
        (the outcome of the row, drawn from the family: counts for the row's
        trials or exposure), ``outcome_mean, outcome_lower, outcome_upper`` (the
        expected outcome on the outcome's scale, as in ``group_estimates.csv``:
        a probability, a rate per ``estimates.rate_per`` units of exposure, or
        the outcome's units), ``link_mean, link_lower, link_upper`` (the linear
        predictor, without exposure offset), and ``group_status`` (``known`` or
        ``new``; ``farm=known; plot=new`` with several factors).

    Raises
    ------
    DataError
        Missing columns, missing or non-numeric values, unknown categorical levels.
    HierworkError
        An interval outside [0.5, 1).
    """
    from hierwork.errors import HierworkError

    run = run if isinstance(run, Run) else Run.load(run)
    if interval is not None and not 0.5 <= interval < 1:
        raise HierworkError(f"interval must be at least 0.5 and below 1, got {interval:g}", where="interval")
    frame, ref = read_rows(new_data, "new data", "no rows to predict", text_columns=text_columns(run))
    interval = interval or run.interval
    cells = new_rows(run, frame, ref, seed, "predict")
    result = frame.copy()
    for key, values in _summaries(cells.draws, cells.rows, cells.family, cells.estimands, cells.rng,
                                  interval).items():
        result[key] = values
    names = list(cells.status)
    result["group_status"] = (cells.status[names[0]] if len(names) == 1 else
                              [("; ".join(f"{n}={cells.status[n][i]}" for n in names)) for i in range(len(frame))])
    return result


def plan_parts(run: Run) -> tuple:
    """The run's family, factors and population design from ``plan.json``; one line if it is damaged."""
    plan = run.plan or {}
    try:  # a damaged plan.json is the run folder's fault, not a bug
        family = get_family(plan["family"])
        factors = [SimpleNamespace(**f) for f in plan["factors"]]
        for f in factors:
            f.name, f.column, f.within, f.predictors  # noqa: B018  (every field predict reads)
        design = Design.from_dict(plan["design"])
    except (KeyError, TypeError, ValueError, AttributeError) as exc:
        raise RunFolderError(f"plan.json is damaged (missing or malformed: {exc})", where=str(run.path / "plan.json"),
                             hint="rerun the fit to rewrite it") from None
    return family, factors, design


def text_columns(run: Run) -> list:
    """Columns read as the text in the file, exactly as when fitting: group columns and categorical levels."""
    _, factors, design = plan_parts(run)
    return [f.column for f in factors] + list(design.levels)


def read_rows(data, name: str, empty: str, hint: str | None = None, text_columns=()) -> tuple:
    """A table given as a DataFrame or a file (CSV, Parquet): its rows (columns stripped) and their references.

    ``name`` stands for a DataFrame in messages; ``empty`` is the message when there are no rows;
    ``text_columns`` are read as written (labels such as ``07`` or ``NA`` stay labels).
    """
    if isinstance(data, (str, Path)):
        frame = read_table(Path(data), list(text_columns))
        ref = RowRef.of(str(data), len(frame), is_csv(Path(data)))
    else:
        frame = data.copy()
        ref = RowRef.of(name, len(frame), csv=False)
    frame.columns = [str(c).strip() for c in frame.columns]
    if frame.empty:
        raise DataError(empty, where=ref.where, hint=hint)
    return frame, ref


@dataclass
class NewRows:
    """Posterior draws extended to the groups of some new rows, and those rows (see the module docstring).

    ``status[F]`` says per row whether its group of ``F`` was ``known`` or ``new``; ``rng`` is the
    stream that drew the new groups' effects (``predict`` goes on drawing outcomes from it).
    """

    draws: Draws
    rows: Rows
    family: object
    estimands: Estimands
    status: dict
    rng: np.random.Generator


def new_rows(run: Run, frame: pd.DataFrame, ref: RowRef, seed: int | None, stream: str,
             outcome_columns: bool = True) -> NewRows:
    """Check rows against a run's design and groups and give the draws that evaluate them.

    ``outcome_columns``: whether the family's trials / exposure / known-SD columns are
    needed (draws of the outcome need them; its expected value does not).
    """
    spec, plan = run.spec, run.plan
    family, factors, design = plan_parts(run)
    seed = run.seed if seed is None else seed
    outcome = spec["outcome"] if outcome_columns else {}
    need = _required_columns(design, factors, outcome)
    _check_columns(frame, need, ref)
    for column in design.columns:
        if column not in design.levels:
            numeric(frame, column, "predictor", ref)
    design.check_levels(frame, ref.where)
    design.check_values(frame, ref)
    X = design.matrix(frame)
    idata = run.posterior
    draws = draws_of(idata.posterior, factors, _parameters(family, idata.posterior))
    rng = seeds.rng(seed, stream)
    groups, status = [], {}
    labels = group_labels(frame, factors)
    for f in factors:
        known = [str(v) for v in idata.posterior[f.name].values]
        index, new_levels = _group_index(labels[f.name], known)
        status[f.name] = np.where(index < len(known), "known", "new")
        draws.effects[f.name] = np.concatenate(
            [draws.effects[f.name], _new_effects(idata.posterior, f, len(new_levels), rng)], axis=1)
        if f.name in draws.spreads:  # a new group's log residual SD offset: N(0, F__spread_sd^2) per draw
            scale = np.asarray(idata.posterior[f"{f.name}__spread_sd"].values, dtype=float).reshape(-1, 1)
            draws.spreads[f.name] = np.concatenate(
                [draws.spreads[f.name], scale * rng.standard_normal((scale.shape[0], len(new_levels)))], axis=1)
        W = None
        if f.predictors:
            constants = getattr(idata, "constant_data", None)
            if constants is None or f"{f.name}__W" not in constants:
                raise RunFolderError(f"run folder {str(run.path)!r} lacks the group-level predictor values "
                                     f"of {f.name} in posterior.nc", hint="refit it with this version of hierwork")
            W_known = constants[f"{f.name}__W"].sel({f"{f.name}__predictor": list(f.predictors)}).values
            W = np.vstack([W_known, _new_group_values(frame, f, labels[f.name], new_levels, ref)])
        groups.append((f.name, index, [design.index(t) for t in f.varying], W))
    columns = {key: (numeric(frame, outcome[key], key, ref) if outcome.get(key) else None)
               for key in ("trials", "exposure", "known_sd")}
    rows = Rows(X, groups, OutcomeRows(None, **columns))
    estimands = Estimands.from_dict(plan["estimands"]) if plan.get("estimands") else Estimands(np.ones(1))
    return NewRows(draws, rows, family, estimands, status, rng)


def _parameters(family, posterior) -> list:
    """The family's parameters stored in the posterior (none for known SDs)."""
    candidates = family.parameters(OutcomeRows(None)) + family.parameters(OutcomeRows(None, known_sd=np.ones(1)))
    return [name for name in dict.fromkeys(candidates) if name in posterior]


def _summaries(draws, rows, family, estimands, rng, interval) -> dict:
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    out = {k: np.empty(rows.n) for k in COLUMNS}
    for sl in chunks(draws.n, rows.n):
        eta = linear_predictor(draws, rows, sl)
        params = draws.family_params(rows, sl)
        rep = family.simulate(rng, eta, rows.outcome.rows(sl), params)
        out["pred_mean"][sl], out["pred_sd"][sl] = rep.mean(axis=0), rep.std(axis=0, ddof=1)
        out["pred_lower"][sl], out["pred_upper"][sl] = np.quantile(rep, [lo_q, hi_q], axis=0)
        expected = estimands.outcome(family, eta, params)
        out["outcome_mean"][sl] = expected.mean(axis=0)
        out["outcome_lower"][sl], out["outcome_upper"][sl] = np.quantile(expected, [lo_q, hi_q], axis=0)
        out["link_mean"][sl] = eta.mean(axis=0)
        out["link_lower"][sl], out["link_upper"][sl] = np.quantile(eta, [lo_q, hi_q], axis=0)
    return out


def _required_columns(design: Design, factors, outcome: dict) -> dict:
    """Column -> what needs it."""
    need = {}
    for column in design.columns:
        need.setdefault(column, "a population predictor")
    for f in factors:
        need.setdefault(f.column, f"the group labels of {f.name}")
        for c in group_design_of(f).columns:
            need.setdefault(c, f"a group-level predictor of {f.name}")
    for key in ("trials", "exposure", "known_sd"):
        if outcome.get(key):
            need.setdefault(outcome[key], f"outcome.{key}")
    return need


def _check_columns(frame, need: dict, ref: RowRef) -> None:
    missing = [c for c in need if c not in frame.columns]
    if missing:
        listed = ", ".join(f"{c!r} ({need[c]})" for c in missing)
        raise DataError(f"missing column{'s' if len(missing) > 1 else ''} {listed}", where=ref.where,
                        hint="the new rows need the same predictor and group columns as the fitted data")
    for column in need:
        mask = blank(frame[column])
        if mask.any():
            raise DataError(f"column {column!r} has missing values in {ref.text(mask)}", where=ref.where,
                            hint="fill them in or drop those rows; hierwork does not guess")


def _group_index(labels, known: list) -> tuple:
    """Index of each row's group in ``known + new levels``, and the new levels (first-seen order)."""
    position = {g: k for k, g in enumerate(known)}
    new_levels = list(pd.unique(pd.Series([g for g in labels if g not in position], dtype=object)))
    position.update({g: len(known) + k for k, g in enumerate(new_levels)})
    return np.array([position[g] for g in labels], dtype=np.int64), new_levels


def _new_effects(posterior, factor, count: int, rng) -> np.ndarray:
    """Effects of ``count`` unseen groups, one independent ``N(0, S)`` draw per posterior draw: (D, count, q)."""
    name, q = factor.name, len(factor.varying)
    sd = np.asarray(posterior[f"{name}__sd"].values, dtype=float).reshape(-1, q)
    chol = sd[:, :, None] * (np.linalg.cholesky(np.asarray(posterior[f"{name}__corr"].values).reshape(-1, q, q))
                             if q > 1 else np.ones((1, 1, 1)))
    z = rng.standard_normal((sd.shape[0], count, q))
    return np.einsum("dij,dkj->dki", chol, z)


def group_design_of(factor) -> Design:
    """A factor's group-level predictor design from plan.json (numeric columns in runs that predate it)."""
    stored = getattr(factor, "predictor_design", None)
    if stored is not None:
        return Design.from_dict(stored)
    return Design(tuple(Term(c, "numeric", c) for c in factor.predictors))


def _new_group_values(frame, factor, labels, new_levels, ref: RowRef) -> np.ndarray:
    """Group-level predictor values of the new groups (one value per group, checked), as rows of ``W``."""
    design = group_design_of(factor)
    for column in design.columns:
        if column not in design.levels:
            numeric(frame, column, "group-level predictor", ref)
        varying = [v for v in varying_within(frame[column].to_numpy(), labels) if v[0] in set(new_levels)]
        if varying:
            g, lo, hi = varying[0]
            raise DataError(f"group-level predictor {column!r} is not constant within new "
                            f"{factor.name} {g!r} (from {shown_value(lo)} to {shown_value(hi)})", where=ref.where,
                            hint="a group-level predictor takes one value per group")
    rows = pd.Series(np.arange(len(frame))).groupby(pd.Series(labels, dtype=object), sort=False).first()
    firsts = frame.iloc[rows.loc[new_levels].to_numpy()] if new_levels else frame.iloc[:0]
    if len(firsts):
        design.check_levels(firsts, ref.where)
    return design.matrix(firsts) if len(firsts) else np.zeros((0, len(design.terms)))
