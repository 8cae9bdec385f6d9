"""One attempt = one ``hierwork fit`` child process.

A fresh child process per fit keeps the batch free of statistics, isolates
crashes, and lets PyMC start its chain processes even under a Dask worker
(whose task processes are daemonic and may not start multiprocessing
children; a process started with :mod:`subprocess` is not daemonic).

Each fit runs under :mod:`~hierwork.batch.guard`, which leads its own session
(process group), so the batch can kill a fit with all its chain processes at
once. On Linux the guard also receives a parent-death signal and then kills
its group, so a ``kill -9`` of the batch (or of a Dask worker) leaves no
orphaned fit or chain sampling on, or finishing later into a folder the batch
thinks is empty.
"""
from __future__ import annotations

import ctypes
import json
import os
import signal
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

from hierwork.inference.checks import broken_text

#: exit codes of ``hierwork fit`` (docs/contracts.md)
EXIT_STATUS = {0: "passed", 3: "failed", 2: "invalid"}
GUARD = str(Path(__file__).with_name("guard.py"))
_PR_SET_PDEATHSIG = 1
_LIBC = ctypes.CDLL(None, use_errno=True) if sys.platform.startswith("linux") else None
#: numeric libraries use one thread per process; chains already run in parallel
THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


@dataclass(frozen=True)
class Outcome:
    """What one attempt produced.

    Attributes
    ----------
    status : str
        ``passed``, ``failed`` (gate), ``invalid`` (bad input) or ``crashed``.
    exit_code : int or None
    message : str or None
        One line for the summary: the failing checks or the child's last line.
    diagnostics : dict or None
        The run folder's ``diagnostics.json`` (passed and failed attempts).
    """

    status: str
    exit_code: int | None
    message: str | None
    diagnostics: dict | None


def format_override(key: str, value) -> str:
    """``KEY=VALUE`` for ``fit --set``; the value is JSON, which YAML reads back unchanged."""
    return f"{key}={json.dumps(value)}"


def fit_command(spec_path, run_dir, overrides: dict) -> list[str]:
    """The ``hierwork fit`` command line for one attempt."""
    argv = [sys.executable, "-m", "hierwork", "fit", str(spec_path), "--out", str(run_dir), "--force"]
    for key, value in overrides.items():
        argv += ["--set", format_override(key, value)]
    return argv


def child_env() -> dict:
    """Environment for a fit: unbuffered output, one numeric thread per process (unless set)."""
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    for var in THREAD_VARS:
        env.setdefault(var, "1")
    return env


def _die_with_parent() -> None:  # runs in the child between fork and exec
    if _LIBC is not None:
        _LIBC.prctl(_PR_SET_PDEATHSIG, signal.SIGTERM)


def launch(argv: list[str], log_path, cwd=None) -> subprocess.Popen:
    """Start ``argv`` under the guard in a new session, output appended to ``log_path``.

    The returned process is the guard; its pid is also the process group to kill.
    """
    guarded = [sys.executable, GUARD, str(os.getpid()), *argv]
    with open(log_path, "ab") as log:
        return subprocess.Popen(guarded, stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                cwd=cwd, env=child_env(), start_new_session=True,
                                preexec_fn=_die_with_parent)


def run(argv: list[str], log_path, cwd=None) -> int:
    """Run ``argv`` to the end (see :func:`launch`); kill its group if this thread is interrupted."""
    proc = launch(argv, log_path, cwd=cwd)
    try:
        return proc.wait()
    except BaseException:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
        raise


def outcome(exit_code: int | None, run_dir, log_path) -> Outcome:
    """Read an attempt's result from its exit code, run folder and log.

    A run counts only when ``diagnostics.json`` parses and agrees with the
    exit code; anything else is recorded as ``crashed``.
    """
    status = EXIT_STATUS.get(exit_code, "crashed")
    if status in ("passed", "failed"):
        diagnostics = read_diagnostics(run_dir)
        if diagnostics is None or diagnostics.get("passed") is not (status == "passed"):
            return Outcome("crashed", exit_code, f"fit exited with {exit_code} but {Path(run_dir).name}/"
                           "diagnostics.json is missing, unreadable or disagrees", diagnostics)
        return Outcome(status, exit_code, None if status == "passed" else gate_message(diagnostics),
                       diagnostics)
    if exit_code is not None and exit_code < 0:
        message = f"fit was killed by {signal_name(-exit_code)}"
        if -exit_code == signal.SIGKILL:
            message += " (by the out-of-memory killer, or by hand)"
    else:
        message = last_line(log_path) or f"fit exited with code {exit_code}"
    return Outcome(status, exit_code, message, None)


def signal_name(signum: int) -> str:
    """``SIGKILL (signal 9)``, or ``signal 64`` for a number with no name."""
    try:
        return f"{signal.Signals(signum).name} (signal {signum})"
    except ValueError:
        return f"signal {signum}"


def read_diagnostics(run_dir) -> dict | None:
    """``run_dir/diagnostics.json`` as a dict, or None when missing or unreadable."""
    try:
        data = json.loads((Path(run_dir) / "diagnostics.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) and isinstance(data.get("passed"), bool) else None


def gate_message(diagnostics: dict) -> str:
    """The failing checks in one line, e.g. ``divergences 12 > 0; r_hat 1.0104 > 1.01 (farm__sd)``."""
    parts = []
    for check in diagnostics.get("checks", []):
        if check.get("passed", True):
            continue
        text = broken_text(str(check.get("name")), check.get("value"), check.get("threshold"), check.get("comparison"))
        if check.get("worst_parameter"):
            text += f" ({check['worst_parameter']})"
        parts.append(text)
    return "; ".join(parts) or "the gate failed"


def last_line(log_path) -> str | None:
    """The last non-empty line of a log (the CLI prints its one-line error last)."""
    try:
        with open(log_path, "rb") as handle:
            handle.seek(0, os.SEEK_END)
            handle.seek(max(0, handle.tell() - 8192))
            lines = handle.read().decode("utf-8", "replace").splitlines()
    except OSError:
        return None
    lines = [line.strip() for line in lines if line.strip()]
    return lines[-1] if lines else None
