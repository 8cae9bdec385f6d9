"""What ``loo.json`` and ``calibration.json`` say, in words and tables, for report.html and summary.md.

Nothing is computed here: the Pareto k counts and the rows beyond 0.7 come
from ``loo.json`` (:mod:`hierwork.results.loo`), the coverage of the central
predictive intervals overall and per factor from ``calibration.json``
(:mod:`hierwork.results.predictive`).
"""
from __future__ import annotations

import pandas as pd

from hierwork.formatting import number, share
from hierwork.runfolder import Run

__all__ = ["loo_sentences", "high_k_rows", "high_k_table", "calibration_table", "calibration_sentences", "MAX_NAMED_ROWS"]

#: Rows with a high Pareto k named in the text (the table lists all that loo.json holds).
MAX_NAMED_ROWS = 10
LOO_SOURCE = "Vehtari, Gelman and Gabry 2017, Statistics and Computing 27, 1413\u20131432"


def _partial(loo: dict | None) -> dict | None:
    return ((loo or {}).get("models") or {}).get("partial_pooling")


def loo_sentences(run: Run) -> list[str]:
    """The run's PSIS-LOO in words: elpd, the Pareto k count against 0.7 and what to do about it."""
    loo = run.loo
    if loo is None:
        return ["loo.json is absent from the run folder: no leave-one-out check to show."]
    record = _partial(loo)
    notes = [str(n) for n in loo.get("notes", [])]
    if record is None:
        return ["PSIS-LOO was not computed for this run" + (f": {notes[0]}." if notes else ".")]
    unit = str(loo.get("unit", "row"))
    what = "rows" if unit == "row" else f"units ({unit})"
    bad = float(loo.get("pareto_k_bad", 0.7))
    count, n = int(record.get("pareto_k_above_0.7", 0)), int(record.get("n", 0))
    lines = [f"Expected log predictive density (PSIS-LOO, {LOO_SOURCE}): {number(record['elpd_loo'])} "
             f"(standard error {number(record['se'])}; effective number of parameters p_loo "
             f"{number(record['p_loo'])}), over {n} {what}."]
    if count:
        named = high_k_rows(run)
        listed = "; ".join(_row_text(r) for r in named[:MAX_NAMED_ROWS])
        more = f" and {count - MAX_NAMED_ROWS} more" if count > MAX_NAMED_ROWS else ""
        lines.append(f"{count} of {n} {what} have a Pareto k above {number(bad)} (largest "
                     f"{number(record['pareto_k_max'], 3)}), so their leave-one-out estimates are unreliable (rows counted from 1 in the data as modelled)"
                     + (f": {listed}{more}." if listed else ".")
                     + " Such rows are influential: the fit changes a lot without them. Look at them in the data "
                       "(entry errors, unusual groups), consider a family with heavier tails or more "
                       "dispersion, or compare models by K-fold cross-validation instead of PSIS-LOO.")
    else:
        lines.append(f"Every Pareto k is at most {number(bad)} (largest {number(record['pareto_k_max'], 3)}): "
                     "the leave-one-out estimates are reliable.")
    lines += [n if n.endswith(".") else n + "." for n in notes]
    return lines


def _row_text(row: dict) -> str:
    groups = ", ".join(f"{f} {g}" for f, g in row.get("groups", {}).items())
    return (f"row {int(row['row']) + 1} (" + (groups + ", " if groups else "")
            + f"outcome {number(row['outcome'])}, k = {number(row['pareto_k'], 3)})")


def high_k_rows(run: Run) -> list[dict]:
    """The rows of ``loo.json`` with Pareto k above 0.7, highest first (may be empty)."""
    record = _partial(run.loo) or {}
    return list(record.get("pareto_k_high_rows", []))


def high_k_table(run: Run) -> pd.DataFrame:
    """The rows with a high Pareto k as a table: row (counted from 1 in the data as modelled), groups, outcome, k."""
    rows = high_k_rows(run)
    return pd.DataFrame([{"row": int(r["row"]) + 1, **r.get("groups", {}), "outcome": r["outcome"],
                          "pareto_k": r["pareto_k"]} for r in rows])


def calibration_table(run: Run) -> pd.DataFrame | None:
    """One row per nominal level and scope (all rows, then each factor's median and worst group)."""
    calibration = run.calibration
    if not calibration or not calibration.get("levels"):
        return None
    rows = []
    for level in calibration["levels"]:
        nominal = float(level["nominal"])
        rows.append({"interval": share(nominal), "scope": "all rows", "coverage": share(level["coverage"]),
                     "detail": f"{level.get('rows', '')} rows"})
        for factor, f in (level.get("by_factor") or {}).items():
            rows.append({"interval": share(nominal), "scope": f"{factor}: median group",
                         "coverage": share(f["median"]), "detail": f"{f['groups']} groups, "
                         f"from {share(f['min'])} to {share(f['max'])}"})
            rows.append({"interval": share(nominal), "scope": f"{factor}: worst group",
                         "coverage": share(f["min"]), "detail": f"{f['worst_group']} ({f['worst_group_rows']} rows)"})
    return pd.DataFrame(rows)


def calibration_sentences(run: Run) -> list[str]:
    """Coverage against nominal in words, naming each factor's worst group at the smallest level."""
    calibration = run.calibration
    if not calibration or not calibration.get("levels"):
        return ["calibration.json is absent from the run folder: no calibration to show."]
    levels = calibration["levels"]
    lines = ["Share of observed outcomes inside the central posterior predictive intervals: "
             + ", ".join(f"{share(lv['coverage'])} inside the {share(lv['nominal'])} interval" for lv in levels)
             + ". Close to nominal (a little above, in-sample; at least nominal for counts) means the "
               "predictive spread fits the data."]
    first = levels[0]
    for factor, f in (first.get("by_factor") or {}).items():
        lines.append(f"{factor}: the worst group, {f['worst_group']} ({f['worst_group_rows']} rows), has "
                     f"{share(f['min'])} of its rows inside the {share(first['nominal'])} interval "
                     f"(median over {f['groups']} groups {share(f['median'])}).")
    return lines
