"""Morning summary: ``BATCH_DIR/index.html`` and ``index.md``.

One row per job -- its title, verdict, key numbers, headline estimate (the
population value on the outcome's scale, from ``summary.csv``), the worst
parameter of a failed check (reader-facing names, :mod:`hierwork.names`),
attempts and a link to the report of its best attempt (passed, else the fewest
failing checks, else the latest) -- and, below, every attempt with the remedy
that led to it. The page has the style of report.html
(:func:`hierwork.report.page.page`). Rewritten after every job, through a
temporary file and a rename, so even a batch that was killed leaves a readable
summary.
"""
from __future__ import annotations

import json
import os
import tempfile
import time
from datetime import datetime
from pathlib import Path
from urllib.parse import quote

from hierwork.batch.progress import counts, duration, jobs_text
from hierwork.batch.queue import Queue
from hierwork.formatting import number_against

CAUTION = ("Model-based estimates, to be reviewed by a qualified analyst before decisions "
           "about people's health or safety.")
VERDICTS = {"passed": "passed the gate", "failed": "failed the gate", "invalid": "bad input",
            "crashed": "crashed", "running": "running", "pending": "waiting",
            "interrupted": "interrupted"}
COLUMNS = ("job", "verdict", "attempts", "max R-hat", "min ESS", "divergences", "title", "headline estimate",
           "worst parameter", "time", "report", "note")


def key_numbers(diagnostics: dict | None) -> dict:
    """Largest R-hat, smallest ESS (bulk or tail) and divergences of a ``diagnostics.json`` dict, as text.

    Each value shows enough digits to be told apart from its gate threshold.
    """
    checks = {c.get("name"): c for c in (diagnostics or {}).get("checks", [])
              if isinstance(c.get("value"), (int, float))}

    def shown(name, whole=False):
        check = checks.get(name)
        if check is None:
            return None
        value = round(check["value"]) if whole else check["value"]
        return number_against(value, check.get("threshold"))

    ess = [checks[k] for k in ("ess_bulk", "ess_tail") if k in checks]
    low = min(ess, key=lambda c: c["value"])["name"] if ess else None
    return {"max R-hat": shown("r_hat"), "min ESS": shown(low, whole=True) if low else None,
            "divergences": shown("divergences", whole=True)}


def best_attempt(attempts: list[dict]) -> dict | None:
    """The attempt to show: passed, else the fewest failing checks, else the latest (ties: the latest)."""
    def rank(a):
        diagnostics = json.loads(a["diagnostics"]) if a.get("diagnostics") else None
        if diagnostics is None:
            return (2, 0, -a["number"])
        failed = sum(1 for c in diagnostics.get("checks", []) if not c.get("passed"))
        return (0 if diagnostics.get("passed") else 1, failed, -a["number"])

    return min(attempts, key=rank) if attempts else None


_NO_HEADLINE = {"title": "", "headline estimate": "", "worst parameter": ""}


def headline(run_dir: Path) -> dict:
    """Title, population value on the outcome's scale and worst failing parameters of a run folder, as text."""
    from hierwork.errors import HierworkError
    from hierwork.report.verdict import verdict
    from hierwork.report.view import View
    from hierwork.runfolder import Run

    try:
        run = Run.open(run_dir)
        view = View.of(run)
        population = view.population("intercept")
        failed = verdict(run.diagnostics).failed
        title = run.title
    except (HierworkError, OSError, ValueError, KeyError):  # still being written, or unreadable
        return dict(_NO_HEADLINE)
    estimate = ""
    if population:
        estimate = (f"{view.scale.text(population['mean'])} ({view.level} interval "
                    f"{view.scale.text(population['lower'])} to {view.scale.text(population['upper'])})")
    worst = "; ".join(dict.fromkeys(c.parameter for c in failed if c.parameter))
    return {"title": title, "headline estimate": estimate, "worst parameter": worst}


def rows(batch_dir: Path, queue: Queue) -> list[dict]:
    """The summary's rows: one dict per job with its attempts under ``"attempts"``."""
    result = []
    now = time.time()
    for job in queue.jobs():
        attempts = queue.attempts(job["name"])
        shown = best_attempt(attempts)
        diagnostics = json.loads(shown["diagnostics"]) if shown and shown["diagnostics"] else None
        report = _report(batch_dir, shown)
        took = (job["finished"] or now) - job["started"] if job["started"] else None
        found = headline(batch_dir / shown["run_dir"]) if report else dict(_NO_HEADLINE)
        row = {"job": job["name"], "status": job["status"], "verdict": VERDICTS.get(job["status"], job["status"]),
               "attempts": len(attempts), **key_numbers(diagnostics), **found,
               "shown_attempt": shown["number"] if shown else None,
               "time": duration(took) if took is not None else "", "report": report,
               "note": job["message"] or "", "source": job["source"], "attempt_rows": []}
        for a in attempts:
            row["attempt_rows"].append({
                "number": a["number"], "status": a["status"], "why": a["reason"] or "first attempt",
                "note": a["message"] or "", "report": _report(batch_dir, a),
                **key_numbers(json.loads(a["diagnostics"]) if a["diagnostics"] else None)})
        result.append(row)
    return result


def _report(batch_dir: Path, attempt: dict | None) -> str | None:
    if not attempt:
        return None
    path = f"{attempt['run_dir']}/report.html"
    return path if (batch_dir / path).is_file() else None


def _num(value) -> str:
    return "" if value is None else value


def render_markdown(batch_dir: Path, queue: Queue) -> str:
    """``index.md``: the summary as a Markdown table."""
    data = rows(batch_dir, queue)
    tally = ", ".join(f"{n} {s}" for s, n in counts(queue.jobs()).items()) or "no jobs"
    out = [f"# Batch summary: {_md(batch_dir.name)}", "",
           f"Written {datetime.now():%Y-%m-%d %H:%M}. {jobs_text(len(data))}: {tally}.", "", f"*{CAUTION}*", "",
           "| " + " | ".join(COLUMNS) + " |", "|" + "---|" * len(COLUMNS)]
    for r in data:
        link = f"[report of attempt {r['shown_attempt']}]({quote(r['report'])})" if r["report"] else ""
        cells = [r["job"], r["verdict"], str(r["attempts"]), _num(r["max R-hat"]), _num(r["min ESS"]),
                 _num(r["divergences"]), r["title"], r["headline estimate"], r["worst parameter"], r["time"],
                 link, r["note"]]
        out.append("| " + " | ".join(_md(c) if c != link else c for c in cells) + " |")
    retried = [r for r in data if r["attempts"] > 1]
    if retried:
        out += ["", "## Attempts", ""]
        for r in retried:
            out.append(f"### {_md(r['job'])}")
            for a in r["attempt_rows"]:
                link = f" ([report]({quote(a['report'])}))" if a["report"] else ""
                note = f": {_md(a['note'])}" if a["note"] else ""
                out.append(f"{a['number']}. {_md(a['why'])} -> {a['status']}{note}{link}")
            out.append("")
    return "\n".join(out).rstrip() + "\n"


def _md(text) -> str:
    """User text in Markdown: HTML and Markdown syntax escaped, as in summary.md."""
    from hierwork.report.markdown import md_escape

    return md_escape(text)


def render_html(batch_dir: Path, queue: Queue) -> str:
    """``index.html``: the summary as a self-contained page in the report's style (every user string escaped)."""
    from hierwork.report.markup import el
    from hierwork.report.page import page

    data = rows(batch_dir, queue)
    tally = ", ".join(f"{n} {s}" for s, n in counts(queue.jobs()).items()) or "no jobs"
    head = el("tr", [el("th", c, scope="col", class_="label") for c in COLUMNS])
    body_rows = []
    for r in data:
        link = el("a", f"report of attempt {r['shown_attempt']}", href=quote(r["report"])) if r["report"] else ""
        bad = r["status"] in ("failed", "crashed", "invalid")
        cells = [el("td", r["job"], title=r["source"], class_="label"),
                 el("td", r["verdict"], class_="bad" if bad else "label"),
                 el("td", str(r["attempts"])),
                 *(el("td", _num(r[k])) for k in ("max R-hat", "min ESS", "divergences")),
                 *(el("td", r[k], class_="label") for k in ("title", "headline estimate", "worst parameter")),
                 el("td", r["time"]), el("td", link, class_="label"), el("td", r["note"], class_="label")]
        body_rows.append(el("tr", cells))
    attempts = []
    for r in (r for r in data if r["attempts"] > 1):
        items = []
        for a in r["attempt_rows"]:
            link = [" (", el("a", "report", href=quote(a["report"])), ")"] if a["report"] else ""
            note = f": {a['note']}" if a["note"] else ""
            items.append(el("li", f"{a['why']} \u2192 ", el("strong", a["status"]), note, link))
        attempts.append(el("section", el("h3", f"Attempts: {r['job']}"), el("ol", items)))
    content = el("main",
                 el("header", el("h1", f"Batch summary: {batch_dir.name}"),
                    el("p", f"Written {datetime.now():%Y-%m-%d %H:%M}. {jobs_text(len(data))}: {tally}.")),
                 el("section", el("h2", "Jobs"),
                    el("p", "Headline estimate: the population value (a typical group) on the outcome's scale at "
                       "each run's reference values. The report linked is the job's best attempt: passed, else "
                       "the one with the fewest failing checks.", class_="note"),
                    el("div", el("table", el("thead", head), el("tbody", body_rows)), class_="scroll"), id="jobs"),
                 el("section", el("h2", "Attempts"), attempts, id="attempts") if attempts else "",
                 el("section", el("h2", "Caution"), el("p", CAUTION), id="caution", class_="caution"))
    return page(f"Batch summary: {batch_dir.name}", content, script=False)


def write(batch_dir, queue: Queue) -> None:
    """Write ``index.html`` and ``index.md`` atomically."""
    batch_dir = Path(batch_dir)
    write_atomic(batch_dir / "index.md", render_markdown(batch_dir, queue))
    write_atomic(batch_dir / "index.html", render_html(batch_dir, queue))


def write_atomic(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` through a temporary file and a rename."""
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    with os.fdopen(fd, "w", encoding="utf-8") as handle:
        handle.write(text)
    os.replace(tmp, path)
