"""The batch's state: one SQLite file, ``BATCH_DIR/batch.sqlite``.

One row per job and one per attempt; every change is one transaction, so the
file is consistent after a ``kill -9`` at any moment. The file uses SQLite's
write-ahead log, so ``hierwork status`` can read while a batch writes.

Job statuses: ``pending``, ``running``, ``passed`` (an attempt passed the
gate), ``failed`` (every attempt failed the gate), ``invalid`` (bad spec or
data), ``crashed`` (a bug or a killed fit), ``interrupted`` (the batch stopped
while it ran). ``passed``, ``failed`` and ``invalid`` are final: a resumed
batch skips them unless the job's spec or data changed.
"""
from __future__ import annotations

import json
import os
import signal
import sqlite3
import time
from contextlib import contextmanager
from pathlib import Path

import psutil

from hierwork.errors import RunFolderError

FORMAT = "hierwork-batch/1"
DB_NAME = "batch.sqlite"
FINAL = ("passed", "failed", "invalid")

SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS jobs (
    name TEXT PRIMARY KEY, position INTEGER NOT NULL, source TEXT NOT NULL,
    overrides TEXT NOT NULL, job_sha TEXT NOT NULL, data_sha TEXT,
    status TEXT NOT NULL, attempts INTEGER NOT NULL DEFAULT 0, counting INTEGER,
    exit_code INTEGER, message TEXT, started REAL, finished REAL);
CREATE TABLE IF NOT EXISTS attempts (
    job TEXT NOT NULL REFERENCES jobs(name), number INTEGER NOT NULL,
    overrides TEXT NOT NULL, reason TEXT, cursor INTEGER NOT NULL,
    status TEXT NOT NULL, exit_code INTEGER, message TEXT, run_dir TEXT NOT NULL,
    diagnostics TEXT, pid INTEGER, pid_started REAL, worker TEXT,
    started REAL NOT NULL, finished REAL,
    PRIMARY KEY (job, number));
"""


class Queue:
    """Read and change a batch's state.

    Parameters
    ----------
    batch_dir : path
        The batch folder; the database is ``batch_dir / "batch.sqlite"``.
    create : bool
        Create the database if it is missing (otherwise a missing database
        raises :class:`RunFolderError`).
    """

    def __init__(self, batch_dir, create: bool = False):
        self.dir = Path(batch_dir)
        self.path = self.dir / DB_NAME
        if not self.path.exists() and not create:
            raise RunFolderError(f"no batch found in {str(self.dir)!r} (missing {DB_NAME})",
                                 hint="give the folder passed to 'hierwork batch --out'")
        self.db = sqlite3.connect(self.path, isolation_level=None, timeout=30)
        self.db.row_factory = sqlite3.Row
        self.db.execute("PRAGMA journal_mode=WAL")
        self.db.execute("PRAGMA synchronous=FULL")
        if create:
            with self.transaction():
                for statement in SCHEMA.split(";"):
                    self.db.execute(statement)
                self.db.execute("INSERT OR IGNORE INTO meta VALUES ('format', ?)", (FORMAT,))
        fmt = self.meta("format")
        for _ in range(50):  # a batch starting right now may not have committed its tables yet
            if fmt is not None:
                break
            time.sleep(0.1)
            fmt = self.meta("format")
        if fmt != FORMAT:
            raise RunFolderError(f"{str(self.path)!r} holds batch format {fmt!r}, expected {FORMAT!r}")

    def close(self) -> None:
        """Close the connection."""
        self.db.close()

    @contextmanager
    def transaction(self):
        """One write transaction (``BEGIN IMMEDIATE`` ... ``COMMIT``)."""
        self.db.execute("BEGIN IMMEDIATE")
        try:
            yield self.db
        except BaseException:
            self.db.execute("ROLLBACK")
            raise
        self.db.execute("COMMIT")

    # -- meta ---------------------------------------------------------------
    def meta(self, key: str, default=None):
        """A value stored under ``key`` in the meta table (JSON-decoded where possible)."""
        try:
            row = self.db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        except sqlite3.OperationalError:
            return default
        if row is None:
            return default
        try:
            return json.loads(row[0])
        except ValueError:
            return row[0]

    def set_meta(self, key: str, value) -> None:
        """Store a JSON-encodable value under ``key``."""
        with self.transaction():
            self.db.execute("INSERT OR REPLACE INTO meta VALUES (?, ?)", (key, json.dumps(value)))

    def acquire(self) -> None:
        """Mark this process as the batch's runner; refuse if another live one holds it.

        Raises
        ------
        RunFolderError
            When another batch process is running on this folder.
        """
        with self.transaction():
            owner = self.meta("owner")
            if owner and process_alive(owner["pid"], owner["started"]) and owner["pid"] != os.getpid():
                raise RunFolderError(f"another batch (pid {owner['pid']}) is running in {str(self.dir)!r}",
                                     hint="wait for it, or follow it with 'hierwork status'")
            me = {"pid": os.getpid(), "started": psutil.Process().create_time()}
            self.db.execute("INSERT OR REPLACE INTO meta VALUES ('owner', ?)", (json.dumps(me),))

    def release(self) -> None:
        """Give up ownership (at a clean end of the batch)."""
        with self.transaction():
            self.db.execute("DELETE FROM meta WHERE key = 'owner'")

    def running_owner(self) -> dict | None:
        """The live process running this batch, if any."""
        owner = self.meta("owner")
        return owner if owner and process_alive(owner["pid"], owner["started"]) else None

    # -- jobs ---------------------------------------------------------------
    def jobs(self) -> list[dict]:
        """All jobs in batch order."""
        return [dict(r) for r in self.db.execute("SELECT * FROM jobs ORDER BY position, name")]

    def job(self, name: str) -> dict | None:
        """One job's row, or None."""
        row = self.db.execute("SELECT * FROM jobs WHERE name = ?", (name,)).fetchone()
        return dict(row) if row else None

    def attempts(self, name: str) -> list[dict]:
        """A job's attempts, oldest first."""
        rows = self.db.execute("SELECT * FROM attempts WHERE job = ? ORDER BY number", (name,))
        return [dict(r) for r in rows]

    def running(self) -> list[dict]:
        """Attempts running now, oldest first."""
        rows = self.db.execute("SELECT * FROM attempts WHERE status = 'running' ORDER BY started")
        return [dict(r) for r in rows]

    def upsert_job(self, name: str, position: int, source: str, overrides: dict, job_sha: str,
                   data_sha: str | None) -> str:
        """Register a job; keep its history if spec and data are unchanged.

        Returns
        -------
        str
            ``"final"`` (finished before, unchanged: skip), ``"resume"`` (keep
            finished attempts and continue) or ``"fresh"`` (no usable history:
            its old attempts were dropped).
        """
        with self.transaction():
            old = self.job(name)
            same = old is not None and old["job_sha"] == job_sha and old["data_sha"] == data_sha
            if same and old["status"] in FINAL:
                self.db.execute("UPDATE jobs SET position = ?, source = ? WHERE name = ?",
                                (position, source, name))
                return "final"
            if same and old["status"] in ("interrupted", "running", "pending"):
                self.db.execute("DELETE FROM attempts WHERE job = ? AND status IN ('running', 'interrupted')",
                                (name,))
                self.db.execute("UPDATE jobs SET position = ?, source = ?, status = 'pending' WHERE name = ?",
                                (position, source, name))
                return "resume"
            self.db.execute("DELETE FROM attempts WHERE job = ?", (name,))
            self.db.execute("DELETE FROM jobs WHERE name = ?", (name,))
            self.db.execute("INSERT INTO jobs (name, position, source, overrides, job_sha, data_sha, status)"
                            " VALUES (?, ?, ?, ?, ?, ?, 'pending')",
                            (name, position, source, json.dumps(overrides, sort_keys=True), job_sha, data_sha))
            return "fresh"

    def finish_job(self, name: str, status: str, message: str | None = None,
                   counting: int | None = None, exit_code: int | None = None) -> None:
        """Record a job's final status."""
        with self.transaction():
            self.db.execute("UPDATE jobs SET status = ?, message = ?, counting = ?, exit_code = ?,"
                            " finished = ? WHERE name = ?",
                            (status, message, counting, exit_code, time.time(), name))

    # -- attempts -----------------------------------------------------------
    def start_attempt(self, name: str, number: int, overrides: dict, reason: str | None,
                      cursor: int, run_dir: str) -> None:
        """Record that an attempt starts now; the job becomes ``running``."""
        now = time.time()
        with self.transaction():
            self.db.execute("INSERT OR REPLACE INTO attempts (job, number, overrides, reason, cursor,"
                            " status, run_dir, started) VALUES (?, ?, ?, ?, ?, 'running', ?, ?)",
                            (name, number, json.dumps(overrides, sort_keys=True), reason, cursor,
                             run_dir, now))
            self.db.execute("UPDATE jobs SET status = 'running', attempts = ?,"
                            " started = COALESCE(started, ?), finished = NULL WHERE name = ?",
                            (number, now, name))

    def set_process(self, name: str, number: int, pid: int | None, pid_started: float | None,
                    worker: str | None = None) -> None:
        """Record the process (or Dask worker) running an attempt."""
        with self.transaction():
            self.db.execute("UPDATE attempts SET pid = ?, pid_started = ?, worker = ?"
                            " WHERE job = ? AND number = ?", (pid, pid_started, worker, name, number))

    def finish_attempt(self, name: str, number: int, status: str, exit_code: int | None,
                       message: str | None, diagnostics: dict | None) -> None:
        """Record an attempt's outcome."""
        with self.transaction():
            self.db.execute("UPDATE attempts SET status = ?, exit_code = ?, message = ?, diagnostics = ?,"
                            " finished = ? WHERE job = ? AND number = ?",
                            (status, exit_code, message,
                             None if diagnostics is None else json.dumps(diagnostics),
                             time.time(), name, number))

    def interrupt_stale(self) -> list[dict]:
        """Mark attempts left ``running`` by a dead batch as ``interrupted``; return them.

        Local fits still alive (same pid and start time) are killed with their
        process group first, so they cannot finish into a folder later.
        """
        with self.transaction():
            stale = [dict(r) for r in self.db.execute("SELECT * FROM attempts WHERE status = 'running'")]
            for attempt in stale:
                if attempt["pid"] and process_alive(attempt["pid"], attempt["pid_started"]):
                    kill_group(attempt["pid"])
            self.db.execute("UPDATE attempts SET status = 'interrupted', finished = ? WHERE status = 'running'",
                            (time.time(),))
            self.db.execute("UPDATE jobs SET status = 'interrupted' WHERE status = 'running'")
        return stale


def process_alive(pid: int, started: float | None) -> bool:
    """Whether process ``pid`` exists and started at ``started`` (guards against reused pids)."""
    try:
        proc = psutil.Process(pid)
        return proc.status() != psutil.STATUS_ZOMBIE and (
            started is None or abs(proc.create_time() - started) < 1e-3)
    except psutil.Error:
        return False


def kill_group(pid: int) -> None:
    """Kill the process group led by ``pid`` (a fit and its chain processes)."""
    try:
        os.killpg(pid, signal.SIGKILL)
    except (ProcessLookupError, PermissionError):
        pass
