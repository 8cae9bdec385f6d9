"""Progress: the plain log, the live terminal view and ``hierwork status``.

Everything shown is read back from the batch database, so the live view of
the running batch and ``hierwork status`` from another terminal agree.
"""
from __future__ import annotations

import shutil
import sys
import time
from datetime import datetime
from pathlib import Path

from hierwork.batch.queue import FINAL, Queue

ORDER = ("passed", "failed", "invalid", "crashed", "running", "interrupted", "pending")


def is_terminal() -> bool:
    """Whether stdout is a terminal (the live view is drawn only there)."""
    return sys.stdout.isatty()


class Log:
    """Append timestamped lines to ``batch.log`` and show them: above the live view on a
    terminal, else on stdout."""

    def __init__(self, path, view: "LiveView | None" = None):
        self.path = Path(path)
        self.view = view

    def write(self, line: str) -> None:
        text = f"{datetime.now():%Y-%m-%d %H:%M:%S} {line}"
        with open(self.path, "a", encoding="utf-8") as handle:
            handle.write(text + "\n")
        if self.view:
            self.view.note(text)
        else:
            print(text, flush=True)


def counts(jobs: list[dict]) -> dict:
    """Jobs per status, in display order (zero counts left out)."""
    found = {}
    for job in jobs:
        found[job["status"]] = found.get(job["status"], 0) + 1
    return {status: found[status] for status in ORDER if status in found}


def jobs_text(n: int) -> str:
    """``1 job``, ``3 jobs``."""
    return f"{n} job" if n == 1 else f"{n} jobs"


def eta_seconds(jobs: list[dict], slots: int, now: float | None = None) -> float | None:
    """Estimated seconds left: mean duration of finished jobs, spread over ``slots``.

    None until one job has finished (no estimate without data) and once nothing is left.
    """
    now = time.time() if now is None else now
    if not any(j["status"] in ("pending", "interrupted", "running") for j in jobs):
        return None
    took = [j["finished"] - j["started"] for j in jobs
            if j["status"] in FINAL and j["started"] is not None and j["finished"] is not None]
    if not took:
        return None
    mean = sum(took) / len(took)
    left = sum(mean for j in jobs if j["status"] in ("pending", "interrupted"))
    left += sum(max(0.0, mean - (now - j["started"])) for j in jobs
                if j["status"] == "running" and j["started"] is not None)
    return left / max(1, slots)


def status_lines(queue: Queue, width: int = 100, live: bool = True) -> list[str]:
    """Counts, estimated time left and one line per running attempt.

    With ``live`` False (no batch process owns the queue: it was killed), jobs
    the queue still lists as running are shown as interrupted.
    """
    jobs = queue.jobs() if live else as_stopped(queue.jobs())
    tally = ", ".join(f"{n} {status}" for status, n in counts(jobs).items()) or "no jobs"
    eta = eta_seconds(jobs, queue.meta("slots", 1))
    lines = [f"{jobs_text(len(jobs))}: {tally}" + (f"; about {duration(eta)} left" if eta is not None else "")]
    now = time.time()
    for attempt in queue.running() if live else []:
        where = f" on {attempt['worker']}" if attempt["worker"] not in (None, "local") else ""
        head = f"  {attempt['job']} attempt {attempt['number']}{where}, {duration(now - attempt['started'])}"
        last = last_output(queue.dir / f"{attempt['run_dir']}.log")
        lines.append(_fit(f"{head}: {last}" if last else head, width))
    return lines


def batch_status(batch_dir) -> str:
    """The text of ``hierwork status``: whether the batch runs, its progress, and one line per job.

    Raises
    ------
    RunFolderError
        When ``batch_dir`` holds no batch.
    """
    queue = Queue(batch_dir)
    try:
        owner = queue.running_owner()
        lines = [f"batch {batch_dir}: " + (f"running (pid {owner['pid']})" if owner else "not running")]
        lines += status_lines(queue, live=owner is not None)
        jobs = queue.jobs() if owner else as_stopped(queue.jobs())
        width = max([len(j["name"]) for j in jobs] + [3])
        lines += ["", f"{'job':<{width}}  {'status':<11}  attempts  {'time':>7}  note"]
        now = time.time()
        for job in jobs:
            took = duration((job["finished"] or now) - job["started"]) if job["started"] else ""
            lines.append(f"{job['name']:<{width}}  {job['status']:<11}  {job['attempts']:>8}  {took:>7}  "
                         f"{job['message'] or ''}")
    finally:
        queue.close()
    return "\n".join(lines)


def as_stopped(jobs: list[dict]) -> list[dict]:
    """Jobs of a batch whose process is gone: ``running`` ones read as ``interrupted``."""
    return [dict(j, status="interrupted") if j["status"] == "running" else j for j in jobs]


def last_output(log_path: Path) -> str | None:
    """The latest progress text of a fit's log (after the last carriage return or newline)."""
    try:
        with open(log_path, "rb") as handle:
            handle.seek(0, 2)
            handle.seek(max(0, handle.tell() - 2048))
            tail = handle.read().decode("utf-8", "replace")
    except OSError:
        return None
    pieces = [p.strip() for p in tail.replace("\r", "\n").split("\n") if p.strip()]
    return pieces[-1] if pieces else None


def duration(seconds: float) -> str:
    """``42s``, ``7m05s`` or ``3h12m``."""
    seconds = int(round(seconds))
    if seconds < 60:
        return f"{seconds}s"
    if seconds < 3600:
        return f"{seconds // 60}m{seconds % 60:02d}s"
    return f"{seconds // 3600}h{seconds % 3600 // 60:02d}m"


def _fit(line: str, width: int) -> str:
    return line if len(line) <= width else line[: width - 3] + "..."


class LiveView:
    """Redraw :func:`status_lines` in place on a terminal, at most once a second."""

    def __init__(self, queue: Queue):
        self.queue = queue
        self.drawn = 0
        self.last = 0.0

    def refresh(self, force: bool = False, above: str | None = None) -> None:
        """Redraw (at most once a second unless ``force``), printing ``above`` first if given."""
        if not force and time.monotonic() - self.last < 1.0:
            return
        self.last = time.monotonic()
        width = shutil.get_terminal_size().columns - 1
        lines = ([above] if above else []) + status_lines(self.queue, width)
        up = f"\x1b[{self.drawn}F" if self.drawn else ""
        sys.stdout.write(up + "\x1b[J" + "\n".join(lines) + "\n")
        sys.stdout.flush()
        self.drawn = len(lines) - (1 if above else 0)

    def note(self, line: str) -> None:
        """Print a log line above the view, which stays at the bottom."""
        self.refresh(force=True, above=line)

    def close(self) -> None:
        self.refresh(force=True)
