"""Writing a run folder's report files: ``report.html`` and ``summary.md``.

``write_report`` is called at the end of ``hierwork fit`` and by ``hierwork
report RUN``; ``render_report`` gives the HTML text only. No statistics are
computed here: everything is read from the run folder's files.
"""
from __future__ import annotations

from dataclasses import dataclass

from hierwork.report.html import render_html
from hierwork.report.markdown import render_markdown
from hierwork.report.verdict import verdict
from hierwork.runfolder import Run, write_atomic

__all__ = ["render_report", "write_report", "WrittenReport", "REPORT_FILES"]

#: Files written into the run folder by :func:`write_report`.
REPORT_FILES = ("report.html", "summary.md")


def render_report(run) -> str:
    """Return the HTML report of ``run`` (a run folder path or an object with ``.path``).

    Raises
    ------
    hierwork.RunFolderError
        If the folder is missing, holds no run files, or a file is unreadable.
    """
    return render_html(Run.open(run))


@dataclass(frozen=True)
class WrittenReport:
    """What :func:`write_report` wrote, and the gate's verdict in words."""

    paths: dict
    status: str
    headline: str


def write_report(run) -> WrittenReport:
    """Write ``report.html`` and ``summary.md`` into the run folder.

    Both texts are rendered before anything is written; each file then
    replaces its old version atomically, so a failure leaves the old files.

    Returns
    -------
    WrittenReport
        The path of each written file, keyed by file name, and the verdict.
    """
    files = Run.open(run)
    texts = {"report.html": render_html(files), "summary.md": render_markdown(files)}
    for name, text in texts.items():
        write_atomic(files.path / name, text)
    v = verdict(files.diagnostics)
    return WrittenReport({name: files.path / name for name in texts}, v.status, v.headline)
