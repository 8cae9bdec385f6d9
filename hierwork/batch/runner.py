"""The batch loop: queue jobs, start attempts, record outcomes, apply remedies.

It knows nothing of statistics: an attempt is a ``hierwork fit`` child run by
an executor (:mod:`~hierwork.batch.local` or :mod:`~hierwork.batch.cluster`),
and its result is the child's exit code and run folder.

Folder layout::

    BATCH_DIR/batch.sqlite            state (see queue.py)
    BATCH_DIR/batch.log               plain log
    BATCH_DIR/index.html, index.md    morning summary
    BATCH_DIR/jobs/NAME/spec.yaml     the job's spec (data path absolute)
    BATCH_DIR/jobs/NAME/attempt-K/    run folder of attempt K
    BATCH_DIR/jobs/NAME/attempt-K.log the fit's output
"""
from __future__ import annotations

import json
import shutil
import signal
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path

from hierwork.batch import progress, summary
from hierwork.batch.jobs import JobDef, load_jobs
from hierwork.batch.local import LocalExecutor
from hierwork.batch.queue import DB_NAME, Queue
from hierwork.batch.remedies import next_remedy
from hierwork.errors import HierworkError


@dataclass(frozen=True)
class AttemptTask:
    """One attempt of one job, as handed to an executor."""

    job: JobDef
    number: int
    overrides: dict
    cursor: int
    reason: str | None
    folder: Path = field(repr=False)

    @property
    def spec_path(self) -> Path:
        return self.folder / "spec.yaml"

    @property
    def run_dir(self) -> Path:
        return self.folder / f"attempt-{self.number}"

    @property
    def log_path(self) -> Path:
        return self.folder / f"attempt-{self.number}.log"


class BatchStopped(KeyboardInterrupt):
    """The batch process was asked to stop (SIGTERM); handled like Ctrl-C."""


def run_jobs(batch_dir, jobs: list[JobDef], executor, slots: int, sources: list[str]) -> dict:
    """Run every job not already finished; return the final counts by status.

    Parameters
    ----------
    batch_dir : path
        Created if missing; an existing batch there is resumed.
    jobs : list of JobDef
    executor : LocalExecutor or ClusterExecutor
    slots : int
        Attempts running at once (for the estimated time left).
    sources : list of str
        The spec paths given, stored so ``--resume`` can find them again.
    """
    batch_dir = Path(batch_dir)
    (batch_dir / "jobs").mkdir(parents=True, exist_ok=True)
    queue = Queue(batch_dir, create=True)
    try:
        queue.acquire()
    except BaseException:
        queue.close()
        executor.close()
        raise
    view = progress.LiveView(queue) if progress.is_terminal() else None
    log = progress.Log(batch_dir / "batch.log", view)
    try:
        queue.set_meta("sources", sources)
        queue.set_meta("slots", slots)
        for stale in queue.interrupt_stale():
            adopted = adopt(batch_dir, queue, stale)
            log.write(f"{stale['job']}: attempt {stale['number']} " + (
                f"had finished before the batch stopped; recorded as {adopted}" if adopted
                else "was interrupted; it will run again"))
        loop = _Loop(batch_dir, queue, executor, log, view)
        loop.prepare(jobs)
        loop.run()
        queue.release()
        return progress.counts(queue.jobs())
    finally:
        executor.close()
        summary.write(batch_dir, queue)
        queue.close()


class _Loop:
    def __init__(self, batch_dir: Path, queue: Queue, executor, log, view):
        self.dir = batch_dir
        self.queue = queue
        self.executor = executor
        self.log = log
        self.view = view
        self.pending = deque()

    def prepare(self, jobs: list[JobDef]) -> None:
        """Register jobs, skip finished ones and queue each remaining job's next attempt."""
        for position, job in enumerate(jobs):
            state = self.queue.upsert_job(job.name, position, job.source, job.overrides,
                                          job.job_sha, job.data_sha)
            if state == "final":
                self.log.write(f"{job.name}: finished before and unchanged; skipped")
                continue
            folder = self.dir / "jobs" / job.name
            done = self.queue.attempts(job.name) if state == "resume" else []
            _clear(folder, keep=[f"attempt-{a['number']}" for a in done])
            if job.error:
                self.queue.finish_job(job.name, "invalid", message=job.error, exit_code=2)
                self.log.write(f"{job.name}: invalid: {job.error}")
                continue
            folder.mkdir(parents=True, exist_ok=True)
            summary.write_atomic(folder / "spec.yaml", job.spec_text())
            if not done:
                self.pending.append(AttemptTask(job, 1, dict(job.overrides), 0, None, folder))
                continue
            last = done[-1]
            if last["status"] == "passed":  # the batch stopped just before recording the job
                self.queue.finish_job(job.name, "passed", None, last["number"], 0)
                continue
            self.log.write(f"{job.name}: resuming after attempt {last['number']}")
            self._after_gate_failure(AttemptTask(job, last["number"], json.loads(last["overrides"]),
                                                 last["cursor"], last["reason"], folder),
                                     json.loads(last["diagnostics"]), last["message"])

    def run(self) -> None:
        """Start attempts while there is room; record each as it ends."""
        previous = signal.signal(signal.SIGTERM, _raise_stopped)
        try:
            while self.pending or self.executor.active:
                while self.pending and self.executor.room > 0:
                    self._start(self.pending.popleft())
                for task, outcome in self.executor.poll(0.5):
                    self._record(task, outcome)
                if self.view:
                    self.view.refresh()
        except KeyboardInterrupt:
            self.executor.close()
            for stale in self.queue.interrupt_stale():
                adopt(self.dir, self.queue, stale)
            self.log.write("batch stopped; resume it with 'hierwork batch --resume'")
            raise
        finally:
            signal.signal(signal.SIGTERM, previous)
            if self.view:
                self.view.close()

    def _start(self, task: AttemptTask) -> None:
        shutil.rmtree(task.run_dir, ignore_errors=True)
        task.log_path.unlink(missing_ok=True)
        self.queue.start_attempt(task.job.name, task.number, task.overrides, task.reason,
                                 task.cursor, str(task.run_dir.relative_to(self.dir)))
        identity = self.executor.submit(task)
        self.queue.set_process(task.job.name, task.number, identity.get("pid"),
                               identity.get("pid_started"), identity.get("worker"))
        why = f" ({task.reason})" if task.reason else ""
        self.log.write(f"{task.job.name}: attempt {task.number} started{why}")

    def _record(self, task: AttemptTask, outcome) -> None:
        name = task.job.name
        self.queue.finish_attempt(name, task.number, outcome.status, outcome.exit_code,
                                  outcome.message, outcome.diagnostics)
        detail = f": {outcome.message}" if outcome.message else ""
        self.log.write(f"{name}: attempt {task.number} {outcome.status}{detail}")
        if outcome.status == "failed":
            self._after_gate_failure(task, outcome.diagnostics, outcome.message)
        else:
            counting = task.number if outcome.status == "passed" else None
            self.queue.finish_job(name, outcome.status, outcome.message, counting, outcome.exit_code)
            self._job_ended(name, outcome.status)

    def _after_gate_failure(self, task: AttemptTask, diagnostics: dict, message: str | None) -> None:
        job = task.job
        remedy = next_remedy(job.policy, task.cursor, task.number, diagnostics,
                             attempt_settings(job, task.overrides, task.run_dir))
        if remedy is None:
            self.queue.finish_job(job.name, "failed", message, task.number, 3)
            self._job_ended(job.name, "failed")
            return
        retry = AttemptTask(job, task.number + 1, {**task.overrides, **remedy.overrides},
                            remedy.cursor, remedy.reason, task.folder)
        self.pending.appendleft(retry)

    def _job_ended(self, name: str, status: str) -> None:
        self.log.write(f"{name}: job {status}")
        summary.write(self.dir, self.queue)


def attempt_settings(job: JobDef, overrides: dict, run_dir: Path) -> dict:
    """The settings remedies change, as dotted paths, for one finished attempt.

    Sampling values come from the overrides, else the spec, else the spec
    table's defaults; each factor's form is read from the run's ``plan.json``
    (which resolves ``auto``), else from the spec. On the collapsed path every
    factor's effects are integrated out, so no form is listed: switching it
    could not change the result, and the ``parameterisation`` remedy skips.
    """
    from hierwork.declare.keys import SPEC_KEYS

    defaults = SPEC_KEYS["sampling"].fields
    sampling = job.spec.get("sampling") or {}
    values = {}
    for key in ("target_accept", "warmup", "draws"):
        dotted = f"sampling.{key}"
        values[dotted] = overrides.get(dotted, sampling.get(key, defaults[key].default))
    forms = {name: overrides.get(f"groups.{name}.parameterisation", (group or {}).get("parameterisation"))
             for name, group in (job.spec.get("groups") or {}).items()}
    path, planned = _planned_forms(Path(run_dir) / "plan.json")
    forms.update(planned)
    if path == "collapsed":
        forms = {}
    values.update({f"groups.{name}.parameterisation": form for name, form in forms.items()})
    return values


def _planned_forms(path: Path) -> tuple:
    """The model path a run took and each factor's resolved form, from its ``plan.json`` (None, {} if unreadable)."""
    try:
        plan = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None, {}
    if not isinstance(plan, dict):
        return None, {}
    factors = plan.get("factors", [])
    if isinstance(factors, dict):
        factors = [{"name": k, **v} for k, v in factors.items()]
    return plan.get("path"), {f["name"]: f["parameterisation"] for f in factors
                              if "name" in f and "parameterisation" in f}


def adopt(batch_dir: Path, queue: Queue, attempt: dict) -> str | None:
    """Record an interrupted attempt whose run folder is complete (the batch died just after it
    was renamed into place); return its status, or None if it must run again."""
    from hierwork.batch import child
    from hierwork.runfolder import Run

    run_dir = Path(batch_dir) / attempt["run_dir"]
    diagnostics = child.read_diagnostics(run_dir)
    try:
        Run.load(run_dir)
    except HierworkError:
        return None
    if diagnostics is None:
        return None
    code = 0 if diagnostics["passed"] else 3
    outcome = child.outcome(code, run_dir, run_dir.with_name(f"{run_dir.name}.log"))
    queue.finish_attempt(attempt["job"], attempt["number"], outcome.status, code, outcome.message,
                         outcome.diagnostics)
    return outcome.status


def _raise_stopped(signum, frame):
    raise BatchStopped()


def _clear(folder: Path, keep: list[str]) -> None:
    """Remove everything in a job folder except the named attempts (folders and logs)."""
    if not folder.is_dir():
        return
    kept = set(keep) | {f"{k}.log" for k in keep}
    for entry in folder.iterdir():
        if entry.name in kept:
            continue
        if entry.is_dir() and not entry.is_symlink():
            shutil.rmtree(entry)
        else:
            entry.unlink()


def run_batch(paths, out, *, workers: int = 1, scheduler: str | None = None, resume: bool = False,
              command=None) -> dict:
    """Run a batch of specs; the entry point behind ``hierwork batch``.

    Parameters
    ----------
    paths : list of str
        Spec files and folders; may be empty when resuming (the batch's own
        list is used).
    out : path
        The batch folder.
    workers : int
        Local fits at once (ignored with ``scheduler``).
    scheduler : str, optional
        Address of a Dask scheduler (``tcp://host:port``); jobs then run on its workers.
    resume : bool
        Continue the batch in ``out``; without it, ``out`` must not hold a batch.
    command : callable, optional
        ``command(task) -> argv`` replacing ``hierwork fit`` (local runs only).

    Returns
    -------
    dict
        Final number of jobs per status.

    Raises
    ------
    HierworkError
        Bad paths, duplicate job names, an existing batch without ``resume``,
        or a missing batch with ``resume`` and no paths.
    """
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise HierworkError(f"workers must be a whole number of at least 1, got {workers!r}", where="hierwork batch",
                            hint="e.g. --workers 2")
    out = Path(out)
    exists = (out / DB_NAME).is_file()
    if exists and not resume:
        raise HierworkError(f"{str(out)!r} already holds a batch", where="hierwork batch",
                            hint="add --resume to continue it, or choose another --out folder")
    if not paths:
        if not exists:
            raise HierworkError(f"no batch to resume in {str(out)!r}", where="hierwork batch",
                                hint="give spec files or folders to start one")
        queue = Queue(out)
        paths = queue.meta("sources", [])
        queue.close()
    jobs = load_jobs(paths)
    sources = [str(Path(p).resolve()) for p in paths]
    if scheduler:
        from hierwork.batch.cluster import ClusterExecutor
        executor = ClusterExecutor(scheduler)
    else:
        executor = LocalExecutor(workers, command=command)
    return run_jobs(out, jobs, executor, executor.slots, sources)
