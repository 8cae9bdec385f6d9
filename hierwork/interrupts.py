"""Stopping on request: SIGINT and SIGTERM end a fit cleanly, and chain processes end with it.

Why this exists: PyMC and nutpie treat ``KeyboardInterrupt`` as "stop early
and return the draws so far", so a Ctrl-C during sampling used to yield a
short posterior that went on to be gated, written and published. Inside
:func:`stop_on_signals` both signals raise :class:`Interrupted` instead, an
exception the samplers do not swallow; the staging folder is removed on the
way out and the CLI exits with ``128 + signal`` (130 for SIGINT, 143 for
SIGTERM) after one line saying nothing was written.

Chain processes (:data:`CHAIN_CONTEXT`, the multiprocessing context given to
PyMC) restore the default signal handlers and ask Linux to kill them when the
process that started them dies, so even a ``kill -9`` of the fit leaves no
chain sampling on. Where the parent-death signal is not available, a watcher
thread polls the parent.
"""
from __future__ import annotations

import ctypes
import multiprocessing
import multiprocessing.context
import os
import signal
import sys
import threading
from contextlib import contextmanager

#: The signals that stop a fit.
STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)
_PR_SET_PDEATHSIG = 1


class Interrupted(BaseException):
    """The process was asked to stop by a signal (not a user error, not a bug).

    A ``BaseException`` so that ``except Exception`` in libraries does not
    catch it, and not a ``KeyboardInterrupt`` so that samplers do not turn it
    into an early, short result.
    """

    def __init__(self, signum: int):
        self.signum = int(signum)
        #: What had been done when it came; the CLI prints it.
        self.outcome = "nothing was written"
        super().__init__(self.name)

    @property
    def name(self) -> str:
        return signal.Signals(self.signum).name

    @property
    def exit_code(self) -> int:
        """The shell's convention for a death by signal: ``128 + signal``."""
        return 128 + self.signum


#: Signals held back while :func:`signals_deferred` runs (None: not deferring).
_held: list | None = None


def _raise_interrupted(signum, frame):
    if _held is not None:
        _held.append(signum)
        return
    raise Interrupted(signum)


@contextmanager
def stop_on_signals():
    """Within the block, SIGINT and SIGTERM raise :class:`Interrupted` (main thread only; elsewhere a no-op).

    A signal the process was started ignoring (SIGINT for a shell's background
    job) stays ignored.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {s: signal.signal(s, _raise_interrupted) for s in STOP_SIGNALS
                if signal.getsignal(s) is not signal.SIG_IGN}
    try:
        yield
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)


@contextmanager
def signals_deferred():
    """Hold the stop signals (within :func:`stop_on_signals`) until the block ends.

    For steps that must not be cut in two, such as the renames that put a run
    folder in place; a signal that came meanwhile is raised at the end.
    """
    global _held
    outer, _held = _held, ([] if _held is None else _held)
    try:
        yield
    finally:
        held, _held = _held, outer
        if outer is None and held:
            raise Interrupted(held[0])


def chain_context():
    """The multiprocessing context for PyMC's chain processes: :data:`CHAIN_CONTEXT` where fork is the default."""
    if sys.platform.startswith("linux") and multiprocessing.get_start_method(allow_none=True) in (None, "fork"):
        return CHAIN_CONTEXT
    return None


def tie_to_parent(parent: int) -> None:
    """End this process when ``parent`` dies: Linux's parent-death signal, else a watcher thread."""
    libc = ctypes.CDLL(None, use_errno=True) if sys.platform.startswith("linux") else None
    if libc is not None and libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL) == 0:
        if os.getppid() != parent:  # the parent died before the signal was armed
            os._exit(1)
        return

    def watch():
        while os.getppid() == parent:
            threading.Event().wait(1.0)
        os._exit(1)
    threading.Thread(target=watch, daemon=True, name="parent-watch").start()


class ChainProcess(multiprocessing.context.ForkProcess):
    """A chain process: default signal handlers, and it dies with the process that started it."""

    def start(self):
        self._starter = os.getpid()
        super().start()

    def run(self):
        signal.signal(signal.SIGINT, signal.default_int_handler)
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
        tie_to_parent(self._starter)
        super().run()


class ChainContext(multiprocessing.context.ForkContext):
    """PyMC's default start method on Linux (fork), with :class:`ChainProcess`."""

    Process = ChainProcess


#: The multiprocessing context chain processes are started from.
CHAIN_CONTEXT = ChainContext()
