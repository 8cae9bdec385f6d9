"""The report's "What stands out" section: groups away from the population or beyond the target, and contrasts.

Right after the verdict, in words and in a table. A group stands out when the
central interval of its difference from the population value (a typical group
at the same reference values) lies wholly above or below zero
(:func:`~hierwork.report.view.away_from_population`), or when the
probability that it is beyond ``estimates.target`` exceeds
:data:`TARGET_PROBABILITY`. The requested contrasts (``contrasts.csv``) follow.
Every number comes from the run folder's files.
"""
from __future__ import annotations

import pandas as pd

from hierwork.formatting import probability
from hierwork.report.markup import Raw, el
from hierwork.report.page import banner, data_table
from hierwork.report.view import View, away_from_population, term_what

__all__ = ["standout_section", "standing_out", "comparison_sentence", "factor_sentences", "TARGET_PROBABILITY"]

#: ``p_beyond_target`` above which a group is named as beyond the target (the issue's rule).
TARGET_PROBABILITY = 0.9
#: Groups named in a sentence; the table lists up to MAX_ROWS.
NAMED, MAX_ROWS = 6, 50


def comparison_sentence(view: View) -> str:
    """Where and on which scale groups are compared, in one sentence."""
    if view.has_predictors:
        return f"Groups are compared at {view.compared_at}, on the scale of {view.scale.label}."
    return f"Groups are compared on the scale of {view.scale.label} (the model has no predictors to hold fixed)."


def standing_out(view: View, factor: str, term: str) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Groups of one factor and term clearly above / below the population value, and beyond the target.

    Each from the farthest: above highest first, below lowest first.
    """
    rows = view.rows(factor, term).sort_values("outcome_mean", ascending=False, kind="stable")
    high, low = away_from_population(rows, view.run.interval)
    above, below = rows[high], rows[low].iloc[::-1]
    beyond = rows[rows["p_beyond_target"] > TARGET_PROBABILITY] if view.target and term == "intercept" else rows.iloc[:0]
    return above, below, beyond


def groups_to_show(view: View, factor: str, term: str, limit: int) -> tuple[pd.DataFrame, int]:
    """The groups that stand out as a table shows them, highest first, and how many stand out.

    Over ``limit``, the farthest on each side: as many below as above, where
    both sides have that many (then the groups beyond the target, up to ``limit``).
    """
    above, below, beyond = standing_out(view, factor, term)
    total = len(pd.concat([above, below, beyond]).drop_duplicates(["group"]))
    if total > limit:
        low = min(len(below), max(limit // 2, limit - len(above)))
        above, below = above.head(limit - low), below.head(low)
    rows = pd.concat([above, below, beyond]).drop_duplicates(["group"]).head(limit)
    return rows.sort_values("outcome_mean", ascending=False, kind="stable"), total


def _names(view: View, rows: pd.DataFrame, change: bool) -> str:
    named = [f"{g} ({view.scale.text(v, change)})" for g, v in zip(rows["group"], rows["outcome_mean"])][:NAMED]
    return ", ".join(named) + (f" and {len(rows) - NAMED} more" if len(rows) > NAMED else "")


def factor_sentences(view: View, factor: str, term: str) -> list:
    above, below, beyond = standing_out(view, factor, term)
    count = len(view.rows(factor, term))
    change = term != "intercept"
    what = f" ({term_what(term)})" if term != "intercept" else ""
    level = view.level
    lines = []
    if len(above) or len(below):
        parts = []
        if len(above):
            parts.append(f"{len(above)} above it: {_names(view, above, change)}")
        if len(below):
            parts.append(f"{len(below)} below it: {_names(view, below, change)}")
        away = len(above) + len(below)
        lines.append(f"{factor}{what}: {away} of {count} groups {'differs' if away == 1 else 'differ'} from the "
                     f"population value (the {level} interval of the difference excludes zero); "
                     + "; ".join(parts) + ".")
    else:
        lines.append(f"{factor}{what}: no group differs clearly from the population value (no {level} interval "
                     f"of a difference excludes zero; {count} groups).")
    if view.target and term == "intercept":
        target = view.target
        side = "above" if target["direction"] == "above" else "below"
        if len(beyond):
            lines.append(f"{len(beyond)} of {count} groups {'is' if len(beyond) == 1 else 'are'} {side} the target of "
                         f"{view.scale.text(target['value'])} with probability above {TARGET_PROBABILITY:g}: "
                         f"{_names(view, beyond, False)}.")
        else:
            lines.append(f"No group is {side} the target of {view.scale.text(target['value'])} with probability "
                         f"above {TARGET_PROBABILITY:g}.")
    return lines


def _table(view: View, factor: str, term: str) -> Raw:
    rows, total = groups_to_show(view, factor, term, MAX_ROWS)
    if rows.empty:
        return Raw("")
    labels = {"group": "group", "rows": "rows", "trials": "trials", "exposure": "exposure",
              "outcome_mean": "estimate", "outcome_lower": f"{view.level} lower", "outcome_upper": f"{view.level} upper",
              "p_above_population": "P(above population)", "rank_median": "rank",
              "rank_lower": "rank from", "rank_upper": "rank to"}
    if view.target and term == "intercept":
        labels["p_beyond_target"] = "P(beyond target)"
    note = (el("p", f"The {len(rows)} farthest above and below of the {total} groups that stand out; all are in "
                    "group_estimates.csv.", class_="note") if total > len(rows) else Raw(""))
    return el("div", note, data_table(rows, labels, f"Groups that stand out: {factor}, {term}",
                                      sortable=True, shown=view.cells(term != "intercept")))


def _contrasts(view: View) -> list:
    table = view.run.contrasts
    if table is None or table.empty:
        return []
    sentences = []
    for r in table.itertuples(index=False):
        what = f" ({term_what(r.term)})" if r.term != "intercept" else ""
        sentences.append(el("li", f"{r.factor}{what}: {r.group_a} minus {r.group_b} = "
                                  f"{view.scale.text(r.difference, True)} ({view.level} interval "
                                  f"{view.scale.text(r.lower, True)} to {view.scale.text(r.upper, True)}); "
                                  f"probability that {r.group_a} is higher: {probability(r.p_positive)}."))
    return [el("h3", "Contrasts"), el("ul", sentences)]


def standout_section(view: View, stamp: str | None) -> Raw:
    """The "What stands out" section (``id="standout"``)."""
    content = [banner(stamp)]
    if not view.ready:
        content.append(el("p", "group_estimates.csv is missing or has no outcome-scale columns (written by an "
                          "older version): refit to see which groups stand out.", class_="note"))
    else:
        content.append(el("p", comparison_sentence(view)))
        population = view.population("intercept")
        if population:
            content.append(el("p", el("strong", f"Population value (a typical group): "
                                      f"{view.scale.text(population['mean'])}"),
                              f" ({view.level} interval {view.scale.text(population['lower'])} to "
                              f"{view.scale.text(population['upper'])})."))
        for factor, term in view.keys():
            content += [el("p", line) for line in factor_sentences(view, factor, term)]
            content.append(_table(view, factor, term))
        content += _contrasts(view)
    return el("section", el("h2", "What stands out"), content, id="standout",
              class_="not-for-use" if stamp else None)
