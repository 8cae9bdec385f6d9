"""``summary.md``: the verdict, what stands out and the headline tables in Markdown.

For pull requests and wikis; it leads with the outcome's scale, like the HTML
report, and keeps the model's parameters in a ``<details>`` block when they are
on another (link) scale. User-controlled text is escaped so that it shows
literally: Markdown punctuation gets a backslash and ``< > &`` become HTML
entities (many Markdown renderers pass raw HTML through).
"""
from __future__ import annotations

import re

import pandas as pd

from hierwork.formatting import number as fmt
from hierwork.plan.describe import missing_text
from hierwork.report import fitcheck
from hierwork.report.page import CAUTION
from hierwork.report.standout import comparison_sentence, factor_sentences, groups_to_show
from hierwork.report.verdict import verdict
from hierwork.report.view import View
from hierwork.runfolder import Run

__all__ = ["render_markdown", "md_escape"]

#: Group rows listed per factor and term; the CSV has them all.
MAX_GROUP_ROWS = 25
# Characters that change meaning inside a line of Markdown (``$`` opens math on
# several hosts); punctuation that matters only at the start of a line never
# starts one here, because every line begins with our own text.
_SPECIAL = re.compile(r"([\\`*_\[\]|~$])")


def md_escape(value) -> str:
    """Escape ``value`` for Markdown text and table cells, on one line."""
    text = " ".join(str(value).split())
    text = text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
    return _SPECIAL.sub(r"\\\1", text)


def _table(frame: pd.DataFrame, columns: dict, shown: dict | None = None) -> list[str]:
    cols = [c for c in columns if c in frame.columns]
    shown = shown or {}
    lines = ["| " + " | ".join(md_escape(columns[c]) for c in cols) + " |",
             "|" + "|".join("---" if pd.api.types.is_numeric_dtype(frame[c]) is False else "---:"
                            for c in cols) + "|"]
    for record in frame[cols].itertuples(index=False):
        cells = [md_escape(shown[c](v)) if c in shown else fmt(v) if pd.api.types.is_number(v) else md_escape(v)
                 for c, v in zip(cols, record)]
        lines.append("| " + " | ".join(cells) + " |")
    return lines


def _standout(view: View) -> list[str]:
    lines = ["## What stands out", ""]
    if not view.ready:
        return lines + ["group\\_estimates.csv has no outcome-scale columns: refit to see them.", ""]
    lines += [md_escape(comparison_sentence(view)), ""]
    population = view.population("intercept")
    if population:
        lines += [md_escape(f"Population value (a typical group): {view.scale.text(population['mean'])} "
                            f"({view.level} interval {view.scale.text(population['lower'])} to "
                            f"{view.scale.text(population['upper'])})."), ""]
    for factor, term in view.keys():
        lines += [f"- {md_escape(line)}" for line in factor_sentences(view, factor, term)]
        rows, total = groups_to_show(view, factor, term, MAX_GROUP_ROWS)
        if total > len(rows):
            lines += ["", f"The {len(rows)} farthest above and below of the {total} groups that stand out; all are in "
                          "group_estimates.csv."]
        if len(rows):
            columns = {"group": "group", "outcome_mean": "estimate", "outcome_lower": f"{view.level} lower",
                       "outcome_upper": f"{view.level} upper", "p_above_population": "P(above population)",
                       **({"p_beyond_target": "P(beyond target)"} if view.target and term == "intercept" else {}),
                       "rank_median": "rank"}
            lines += ["", *_table(rows, columns, view.cells(term != "intercept"))]
        lines.append("")
    contrasts = view.run.contrasts
    if contrasts is not None and len(contrasts):
        lines += ["### Contrasts", "", *_table(contrasts, {
            "factor": "factor", "group_a": "A", "group_b": "B", "term": "term", "difference": "A - B",
            "lower": f"{view.level} lower", "upper": f"{view.level} upper", "p_positive": "P(A higher)"},
            view.cells(True)), ""]
    return lines


def _groups(view: View) -> list[str]:
    if not view.ready:
        return []
    lines = ["## Group estimates", "", md_escape(f"On the scale of {view.scale.label}; highest first."), ""]
    for factor, term in view.keys():
        rows = view.rows(factor, term).sort_values("outcome_mean", ascending=False, kind="stable")
        top, bottom = MAX_GROUP_ROWS - MAX_GROUP_ROWS // 2, MAX_GROUP_ROWS // 2
        shown = rows if len(rows) <= MAX_GROUP_ROWS else pd.concat([rows.head(top), rows.tail(bottom)])
        lines += [f"### {md_escape(factor)}: {md_escape(term)}", ""]
        if len(rows) > len(shown):
            lines += [f"The {top} highest and {bottom} lowest of {len(rows)} groups; all are in "
                      "group\\_estimates.csv.", ""]
        lines += _table(shown, {"group": "group", "rows": "rows", "trials": "trials", "exposure": "exposure",
                                "outcome_mean": "estimate", "outcome_lower": f"{view.level} lower",
                                "outcome_upper": f"{view.level} upper", "no_pooling_outcome": "own data only",
                                "pooling_weight": "pooling weight", "rank_median": "rank"},
                        view.cells(term != "intercept")) + [""]
    return lines


def _paragraphs(sentences: list[str]) -> list[str]:
    """Each sentence its own Markdown paragraph."""
    return [line for sentence in sentences for line in (md_escape(sentence), "")]


def render_markdown(run: Run) -> str:
    """The ``summary.md`` text of ``run``."""
    v = verdict(run.diagnostics)
    view = View.of(run)
    lines = [f"# {md_escape(run.title)}", "", f"**{md_escape(v.headline)}**", ""]
    dropped = missing_text((run.plan or {}).get("missing") or {})
    if dropped:
        lines += [md_escape(dropped[0].upper() + dropped[1:]) + ".", ""]
    if v.failed:
        lines += [f"- {md_escape(c.sentence())}" for c in v.failed] + [""]
    if v.advice:
        lines += ["What to try:", ""] + [f"- {md_escape(a)}" for a in v.advice if a] + [""]
    if v.status != "passed":
        lines += ["> **Not for use:** the estimates below are shown only to diagnose the fit.", ""]
    lines += _standout(view) + _groups(view)
    level = f"{run.interval:.0%}"
    if run.summary is not None:
        link, name = view.link
        title = "Model parameters" + ("" if link == "identity" else f" ({md_escape(name)} scale)")
        table = _table(run.summary.round({"ess_bulk": 0}), {
            "parameter": "parameter", "mean": "mean", "sd": "sd", "lower": f"{level} lower",
            "upper": f"{level} upper", "r_hat": "R-hat", "ess_bulk": "bulk ESS"})
        lines += ([f"## {title}", "", *table, ""] if link == "identity" else
                  [f"<details><summary>{title}</summary>", "", *table, "", "</details>", ""])
    if run.pooling is not None:
        lines += ["## Pooling factor (Gelman and Pardoe 2006)", "",
                  *_table(run.pooling, {"factor": "factor", "term": "term",
                                        "n_groups": "groups", "pooling_factor": "lambda"}), ""]
    lines += ["## Fit to the data", "", "### Leave-one-out (PSIS-LOO)", "",
              *_paragraphs(fitcheck.loo_sentences(run))]
    high = fitcheck.high_k_table(run)
    if len(high):
        lines += [*_table(high, {c: c.replace("_", " ") for c in high.columns}), ""]
    lines += ["### Calibration of the predictive intervals", "", *_paragraphs(fitcheck.calibration_sentences(run))]
    calibration = fitcheck.calibration_table(run)
    if calibration is not None:
        lines += [*_table(calibration, {"interval": "nominal interval", "scope": "rows", "coverage": "coverage",
                                        "detail": "detail"}), ""]
    reproduce = (run.provenance or {}).get("reproduce")
    if reproduce:
        lines += ["## Reproduce", "", "```", str(reproduce).replace("```", "'''"), "```", ""]
    lines += ["## Caution", "", CAUTION, "",
              "The full report with figures is report.html in the run folder.", ""]
    return "\n".join(lines)
