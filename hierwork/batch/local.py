"""Run attempts as child processes on this machine, ``workers`` at a time."""
from __future__ import annotations

import os
import signal
import time

import psutil

from hierwork.batch import child


def cores_per_fit(workers: int, cpu_count: int | None = None) -> int:
    """Chain processes each fit may start so that all fits together use about the CPU count."""
    return max(1, (cpu_count or os.cpu_count() or 1) // max(1, workers))


class LocalExecutor:
    """A pool of ``hierwork fit`` child processes.

    Parameters
    ----------
    workers : int
        Fits running at once.
    command : callable, optional
        ``command(task) -> argv``; the default runs ``hierwork fit`` with the
        task's overrides plus ``sampling.cores`` so that chains share the cores.
    """

    def __init__(self, workers: int, command=None):
        self.workers = workers
        self.cores = cores_per_fit(workers)
        self.command = command or self._fit_argv
        self.active = {}  # pid -> (task, Popen)

    def _fit_argv(self, task) -> list[str]:
        overrides = {"sampling.cores": self.cores, **task.overrides}
        return child.fit_command(task.spec_path, task.run_dir, overrides)

    @property
    def slots(self) -> int:
        """Attempts that may run at once."""
        return self.workers

    @property
    def room(self) -> int:
        """How many more attempts may start now."""
        return self.workers - len(self.active)

    def submit(self, task) -> dict:
        """Start an attempt; return its process identity for the batch database."""
        proc = child.launch(self.command(task), task.log_path)
        self.active[proc.pid] = (task, proc)
        try:
            started = psutil.Process(proc.pid).create_time()
        except psutil.Error:
            started = None
        return {"pid": proc.pid, "pid_started": started, "worker": "local"}

    def poll(self, timeout: float) -> list:
        """Wait up to ``timeout`` seconds; return ``(task, Outcome)`` for attempts that ended."""
        deadline = time.monotonic() + timeout
        while True:
            done = [(pid, task, proc.returncode) for pid, (task, proc) in self.active.items()
                    if proc.poll() is not None]
            if done or time.monotonic() >= deadline:
                break
            time.sleep(min(0.1, max(0.0, deadline - time.monotonic())))
        results = []
        for pid, task, code in done:
            del self.active[pid]
            results.append((task, child.outcome(code, task.run_dir, task.log_path)))
        return results

    def close(self) -> None:
        """Kill running fits with their chain processes."""
        for pid, (_, proc) in list(self.active.items()):
            try:
                os.killpg(pid, signal.SIGKILL)
            except (ProcessLookupError, PermissionError):
                pass
            proc.wait()
        self.active.clear()
