"""The self-contained ``report.html`` of a run folder (document and tables: :mod:`hierwork.report.page`).

Sections, in order (:data:`SECTIONS`, one entry each): verdict; what stands
out (:mod:`hierwork.report.standout`); estimates on the outcome's scale and
how much each group was pooled (:mod:`hierwork.report.groups`); sampler
diagnostics, with the traces of the worst parameter of every failed check;
fit to the data: posterior predictive check, PSIS-LOO with its Pareto k and
calibration (:mod:`hierwork.report.fitcheck`); provenance; caution. Every figure is registered in a
:class:`~hierwork.report.page.FigureSink` when one is given, so that
:func:`hierwork.report.publish.write_report` saves it under ``figures/``.
"""
from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass
from typing import Callable

from hierwork import names
from hierwork.plan.describe import missing_text
from hierwork.report import diagnostic_figures as figures
from hierwork.report import fitcheck
from hierwork.report.groups import estimates_section, pooling_section
from hierwork.report.markup import Raw, el
from hierwork.report.page import CAUTION, STAMP, FigureSink, data_table, figure_element, page
from hierwork.report.sensitivity import sensitivity_section
from hierwork.report.standout import standout_section
from hierwork.report.verdict import Verdict, verdict
from hierwork.report.view import View
from hierwork.runfolder import Run

__all__ = ["render_html"]

_MARK = {"passed": "\u2714", "failed": "\u2716", "unknown": "?"}


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
    dropped = missing_text((run.plan or {}).get("missing") or {})
    if dropped:
        facts.append(dropped)
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


def _diagnostics_section(c: "Context") -> Raw:
    run, idata, v, stamp, sink = c.run, c.idata, c.verdict, c.stamp, c.sink
    bfmi = next((ch.value for ch in v.checks if ch.name == "bfmi"), None)
    content = [el("h3", "Gate checks"), _checks_table(v)]
    if idata is None:
        content.append(el("p", "posterior.nc is missing: no diagnostic figures.", class_="note"))
        return el("section", el("h2", "Sampler diagnostics"), content, id="diagnostics")
    worst = figures.worst_parameters(idata.posterior, v.failed)
    if worst:
        failed_on = "; ".join(f"{ch.label} on {names.readable(ch.parameter)}" for ch in v.failed if ch.parameter)
        content += [el("h3", "What failed: the worst parameters"),
                    figure_element(figures.trace_rank_plot(idata, stamp, worst, f"The gate failed: {failed_on}."),
                                   "", "failed-traces", sink)]
    content += [
        el("h3", "Traces and rank plots"),
        figure_element(figures.trace_rank_plot(idata, stamp),
                       "No population or variance parameters found in posterior.nc.", "traces", sink),
        el("h3", "Energy"),
        figure_element(figures.energy_plot(idata, bfmi, stamp),
                       "posterior.nc holds no sampler energy (sample_stats.energy).", "energy", sink),
        el("h3", "Where divergences happened"),
        figure_element(figures.divergence_plot(idata, run.group_estimates, stamp),
                       "No group standard deviation or divergence record in posterior.nc.",
                       "divergences", sink)]
    return el("section", el("h2", "Sampler diagnostics"), content, id="diagnostics")


def _fit_section(c: "Context") -> Raw:
    run, idata, stamp, sink = c.run, c.idata, c.stamp, c.sink
    outcome = c.view.outcome_column
    ppc = None if idata is None else figures.ppc_plot(idata, stamp, outcome=outcome,
                                                            trials=c.view.outcome_key("trials", "trials"))
    content = [el("h3", "Posterior predictive check"),
               figure_element(ppc, "No posterior predictive draws were stored in posterior.nc.", "ppc", sink),
               el("h3", "Leave-one-out cross-validation (PSIS-LOO)"),
               [el("p", line) for line in fitcheck.loo_sentences(run)]]
    high = fitcheck.high_k_table(run)
    if len(high):
        content.append(data_table(high, {c: c.replace("_", " ") for c in high.columns},
                                  "Rows with Pareto k above 0.7", sortable=True))
    if run.pooling_comparison is not None:
        labels = {c: c.replace("_", " ") for c in run.pooling_comparison.columns}
        content += [el("h4", "Across the pooling spectrum"),
                    el("p", "Expected log predictive density by PSIS-LOO (Vehtari, Gelman and "
                       "Gabry 2017); higher is better, differences within about two standard "
                       "errors are not decisive.", class_="note"),
                    data_table(run.pooling_comparison, labels, "LOO comparison", sortable=False)]
    content += [el("h3", "Calibration of the predictive intervals"),
                [el("p", line) for line in fitcheck.calibration_sentences(run)]]
    table = fitcheck.calibration_table(run)
    if table is not None:
        content.append(data_table(table, {"interval": "nominal interval", "scope": "rows", "coverage": "coverage",
                                          "detail": "detail"}, "Calibration", sortable=False))
    return el("section", el("h2", "Fit to the data"), content, id="fit")


def _overrides(overrides) -> str | None:
    """``key = value; ...`` of the overrides a run was fitted with (None when there were none)."""
    if not overrides:
        return None
    if isinstance(overrides, dict):
        return "; ".join(f"{k} = {json.dumps(v) if isinstance(v, (dict, list)) else v}" for k, v in overrides.items())
    return "; ".join(str(o) for o in overrides)


def _command(command) -> str | None:
    """The recorded command line, with ``.../hierwork/__main__.py`` written as ``python -m hierwork``."""
    if not command:
        return None
    return re.sub(r"^\S*hierwork[/\\]__main__\.py", "python -m hierwork", str(command))


def _provenance_section(c: "Context") -> Raw:
    run = c.run
    prov = run.provenance or {}
    if not prov:
        return el("section", el("h2", "Provenance"),
                  el("p", "provenance.json is missing.", class_="note"), id="provenance")
    fields = [("Spec sha256", prov.get("spec_sha256")), ("Data file", prov.get("data_path")),
              ("Data sha256", prov.get("data_sha256")), ("Seed", prov.get("seed")),
              ("Started", prov.get("started")), ("Finished", prov.get("finished")),
              ("Engine", prov.get("engine")), ("Path", prov.get("path")),
              ("Overrides", _overrides(prov.get("overrides"))), ("Command", _command(prov.get("command")))]
    items = [[el("dt", k), el("dd", el("code", val) if k in ("Command", "Overrides") else val)]
             for k, val in fields if val not in (None, "")]
    reproduce = prov.get("reproduce")
    packages = prov.get("packages") or {}
    content = [el("dl", items)]
    if reproduce:
        content += [el("h3", "Reproduce this run"), el("pre", el("code", reproduce))]
    if packages:
        content += [el("h3", "Package versions"),
                    el("p", ", ".join(f"{k} {v}" for k, v in packages.items()))]
    if run.spec_text is not None:
        content += [el("h3", "Spec as run"), el("pre", el("code", run.spec_text))]
    return el("section", el("h2", "Provenance"), content, id="provenance")


def _fitted(run: Run) -> str:
    finished = (run.provenance or {}).get("finished")
    return f" \u00b7 fitted {finished}" if finished else ""


@dataclass(frozen=True)
class Context:
    """What every section renders from: the run, its posterior, the verdict, the stamp, the figure sink, the view."""

    run: Run
    idata: object
    verdict: Verdict
    stamp: str | None
    sink: FigureSink | None
    view: View


@dataclass(frozen=True)
class Section:
    """One section of the page: element id, link text in the header, and the function that renders it."""

    id: str
    nav: str
    render: Callable[[Context], Raw]


#: The report's sections in page order; a new section is one entry here.
SECTIONS = (
    Section("verdict", "Verdict", lambda c: _verdict_section(c.run, c.verdict)),
    Section("standout", "What stands out", lambda c: standout_section(c.view, c.stamp)),
    Section("estimates", "Estimates", lambda c: estimates_section(c.view, _gate_breaches(c.verdict), c.stamp,
                                                                  c.sink)),
    Section("pooling", "Pooling", lambda c: pooling_section(c.view, c.stamp, c.sink)),
    Section("diagnostics", "Diagnostics", _diagnostics_section),
    Section("sensitivity", "Priors", lambda c: sensitivity_section(c.run, c.stamp)),
    Section("fit", "Fit", _fit_section),
    Section("provenance", "Provenance", _provenance_section),
    Section("caution", "Caution", lambda c: el("section", el("h2", "Caution"), el("p", CAUTION), id="caution",
                                               class_="caution")),
)


def _header(run: Run) -> Raw:
    return el("header",
              el("h1", run.title),
              el("p", f"Run {run.name}", _fitted(run)),
              el("nav", [el("a", s.nav, href=f"#{s.id}") for s in SECTIONS], aria_label="Sections"))


def render_html(run: Run, sink: FigureSink | None = None) -> str:
    """The report of ``run`` (a :class:`~hierwork.runfolder.Run`); its figures go into ``sink`` if given."""
    v = verdict(run.diagnostics)
    context = Context(run, run.posterior, v, STAMP.get(v.status), sink, View.of(run))
    body = el("main", _header(run), [s.render(context) for s in SECTIONS])
    return page(f"{run.title} \u2014 hierwork report", body)
