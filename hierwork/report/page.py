"""The pieces every report page is built from: the locked-down document, tables, figures, banners.

One file: inline CSS, figures as data URIs, a few lines of inline script to
sort tables, and a Content-Security-Policy that lets the page load nothing
from anywhere (``default-src 'none'``; only data-URI images and the exact
inline style and script, by hash). Every user-controlled string is escaped by
:mod:`hierwork.report.markup`.
"""
from __future__ import annotations

import base64
import hashlib
import math
import re
from importlib import resources

import pandas as pd

from hierwork.formatting import number as fmt
from hierwork.report.markup import Raw, el
from hierwork.report.plotting import Plot

__all__ = ["CAUTION", "STAMP", "page", "data_table", "FigureSink", "figure_element", "banner"]

CAUTION = ("These are model-based estimates. They depend on the model, its priors and the "
           "data, and carry the uncertainty shown. Decisions about people's health or safety "
           "need review by a qualified analyst and must follow local rules.")
#: Printed across every figure, and above every table, of a run whose gate did not pass.
STAMP = {"failed": "GATE FAILED \u2013 NOT FOR USE", "unknown": "NOT CHECKED \u2013 NOT FOR USE"}


def _asset(name: str) -> str:
    return resources.files("hierwork.report").joinpath(name).read_text(encoding="utf-8")


def _hash(text: str) -> str:
    return "'sha256-" + base64.b64encode(hashlib.sha256(text.encode()).digest()).decode() + "'"


def page(title: str, body: Raw, script: bool = True) -> str:
    """A complete HTML document with the report's style, ``body`` and (optionally)
    the table-sorting script, locked down by a Content-Security-Policy."""
    css = _asset("style.css")
    js = _asset("sort.js") if script else ""
    policy = (f"default-src 'none'; img-src data:; style-src {_hash(css)}; "
              f"script-src {_hash(js) if js else chr(39) + 'none' + chr(39)}; "
              "base-uri 'none'; form-action 'none'")
    head = el("head",
              el("meta", charset="utf-8"),
              el("meta", http_equiv="Content-Security-Policy", content=policy),
              el("meta", name="viewport", content="width=device-width, initial-scale=1"),
              el("meta", name="generator", content="hierwork"),
              el("title", title),
              Raw(f"<style>{css}</style>"))
    tail = Raw(f"<script>{js}</script>") if js else Raw("")
    return "<!DOCTYPE html>\n" + el("html", head, el("body", body, tail), lang="en") + "\n"


class FigureSink(dict):
    """The figures of a page by their element id, to be saved under ``figures/`` as ``ID.svg`` and ``ID.png``."""

    def add(self, key: str, plot: Plot) -> str:
        """Register ``plot`` under a file-safe, unique version of ``key``; returns that id."""
        base = re.sub(r"[^A-Za-z0-9_-]+", "-", key).strip("-").lower() or "figure"
        name, k = base, 2
        while name in self:
            name, k = f"{base}-{k}", k + 1
        self[name] = plot
        return name


def figure_element(plot: Plot | None, missing: str, key: str, sink: FigureSink | None = None) -> Raw:
    """``<figure>`` with the plot, its text alternative and caption; ``missing`` as a note when absent."""
    if plot is None:
        return el("p", missing, class_="note") if missing else Raw("")
    if sink is not None:
        key = sink.add(key, plot)
    return el("figure",
              el("img", src=plot.uri, alt=plot.alt, loading="lazy"),
              el("figcaption", plot.caption), id=key)


def banner(stamp: str | None) -> Raw:
    if not stamp:
        return Raw("")
    return el("p", f"{stamp}: these numbers are shown only to diagnose the fit.", class_="banner")


def _number_cell(value, bad: bool = False, show=fmt) -> Raw:
    number = float(value) if value is not None and not isinstance(value, str) else math.nan
    text = [show(value)]
    if bad:
        text += [" \u26a0", el("span", " (fails the gate)", class_="sr-only")]
    return el("td", text, data_value="NaN" if math.isnan(number) else repr(number),
              class_="bad" if bad else None)


def data_table(frame: pd.DataFrame, labels: dict, caption: str, sortable: bool,
               bad=lambda column, value: False, shown: dict | None = None) -> Raw:
    """A table of ``frame``'s columns named in ``labels`` (column -> header).

    ``bad(column, value)`` marks cells (e.g. beyond a gate limit); ``sortable``
    adds header buttons handled by the page's sort script; ``shown`` maps a
    column to the function that writes its values (default: the number formatter).
    """
    columns = [c for c in labels if c in frame.columns]
    text_columns = {c for c in columns if not pd.api.types.is_numeric_dtype(frame[c])}
    shown = shown or {}

    def header(c):
        content = el("button", labels[c], type="button") if sortable else labels[c]
        return el("th", content, scope="col", class_="label" if c in text_columns else None)

    rows = []
    for record in frame[columns].itertuples(index=False):
        cells = [el("td", v, class_="label") if c in text_columns else _number_cell(v, bad(c, v), shown.get(c, fmt))
                 for c, v in zip(columns, record)]
        rows.append(el("tr", cells))
    return el("div", el("table", el("caption", caption, class_="sr-only"),
                        el("thead", el("tr", [header(c) for c in columns])),
                        el("tbody", rows), class_="sortable" if sortable else None),
              class_="scroll")
