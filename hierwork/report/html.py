"""The self-contained ``report.html`` of a run folder.

One file: inline CSS, figures as data URIs, a few lines of inline script to
sort tables, and a Content-Security-Policy that lets the page load nothing
from anywhere (``default-src 'none'``; only data-URI images and the exact
inline style and script, by hash). Every user-controlled string is escaped by
:mod:`hierwork.report.markup`.

Sections, in order: verdict, pooling picture, estimate tables, sampler
diagnostics, posterior predictive check and LOO, provenance, caution.
"""
from __future__ import annotations

import base64
import hashlib
import math
from importlib import resources

import pandas as pd

from hierwork.report import figures
from hierwork.report.markup import Raw, el
from hierwork.formatting import number as fmt
from hierwork.report.verdict import Verdict, verdict
from hierwork.runfolder import Run

__all__ = ["render_html", "CAUTION", "page", "data_table"]

CAUTION = ("These are model-based estimates. They depend on the model, its priors and the "
           "data, and carry the uncertainty shown. Decisions about people's health or safety "
           "need review by a qualified analyst and must follow local rules.")
#: Rows of the group table written into the page; the CSV has them all.
MAX_TABLE_ROWS = 2000
_MARK = {"passed": "\u2714", "failed": "\u2716", "unknown": "?"}
#: Printed across every figure, and above every table, of a run whose gate did not pass.
_STAMP = {"failed": "GATE FAILED \u2013 NOT FOR USE", "unknown": "NOT CHECKED \u2013 NOT FOR USE"}


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


def _figure(plot: figures.Plot | None, missing: str, key: str) -> Raw:
    if plot is None:
        return el("p", missing, class_="note")
    return el("figure",
              el("img", src=plot.uri, alt=plot.alt, loading="lazy"),
              el("figcaption", plot.caption), id=key)


def _number_cell(value, bad: bool = False) -> Raw:
    number = float(value) if value is not None and not isinstance(value, str) else math.nan
    text = [fmt(value)]
    if bad:
        text += [" \u26a0", el("span", " (fails the gate)", class_="sr-only")]
    return el("td", text, data_value="NaN" if math.isnan(number) else repr(number),
              class_="bad" if bad else None)


def data_table(frame: pd.DataFrame, labels: dict, caption: str, sortable: bool,
           bad=lambda column, value: False) -> Raw:
    """A table of ``frame``'s columns named in ``labels`` (column -> header).

    ``bad(column, value)`` marks cells (e.g. beyond a gate limit); ``sortable``
    adds header buttons handled by the page's sort script.
    """
    columns = [c for c in labels if c in frame.columns]
    text_columns = {c for c in columns if not pd.api.types.is_numeric_dtype(frame[c])}

    def header(c):
        content = el("button", labels[c], type="button") if sortable else labels[c]
        return el("th", content, scope="col", class_="label" if c in text_columns else None)

    rows = []
    for record in frame[columns].itertuples(index=False):
        cells = [el("td", v, class_="label") if c in text_columns else _number_cell(v, bad(c, v))
                 for c, v in zip(columns, record)]
        rows.append(el("tr", cells))
    return el("div", el("table", el("caption", caption, class_="sr-only"),
                        el("thead", el("tr", [header(c) for c in columns])),
                        el("tbody", rows), class_="sortable" if sortable else None),
              class_="scroll")


# --- sections ----------------------------------------------------------------------

def _verdict_section(run: Run, v: Verdict) -> Raw:
    items = []
    if v.status == "failed":
        items.append(el("ul", [el("li", c.sentence()) for c in v.failed]))
        if v.advice:
            items += [el("p", el("strong", "What to try:")),
                      el("ul", [el("li", a) for a in v.advice if a])]
        items.append(el("p", "The estimates below are shown for diagnosis only: do not use them.",
                        class_="banner"))
    elif v.status == "unknown":
        items.append(el("p", "Treat every estimate below as unchecked."))
    facts = _facts(run)
    if facts:
        items.append(el("p", " \u00b7 ".join(facts), class_="facts"))
    if run.missing:
        items.append(el("p", "Missing from this run folder: " + ", ".join(run.missing)
                        + ". Sections that need them say so.", class_="note"))
    return el("section",
              el("h2", "Verdict", class_="sr-only"),
              el("p", el("span", _MARK[v.status], class_="mark", aria_hidden="true"), v.headline,
                 class_="headline"),
              items, id="verdict", class_=f"verdict {v.status}", role="status")


def _facts(run: Run) -> list[str]:
    facts = [f"outcome: {run.family}"]
    if run.group_estimates is not None:
        sizes = run.group_estimates.groupby("factor", sort=False)["group"].nunique()
        facts += [f"{factor}: {count} groups" for factor, count in sizes.items()]
    diag = run.diagnostics or {}
    if diag.get("chains") and diag.get("draws_per_chain"):
        facts.append(f"{diag['chains']} chains \u00d7 {diag['draws_per_chain']} draws")
    digest = (run.provenance or {}).get("data_sha256")
    if digest:
        facts.append(f"data sha256 {str(digest)[:12]}\u2026")
    return facts


def _banner(stamp: str | None) -> Raw:
    if not stamp:
        return Raw("")
    return el("p", f"{stamp}: these numbers are shown only to diagnose the fit.",
              class_="banner")


def _pooling_factor_text(run: Run, factor: str, term: str) -> Raw:
    table = run.pooling
    if table is None:
        return el("p", f"Pooling factor not recorded (pooling.csv is missing).", class_="note")
    row = table[(table["factor"] == factor) & (table["term"] == term)]
    if row.empty:
        return el("p", f"Pooling factor not recorded for {factor}, {term}.", class_="note")
    value = row["pooling_factor"].iloc[0]
    return el("p", el("strong", f"Pooling factor \u03bb = {fmt(value, 2)}"),
              " (Gelman and Pardoe 2006: 1 \u2212 variance across groups of the posterior mean "
              "effects \u00f7 posterior mean of the variance across groups of the effects). Near "
              "0 each group keeps its own estimate; near 1 all are pulled to the population "
              "value.", class_="lambda")


def _pooling_section(run: Run, stamp: str | None) -> Raw:
    table = run.group_estimates
    content = []
    if table is None:
        content.append(el("p", "group_estimates.csv is missing: no pooling picture.", class_="note"))
    else:
        keys = table[["factor", "term"]].drop_duplicates().itertuples(index=False)
        for number, (factor, term) in enumerate(keys):
            rows = table[(table["factor"] == factor) & (table["term"] == term)]
            plot = figures.pooling_plot(rows, factor, term, run.family, run.interval, stamp)
            content += [el("h3", f"{factor} \u2014 {term}"),
                        _pooling_factor_text(run, factor, term),
                        _figure(plot, "", f"pooling-{number}")]
    return el("section", el("h2", "How much each group was pooled"), _banner(stamp),
              content, id="pooling", class_="not-for-use" if stamp else None)


_GROUP_COLUMNS = {"factor": "factor", "group": "group", "term": "term", "n": "n",
                  "no_pooling": "own data only", "partial_mean": "partial pooling mean",
                  "partial_sd": "posterior sd", "lower": "lower", "upper": "upper",
                  "complete_pooling": "complete pooling", "shrinkage": "shrinkage"}
_SUMMARY_COLUMNS = {"parameter": "parameter", "mean": "mean", "sd": "sd", "lower": "lower",
                    "upper": "upper", "ess_bulk": "bulk ESS", "ess_tail": "tail ESS",
                    "r_hat": "R-hat"}


def _gate_breaches(v: Verdict):
    """Return ``bad(column, value)`` flagging summary cells beyond the gate's limits."""
    limits = {c.name: c for c in v.checks if c.name in ("r_hat", "ess_bulk", "ess_tail")}

    def bad(column, value):
        check = limits.get(column)
        if check is None or value is None or check.threshold is None:
            return False
        value = float(value)
        if math.isnan(value):
            return True
        return value < check.threshold if check.comparison.startswith(">") else value > check.threshold

    return bad


def _estimates_section(run: Run, v: Verdict, stamp: str | None) -> Raw:
    level = f"{run.interval:.0%}"
    content = [_banner(stamp), el("h3", "Group estimates")]
    table = run.group_estimates
    if table is None:
        content.append(el("p", "group_estimates.csv is missing.", class_="note"))
    else:
        shown = table.head(MAX_TABLE_ROWS)
        content.append(el("p", f"Each group's coefficient on the {figures.scale_name(run.family)} "
                          f"scale with population predictors at 0; lower and upper bound the "
                          f"central {level} posterior interval. Press a column heading to sort.",
                          class_="note"))
        if len(table) > len(shown):
            content.append(el("p", f"Showing the first {len(shown)} of {len(table)} rows; all are "
                              "in ", el("a", "group_estimates.csv", href="group_estimates.csv"),
                              " in the run folder.", class_="note"))
        content.append(data_table(shown, _GROUP_COLUMNS, "Group estimates", sortable=True))
    content.append(el("h3", "Population and variance parameters"))
    if run.summary is None:
        content.append(el("p", "summary.csv is missing.", class_="note"))
    else:
        content.append(el("p", f"Posterior mean, sd and central {level} interval; values beyond "
                          "the gate's limits are marked \u26a0.", class_="note"))
        shown = run.summary.round({"ess_bulk": 0, "ess_tail": 0})
        content.append(data_table(shown, _SUMMARY_COLUMNS, "Population and variance parameters",
                              sortable=False, bad=_gate_breaches(v)))
    return el("section", el("h2", "Estimates"), content, id="estimates",
              class_="not-for-use" if stamp else None)


def _checks_table(v: Verdict) -> Raw:
    if not v.checks:
        return el("p", "diagnostics.json is missing: no checks to show.", class_="note")
    rows = [el("tr", el("td", c.label, class_="label"), el("td", c.value_text),
               el("td", c.limit_text), el("td", c.parameter or "-", class_="label"),
               el("td", "pass" if c.passed else "FAIL", class_=None if c.passed else "bad"))
            for c in v.checks]
    head = el("tr", [el("th", h, scope="col") for h in
                     ("check", "value", "limit", "worst parameter", "result")])
    return el("div", el("table", el("thead", head), el("tbody", rows)), class_="scroll")


def _diagnostics_section(run: Run, idata, v: Verdict, stamp: str | None) -> Raw:
    bfmi = next((c.value for c in v.checks if c.name == "bfmi"), None)
    content = [el("h3", "Gate checks"), _checks_table(v)]
    if idata is None:
        content.append(el("p", "posterior.nc is missing: no diagnostic figures.", class_="note"))
    else:
        content += [
            el("h3", "Traces and rank plots"),
            _figure(figures.trace_rank_plot(idata, stamp),
                    "No population or variance parameters found in posterior.nc.", "traces"),
            el("h3", "Energy"),
            _figure(figures.energy_plot(idata, bfmi, stamp),
                    "posterior.nc holds no sampler energy (sample_stats.energy).", "energy"),
            el("h3", "Where divergences happened"),
            _figure(figures.divergence_plot(idata, run.group_estimates, stamp),
                    "No group standard deviation or divergence record in posterior.nc.",
                    "divergences")]
    return el("section", el("h2", "Sampler diagnostics"), content, id="diagnostics")


def _fit_section(run: Run, idata, stamp: str | None) -> Raw:
    ppc = None if idata is None else figures.ppc_plot(idata, stamp)
    content = [el("h3", "Posterior predictive check"),
               _figure(ppc, "No posterior predictive draws were stored in posterior.nc.", "ppc"),
               el("h3", "LOO comparison of pooling choices")]
    if run.pooling_comparison is None:
        content.append(el("p", f"Not stored (pooling_comparison.csv is absent from the run folder).",
                          class_="note"))
    else:
        labels = {c: c.replace("_", " ") for c in run.pooling_comparison.columns}
        content += [el("p", "Expected log predictive density by PSIS-LOO (Vehtari, Gelman and "
                       "Gabry 2017); higher is better, differences within about two standard "
                       "errors are not decisive.", class_="note"),
                    data_table(run.pooling_comparison, labels, "LOO comparison", sortable=False)]
    return el("section", el("h2", "Fit to the data"), content, id="fit")


def _provenance_section(run: Run) -> Raw:
    prov = run.provenance or {}
    if not prov:
        return el("section", el("h2", "Provenance"),
                  el("p", "provenance.json is missing.", class_="note"), id="provenance")
    fields = [("Spec sha256", prov.get("spec_sha256")), ("Data file", prov.get("data_path")),
              ("Data sha256", prov.get("data_sha256")), ("Seed", prov.get("seed")),
              ("Started", prov.get("started")), ("Finished", prov.get("finished")),
              ("Engine", prov.get("engine")), ("Overrides", prov.get("overrides") or None),
              ("Command", prov.get("command"))]
    items = [[el("dt", k), el("dd", el("code", val) if k == "Command" else val)]
             for k, val in fields if val not in (None, "")]
    reproduce = prov.get("reproduce")
    packages = prov.get("packages") or {}
    content = [el("dl", items)]
    if reproduce:
        content += [el("h3", "Reproduce this run"), el("pre", el("code", reproduce))]
    if packages:
        content += [el("h3", "Package versions"),
                    el("p", ", ".join(f"{k} {v}" for k, v in packages.items())),]
    if run.spec_text is not None:
        content += [el("h3", "Spec as run"), el("pre", el("code", run.spec_text))]
    return el("section", el("h2", "Provenance"), content, id="provenance")


def _fitted(run: Run) -> str:
    finished = (run.provenance or {}).get("finished")
    return f" \u00b7 fitted {finished}" if finished else ""


def _header(run: Run) -> Raw:
    links = [("verdict", "Verdict"), ("pooling", "Pooling"), ("estimates", "Estimates"),
             ("diagnostics", "Diagnostics"), ("fit", "Fit"), ("provenance", "Provenance"),
             ("caution", "Caution")]
    return el("header",
              el("h1", run.title),
              el("p", f"Run {run.name}", _fitted(run)),
              el("nav", [el("a", text, href=f"#{key}") for key, text in links],
                 aria_label="Sections"))


def render_html(run: Run) -> str:
    """The report of ``run`` (a :class:`~hierwork.runfolder.Run`)."""
    v = verdict(run.diagnostics)
    stamp = _STAMP.get(v.status)
    idata = run.posterior
    body = el("main",
              _header(run),
              _verdict_section(run, v),
              _pooling_section(run, stamp),
              _estimates_section(run, v, stamp),
              _diagnostics_section(run, idata, v, stamp),
              _fit_section(run, idata, stamp),
              _provenance_section(run),
              el("section", el("h2", "Caution"), el("p", CAUTION), id="caution",
                 class_="caution"))
    return page(f"{run.title} \u2014 hierwork report", body)
