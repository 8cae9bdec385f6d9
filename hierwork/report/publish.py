"""Writing a run folder's report files: ``report.html``, ``summary.md`` and ``figures/``.

``write_report`` is called at the end of ``hierwork fit`` and by ``hierwork
report RUN``; ``render_report`` gives the HTML text only. No statistics are
computed here: everything is read from the run folder's files. Every figure of
the page is also saved as ``figures/ID.svg`` and ``figures/ID.png`` (``ID`` is
the figure's element id in the page), for slides and documents.
"""
from __future__ import annotations

import os
import shutil
import uuid
from dataclasses import dataclass

from hierwork.report.html import render_html
from hierwork.report.markdown import render_markdown
from hierwork.report.page import FigureSink
from hierwork.report.verdict import verdict
from hierwork.runfolder import Run, write_atomic

__all__ = ["render_report", "write_report", "WrittenReport", "REPORT_FILES"]

#: Files written into the run folder by :func:`write_report` (and the folder of figures).
REPORT_FILES = ("report.html", "summary.md")
FIGURES = "figures"


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
    """Write ``report.html``, ``summary.md`` and ``figures/`` into the run folder.

    Everything is rendered before anything is written; each file then replaces
    its old version atomically, and the figures folder is swapped in whole, so
    a failure leaves the old files.

    Returns
    -------
    WrittenReport
        The path of each written file (and of the figures folder), keyed by name, and the verdict.
    """
    files = Run.open(run)
    sink = FigureSink()
    texts = {"report.html": render_html(files, sink), "summary.md": render_markdown(files)}
    staged = _stage_figures(files.path, sink)
    try:
        for name, text in texts.items():
            write_atomic(files.path / name, text)
    except BaseException:
        shutil.rmtree(staged, ignore_errors=True)
        raise
    _swap(staged, files.path / FIGURES)
    v = verdict(files.diagnostics)
    paths = {name: files.path / name for name in texts}
    paths[FIGURES] = files.path / FIGURES
    return WrittenReport(paths, v.status, v.headline)


def _stage_figures(folder, sink: FigureSink):
    """Write every figure as SVG and PNG into a hidden sibling of ``figures/``; returns its path."""
    staged = folder / f".{FIGURES}.tmp-{uuid.uuid4().hex[:8]}"
    staged.mkdir()
    try:
        for key, plot in sink.items():
            (staged / f"{key}.svg").write_text(plot.svg, encoding="utf-8")
            (staged / f"{key}.png").write_bytes(plot.png())
    except BaseException:
        shutil.rmtree(staged, ignore_errors=True)
        raise
    return staged


def _swap(staged, target) -> None:
    """Put the staged folder in place of ``target`` (renames; the old one is removed afterwards)."""
    old = None
    if target.exists():
        old = target.with_name(f".{target.name}.old-{uuid.uuid4().hex[:8]}")
        os.rename(target, old)
    os.rename(staged, target)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
