"""The report's group sections: estimates on the outcome's scale, and how much each group was pooled.

The estimates section leads with the outcome's scale: per factor and term the
sorted estimates (with population and target lines), for probabilities and
rates the funnel of each group's own estimate against its volume, and the
table; the population on the outcome's scale follows. The link scale (group
coefficients and every model parameter) is one click away in a ``<details>``
block, except for identity links, where the two scales are the same.
"""
from __future__ import annotations

from hierwork.report import estimate_figures as figures
from hierwork.report.markup import Raw, el
from hierwork.report.page import FigureSink, banner, data_table, figure_element
from hierwork.report.view import View
from hierwork.formatting import number as fmt

__all__ = ["estimates_section", "pooling_section", "MAX_TABLE_ROWS"]

#: Rows of each group table written into the page; the CSV has them all.
MAX_TABLE_ROWS = 2000
_LINK_COLUMNS = {"factor": "factor", "group": "group", "term": "term", "no_pooling": "own data only",
                 "partial_mean": "partial pooling mean", "partial_sd": "posterior sd", "lower": "lower",
                 "upper": "upper", "complete_pooling": "complete pooling"}


def _outcome_columns(view: View, term: str) -> dict:
    k = view.rank_k
    labels = {"group": "group", "rows": "rows", "trials": "trials", "events": "events", "exposure": "exposure",
              "outcome_mean": "estimate", "outcome_lower": f"{view.level} lower",
              "outcome_upper": f"{view.level} upper", "no_pooling_outcome": "own data only",
              "pooling_weight": "pooling weight", "p_above_population": "P(above population)"}
    if view.target and term == "intercept":
        labels["p_beyond_target"] = "P(beyond target)"
    labels.update({"rank_median": "rank", "rank_lower": "rank from", "rank_upper": "rank to",
                   "p_top": f"P(top {k})", "p_bottom": f"P(bottom {k})"})
    return labels


def _population_rows(view: View, rows):
    """The population rows for display: probabilities in percent (changes in percentage points)."""
    if not view.scale.percent:
        return rows
    shown = rows.copy()
    shown[["mean", "lower", "upper"]] *= 100
    change = shown["parameter"].str.startswith("outcome_change")
    shown["parameter"] = shown["parameter"] + change.map({True: " (pp)", False: " (%)"})
    return shown


def _group_table(view: View, factor: str, term: str) -> list:
    rows = view.rows(factor, term).sort_values("outcome_mean", ascending=False, kind="stable")
    shown = rows.head(MAX_TABLE_ROWS)
    out = []
    if len(rows) > len(shown):
        out.append(el("p", f"Showing the highest {len(shown)} of {len(rows)} groups; all are in ",
                      el("a", "group_estimates.csv", href="group_estimates.csv"), " in the run folder.",
                      class_="note"))
    out.append(data_table(shown, _outcome_columns(view, term), f"Group estimates: {factor}, {term}",
                          sortable=True, shown=view.cells(term != "intercept")))
    return out


def _link_details(view: View, bad) -> Raw:
    """Group coefficients on the link scale and every model parameter; open for an identity link."""
    link, name = view.link
    identity = link == "identity"
    summary = view.run.summary
    content = [el("summary", "Every model parameter" if identity else
                  f"The same on the {name} scale, and every model parameter")]
    if not identity:
        content += [el("p", f"The linear predictor ({name}); each group's intercept row at the same reference "
                       f"values. lower and upper bound the central {view.level} posterior interval.", class_="note"),
                    data_table(view.table.head(MAX_TABLE_ROWS), _LINK_COLUMNS, "Group estimates, link scale",
                               sortable=True)]
    if summary is not None:
        content += [el("p", "Population-level and variance parameters: posterior mean, sd and central "
                       f"{view.level} interval; values beyond the gate's limits are marked \u26a0.", class_="note"),
                    data_table(summary.round({"ess_bulk": 0, "ess_tail": 0}), _SUMMARY_COLUMNS,
                               "Population and variance parameters", sortable=False, bad=bad)]
    return el("details", content, open=identity)


_SUMMARY_COLUMNS = {"parameter": "parameter", "mean": "mean", "sd": "sd", "lower": "lower", "upper": "upper",
                    "ess_bulk": "bulk ESS", "ess_tail": "tail ESS", "r_hat": "R-hat"}


def estimates_section(view: View, bad, stamp: str | None, sink: FigureSink | None) -> Raw:
    """The estimates section (``id="estimates"``); ``bad(column, value)`` flags gate breaches."""
    content = [banner(stamp)]
    if not view.ready:
        content.append(el("p", "group_estimates.csv is missing or has no outcome-scale columns: no group "
                          "estimates to show.", class_="note"))
        return el("section", el("h2", "Estimates"), content, id="estimates",
                  class_="not-for-use" if stamp else None)
    held = f", with the predictors at {view.compared_at}" if view.has_predictors else ""
    content.append(el("p", f"Every value is on the scale of {view.scale.label}{held}. Intervals are central "
                      f"{view.level} posterior intervals; press a column heading to sort a table.", class_="note"))
    for factor, term in view.keys():
        rows = view.rows(factor, term)
        population = view.population(term)
        mean = population["mean"] if population else None
        content.append(el("h3", f"{factor} \u2014 {term}"))
        content.append(figure_element(figures.ranked_plot(rows, factor, term, view.scale, view.run.interval,
                                                          population, view.target, stamp), "",
                                      f"ranked-{factor}-{term}", sink))
        if term == "intercept" and mean is not None:
            content.append(figure_element(figures.funnel_plot(rows, factor, view.scale, view.per, mean, stamp), "",
                                          f"funnel-{factor}", sink))
        content += _group_table(view, factor, term)
    summary = view.run.summary
    outcome_rows = None if summary is None else summary[summary["parameter"].str.startswith("outcome")]
    if outcome_rows is not None and len(outcome_rows):
        content += [el("h3", "The population on the outcome's scale"),
                    el("p", "outcome: a typical group (every group offset at 0) at the reference values; "
                       "outcome_change.TERM: how much that changes when a numeric term rises by one unit, or when a "
                       "categorical predictor moves from its reference level to the term's level.", class_="note"),
                    data_table(_population_rows(view, outcome_rows),
                               {"parameter": "parameter", "mean": "mean", "lower": f"{view.level} lower",
                                "upper": f"{view.level} upper"}, "Population, outcome scale", sortable=False)]
    content.append(_link_details(view, bad))
    return el("section", el("h2", "Estimates"), content, id="estimates", class_="not-for-use" if stamp else None)


def _pooling_factor_text(view: View, factor: str, term: str) -> Raw:
    table = view.run.pooling
    if table is None:
        return el("p", "Pooling factor not recorded (pooling.csv is missing).", class_="note")
    row = table[(table["factor"] == factor) & (table["term"] == term)]
    if row.empty:
        return el("p", f"Pooling factor not recorded for {factor}, {term}.", class_="note")
    value = row["pooling_factor"].iloc[0]
    return el("p", el("strong", f"Pooling factor \u03bb = {fmt(value, 2)}"),
              " (Gelman and Pardoe 2006: 1 \u2212 variance across groups of the posterior mean "
              "effects \u00f7 posterior mean of the variance across groups of the effects). Near "
              "0 each group keeps its own estimate; near 1 all are pulled to the population "
              "value.", class_="lambda")


def pooling_section(view: View, stamp: str | None, sink: FigureSink | None) -> Raw:
    """How much each group was pooled (``id="pooling"``): the pooling figure and factor per factor and term."""
    content = [banner(stamp)]
    if not view.ready:
        content.append(el("p", "group_estimates.csv is missing: no pooling picture.", class_="note"))
    else:
        content.append(el("p", "Each group's pooling weight (group table, column \u201cpooling weight\u201d) is the "
                          "share of its estimate that comes from the population value: v / (v + \u03c4\u00b2), with "
                          "v the sampling variance of the group's own estimate and \u03c4 the spread between groups, "
                          "averaged over the posterior (Efron and Morris 1975; Gelman et al. 2013, section 5.5). "
                          "0: the group's own data decide; 1: it takes the population value.", class_="note"))
        for factor, term in view.keys():
            plot = figures.pooling_plot(view.rows(factor, term), factor, term, view.scale, view.run.interval, stamp)
            content += [el("h3", f"{factor} \u2014 {term}"), _pooling_factor_text(view, factor, term),
                        figure_element(plot, "", f"pooling-{factor}-{term}", sink)]
    return el("section", el("h2", "How much each group was pooled"), content, id="pooling",
              class_="not-for-use" if stamp else None)
