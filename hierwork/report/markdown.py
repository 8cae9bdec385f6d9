"""``summary.md``: the verdict and headline tables in Markdown.

For pull requests and wikis. User-controlled text is escaped so that it shows
literally: Markdown punctuation gets a backslash and ``< > &`` become HTML
entities (many Markdown renderers pass raw HTML through).
"""
from __future__ import annotations

import re

import pandas as pd

from hierwork.report.html import CAUTION
from hierwork.formatting import number as fmt
from hierwork.report.verdict import verdict
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


def _table(frame: pd.DataFrame, columns: dict) -> list[str]:
    cols = [c for c in columns if c in frame.columns]
    lines = ["| " + " | ".join(columns[c] for c in cols) + " |",
             "|" + "|".join("---" if pd.api.types.is_numeric_dtype(frame[c]) is False else "---:"
                            for c in cols) + "|"]
    for record in frame[cols].itertuples(index=False):
        cells = [fmt(v) if pd.api.types.is_number(v) else md_escape(v) for v in record]
        lines.append("| " + " | ".join(cells) + " |")
    return lines


def render_markdown(run: Run) -> str:
    """The ``summary.md`` text of ``run``."""
    v = verdict(run.diagnostics)
    lines = [f"# {md_escape(run.title)}", "", f"**{md_escape(v.headline)}**", ""]
    if v.failed:
        lines += [f"- {md_escape(c.sentence())}" for c in v.failed] + [""]
    if v.advice:
        lines += ["What to try:", ""] + [f"- {md_escape(a)}" for a in v.advice if a] + [""]
    if v.status != "passed":
        lines += ["> **Not for use:** the estimates below are shown only to diagnose the fit.", ""]
    level = f"{run.interval:.0%}"
    if run.summary is not None:
        lines += ["## Population and variance parameters", "",
                  *_table(run.summary.round({"ess_bulk": 0}), {"parameter": "parameter", "mean": "mean", "sd": "sd",
                                        "lower": f"{level} lower", "upper": f"{level} upper",
                                        "r_hat": "R-hat", "ess_bulk": "bulk ESS"}), ""]
    if run.pooling is not None:
        lines += ["## Pooling factor (Gelman and Pardoe 2006)", "",
                  *_table(run.pooling, {"factor": "factor", "term": "term",
                                        "n_groups": "groups", "pooling_factor": "lambda"}), ""]
    if run.group_estimates is not None:
        lines += ["## Group estimates", ""]
        for (factor, term), rows in run.group_estimates.groupby(["factor", "term"], sort=False):
            lines += [f"### {md_escape(factor)}: {md_escape(term)}", ""]
            shown = rows.sort_values("n", kind="stable").head(MAX_GROUP_ROWS)
            if len(rows) > len(shown):
                lines += [f"The {len(shown)} smallest of {len(rows)} groups; all are in "
                          "group\\_estimates.csv.", ""]
            lines += _table(shown, {"group": "group", "n": "n", "no_pooling": "own data only",
                                    "partial_mean": "partial pooling",
                                    "lower": f"{level} lower", "upper": f"{level} upper",
                                    "complete_pooling": "complete pooling"}) + [""]
    reproduce = (run.provenance or {}).get("reproduce")
    if reproduce:
        lines += ["## Reproduce", "", "```", str(reproduce).replace("```", "'''"), "```", ""]
    lines += ["## Caution", "", CAUTION, "",
              "The full report with figures is report.html in the run folder.", ""]
    return "\n".join(lines)
