"""The self-contained ``report.html`` of a run folder (document and tables: :mod:`hierwork.report.page`).

Sections, in order: verdict; what stands out (:mod:`hierwork.report.standout`);
estimates on the outcome's scale and how much each group was pooled
(:mod:`hierwork.report.groups`); sampler diagnostics; posterior predictive
check and LOO; provenance; caution. Every figure is registered in a
:class:`~hierwork.report.page.FigureSink` when one is given, so that
:func:`hierwork.report.publish.write_report` saves it under ``figures/``.
"""
from __future__ import annotations

import math

from hierwork.plan.describe import missing_text
from hierwork.report import diagnostic_figures as figures
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


def _diagnostics_section(run: Run, idata, v: Verdict, stamp: str | None, sink: FigureSink | None) -> Raw:
    bfmi = next((c.value for c in v.checks if c.name == "bfmi"), None)
    content = [el("h3", "Gate checks"), _checks_table(v)]
    if idata is None:
        content.append(el("p", "posterior.nc is missing: no diagnostic figures.", class_="note"))
    else:
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


def _fit_section(run: Run, idata, stamp: str | None, sink: FigureSink | None) -> Raw:
    ppc = None if idata is None else figures.ppc_plot(idata, stamp)
    content = [el("h3", "Posterior predictive check"),
               figure_element(ppc, "No posterior predictive draws were stored in posterior.nc.", "ppc", sink),
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
    links = [("verdict", "Verdict"), ("standout", "What stands out"), ("estimates", "Estimates"),
             ("pooling", "Pooling"), ("diagnostics", "Diagnostics"), ("fit", "Fit"),
             ("provenance", "Provenance"), ("caution", "Caution")]
    return el("header",
              el("h1", run.title),
              el("p", f"Run {run.name}", _fitted(run)),
              el("nav", [el("a", text, href=f"#{key}") for key, text in links],
                 aria_label="Sections"))


def render_html(run: Run, sink: FigureSink | None = None) -> str:
    """The report of ``run`` (a :class:`~hierwork.runfolder.Run`); its figures go into ``sink`` if given."""
    v = verdict(run.diagnostics)
    stamp = STAMP.get(v.status)
    idata = run.posterior
    view = View.of(run)
    body = el("main",
              _header(run),
              _verdict_section(run, v),
              standout_section(view, stamp),
              estimates_section(view, _gate_breaches(v), stamp, sink),
              pooling_section(view, stamp, sink),
              _diagnostics_section(run, idata, v, stamp, sink),
              sensitivity_section(run, stamp),
              _fit_section(run, idata, stamp, sink),
              _provenance_section(run),
              el("section", el("h2", "Caution"), el("p", CAUTION), id="caution",
                 class_="caution"))
    return page(f"{run.title} \u2014 hierwork report", body)
