"""Morning summary: ``BATCH_DIR/index.html`` and ``index.md``.

One row per job (verdict, key numbers of the run that counts, attempts, a link
to its report) and, below, every attempt with the remedy that led to it.
Rewritten after every job, through a temporary file and a rename, so even a
batch that was killed leaves a readable summary.
"""
from __future__ import annotations

import html
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
COLUMNS = ("job", "verdict", "attempts", "max R-hat", "min ESS", "divergences", "time", "report", "note")


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


def rows(batch_dir: Path, queue: Queue) -> list[dict]:
    """The summary's rows: one dict per job with its attempts under ``"attempts"``."""
    result = []
    now = time.time()
    for job in queue.jobs():
        attempts = queue.attempts(job["name"])
        shown = next((a for a in attempts if a["number"] == job["counting"]), attempts[-1] if attempts else None)
        diagnostics = json.loads(shown["diagnostics"]) if shown and shown["diagnostics"] else None
        report = _report(batch_dir, shown)
        took = (job["finished"] or now) - job["started"] if job["started"] else None
        row = {"job": job["name"], "status": job["status"], "verdict": VERDICTS.get(job["status"], job["status"]),
               "attempts": len(attempts), **key_numbers(diagnostics),
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
        link = f"[report]({quote(r['report'])})" if r["report"] else ""
        cells = [r["job"], r["verdict"], str(r["attempts"]), _num(r["max R-hat"]), _num(r["min ESS"]),
                 _num(r["divergences"]), r["time"], link, r["note"]]
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
    """``index.html``: the summary as a self-contained page (every user string escaped)."""
    e = html.escape
    data = rows(batch_dir, queue)
    tally = ", ".join(f"{n} {s}" for s, n in counts(queue.jobs()).items()) or "no jobs"
    body = [f"<h1>Batch summary: {e(batch_dir.name)}</h1>",
            f"<p>Written {datetime.now():%Y-%m-%d %H:%M}. {jobs_text(len(data))}: {e(tally)}.</p>",
            f'<p class="caution">{e(CAUTION)}</p>',
            "<table><thead><tr>" + "".join(f"<th>{e(c)}</th>" for c in COLUMNS) + "</tr></thead><tbody>"]
    for r in data:
        link = f'<a href="{e(quote(r["report"]))}">report</a>' if r["report"] else ""
        cells = [f'<td title="{e(r["source"])}">{e(r["job"])}</td>',
                 f'<td class="{e(r["status"])}">{e(r["verdict"])}</td>',
                 f"<td>{r['attempts']}</td>",
                 *(f'<td class="num">{_num(r[k])}</td>'
                   for k in ("max R-hat", "min ESS", "divergences")),
                 f"<td>{e(r['time'])}</td>", f"<td>{link}</td>", f"<td>{e(r['note'])}</td>"]
        body.append("<tr>" + "".join(cells) + "</tr>")
    body.append("</tbody></table>")
    for r in (r for r in data if r["attempts"] > 1):
        body.append(f"<h2>Attempts: {e(r['job'])}</h2><ol>")
        for a in r["attempt_rows"]:
            link = f' (<a href="{e(quote(a["report"]))}">report</a>)' if a["report"] else ""
            note = f": {e(a['note'])}" if a["note"] else ""
            body.append(f"<li>{e(a['why'])} &rarr; <span class=\"{e(a['status'])}\">{e(a['status'])}</span>"
                        f"{note}{link}</li>")
        body.append("</ol>")
    return PAGE.format(title=e(f"Batch summary: {batch_dir.name}"), body="\n".join(body))


PAGE = """<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{title}</title>
<style>
body {{ font: 15px/1.45 system-ui, sans-serif; margin: 2rem auto; max-width: 72rem; color: #1d2a33; }}
table {{ border-collapse: collapse; width: 100%; }}
th, td {{ border-bottom: 1px solid #d5dde3; padding: .35rem .6rem; text-align: left; vertical-align: top; }}
th {{ background: #eef3f6; }}
td.num {{ text-align: right; font-variant-numeric: tabular-nums; }}
.passed {{ color: #1f6e43; }} .failed, .crashed, .invalid {{ color: #9c2b23; font-weight: 600; }}
.caution {{ border-left: 4px solid #c98a12; padding-left: .7rem; }}
</style></head>
<body>
{body}
</body></html>
"""


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
