"""The report's prior-sensitivity section: advice beside the gate, read from ``sensitivity.csv``.

Not a gate check: a prior-driven parameter is a fact about the question and
the data, not a failed fit. The section names the parameters whose posterior
moves with the priors, says why in words, and warns when the reweighting
behind the numbers cannot be trusted (Pareto k).
"""
from __future__ import annotations

from hierwork.formatting import number as fmt
from hierwork.report.markup import Raw, el
from hierwork.report.page import banner, data_table
from hierwork.runfolder import Run

__all__ = ["sensitivity_section"]

_COLUMNS = {"parameter": "parameter", "prior_sensitivity": "prior sensitivity",
            "likelihood_sensitivity": "likelihood sensitivity", "diagnosis": "diagnosis"}
_EXPLAIN = ("Each parameter's posterior is moved without refitting by raising the priors, or the likelihood, "
            "to a power near 1 and reweighting the draws (power-scaling with Pareto-smoothed importance "
            "sampling; Kallioinen, Paananen, Bürkner and Vehtari 2023). A sensitivity is how far the "
            "posterior moves (a distance from 0 to 1) per doubling of the power; from {threshold} it counts. ")


def sensitivity_section(run: Run, stamp: str | None = None) -> Raw:
    """``<section id="sensitivity">``: the flagged parameters first, then the whole table (marked with
    ``stamp`` when the gate did not pass)."""
    from hierwork.results.sensitivity import CONFLICT, NONE, THRESHOLD, UNRELIABLE, WEAK_LIKELIHOOD

    meaning = {WEAK_LIKELIHOOD: " Likelihood too weak: the data say little about it, so its posterior "
                                "largely restates its prior.",
               CONFLICT: " Prior-data conflict: prior and data pull apart; check the prior's centre and "
                         "scale against what the data show."}
    table = run.sensitivity
    head = el("h2", "How much the priors matter")
    if table is None:
        return el("section", head, el("p", "sensitivity.csv is missing (a run from an older version): "
                                           "no prior sensitivity to show.", class_="note"), id="sensitivity")
    flagged = table[table["diagnosis"] != NONE]
    if table["diagnosis"].eq(UNRELIABLE).any():
        advice = (f"The reweighting is not reliable here (Pareto k {fmt(table['pareto_k'].max())}): to learn "
                  "how much the priors matter, refit with wider and narrower priors and compare the runs.")
    elif flagged.empty:
        advice = "No parameter's posterior moves noticeably with its prior: the data dominate."
    else:
        advice = ("Moved by the priors: " + "; ".join(f"{p} ({d})" for p, d in
                                                    zip(flagged["parameter"], flagged["diagnosis"]))
                  + ". Report these with their priors, or refit with wider and narrower priors to show the range."
                  + "".join(meaning[d] for d in dict.fromkeys(flagged["diagnosis"]) if d in meaning))
    return el("section", head, banner(stamp), el("p", advice),
              el("p", _EXPLAIN.format(threshold=fmt(THRESHOLD)),
                 f"Pareto k of the reweighting: {fmt(table['pareto_k'].max())}.", class_="note"),
              data_table(table, _COLUMNS, "Prior and likelihood sensitivity", sortable=True),
              id="sensitivity", class_="not-for-use" if stamp else None)
