"""Run attempts on a Dask cluster (``hierwork batch --scheduler tcp://HOST:PORT``).

Each attempt is one Dask task that carries the job's spec text and data
bytes, so workers need no shared disk. On the worker the task writes both to
a temporary folder, runs ``hierwork fit`` there as a child process (see
:mod:`~hierwork.batch.child`: a subprocess, unlike a multiprocessing child,
may start PyMC's chain processes under a daemonic Dask worker process), and
returns the run folder as tar bytes together with the exit code and log. The
client unpacks it into the batch folder through a temporary folder and a
rename. A worker that dies mid-task loses nothing: the scheduler gives the
task to another worker; the database, resuming and remedies are the same as
for local runs.
"""
from __future__ import annotations

import io
import os
import shutil
import socket
import tarfile
import tempfile
import uuid
from pathlib import Path

from hierwork.batch import child
from hierwork.errors import HierworkError


def run_remote(payload: dict) -> dict:
    """The Dask task: run one attempt in a temporary folder on the worker.

    Parameters
    ----------
    payload : dict
        ``spec_text`` (data path ``data_name``), ``data_name``, ``data`` (bytes
        or None) and ``overrides``.

    Returns
    -------
    dict
        ``exit_code``, ``log`` (text), ``archive`` (tar bytes of the run folder or None), ``host``.
    """
    with tempfile.TemporaryDirectory(prefix="hierwork-job-") as tmp:
        work = Path(tmp)
        (work / "spec.yaml").write_text(payload["spec_text"], encoding="utf-8")
        if payload["data"] is not None:
            (work / payload["data_name"]).write_bytes(payload["data"])
        overrides = {"sampling.cores": _worker_cores(), **payload["overrides"]}
        argv = child.fit_command(work / "spec.yaml", work / "run", overrides)
        code = child.run(argv, work / "fit.log", cwd=work)
        archive = None
        if (work / "run").is_dir():
            buffer = io.BytesIO()
            with tarfile.open(fileobj=buffer, mode="w") as tar:
                tar.add(work / "run", arcname="run")
            archive = buffer.getvalue()
        log = (work / "fit.log").read_text(encoding="utf-8", errors="replace")
    return {"exit_code": code, "log": log, "archive": archive, "host": socket.gethostname()}


def _worker_cores() -> int:
    """Chain processes per fit on this worker: its CPU count shared among its task threads."""
    try:
        from distributed import get_worker
        threads = get_worker().state.nthreads
    except (ImportError, ValueError, AttributeError):
        threads = 1
    return max(1, (os.cpu_count() or 1) // max(1, threads))


def unpack(archive: bytes, run_dir: Path) -> None:
    """Unpack a run folder's tar bytes into ``run_dir`` atomically (temporary folder + rename)."""
    tmp = Path(tempfile.mkdtemp(dir=run_dir.parent, prefix=f".{run_dir.name}.unpack-"))
    try:
        with tarfile.open(fileobj=io.BytesIO(archive), mode="r") as tar:
            tar.extractall(tmp, filter="data")
        shutil.rmtree(run_dir, ignore_errors=True)
        os.replace(tmp / "run", run_dir)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


class ClusterExecutor:
    """Send attempts to the workers of a running Dask scheduler.

    Parameters
    ----------
    address : str
        ``tcp://HOST:PORT`` of the scheduler.
    timeout : float
        Seconds to wait for the connection.
    """

    def __init__(self, address: str, timeout: float = 30):
        try:
            from distributed import Client
        except ImportError:
            raise HierworkError("--scheduler needs Dask's distributed package", where="hierwork batch",
                                hint='install it with: pip install "hierwork[cluster]"') from None
        try:
            self.client = Client(address, timeout=timeout)
        except (OSError, TimeoutError) as exc:
            raise HierworkError(f"cannot reach the Dask scheduler at {address!r}: {exc}",
                                where="hierwork batch",
                                hint="start one with 'dask scheduler' and check the address") from None
        self.address = address
        self.active = {}  # future key -> (task, future)

    @property
    def slots(self) -> int:
        """Task threads of the connected workers (at least 1)."""
        return max(1, sum(self.client.nthreads().values()))

    @property
    def room(self) -> int:
        """How many more attempts to hand to the scheduler now."""
        return self.slots - len(self.active)

    def submit(self, task) -> dict:
        """Ship an attempt to the cluster."""
        data = task.job.data_path
        data_name = f"data{data.suffix}" if data else "data"
        payload = {"spec_text": task.job.spec_text(data=data_name), "data_name": data_name,
                   "data": data.read_bytes() if data and data.is_file() else None,
                   "overrides": task.overrides}
        key = f"hierwork-{task.job.name}-{task.number}-{uuid.uuid4().hex[:8]}"
        future = self.client.submit(run_remote, payload, key=key, pure=False)
        self.active[key] = (task, future)
        return {"pid": None, "pid_started": None, "worker": self.address}

    def poll(self, timeout: float) -> list:
        """Wait up to ``timeout`` seconds; return ``(task, Outcome)`` for attempts that ended."""
        from distributed import wait

        futures = [future for _, future in self.active.values()]
        if not futures:
            return []
        try:
            wait(futures, timeout=timeout, return_when="FIRST_COMPLETED")
        except TimeoutError:
            pass
        results = []
        for key, (task, future) in list(self.active.items()):
            if not future.done():
                continue
            del self.active[key]
            results.append((task, self._outcome(task, future)))
        return results

    def _outcome(self, task, future) -> child.Outcome:
        try:
            result = future.result()
        except Exception as exc:  # the task could not run: e.g. KilledWorker after repeated deaths
            message = f"Dask task failed: {type(exc).__name__}: {' '.join(str(exc).split())}"
            task.log_path.write_text(message + "\n", encoding="utf-8")
            return child.Outcome("crashed", None, message, None)
        task.log_path.write_text(f"[ran on {result['host']}]\n{result['log']}", encoding="utf-8")
        if result["archive"] is not None:
            unpack(result["archive"], task.run_dir)
        return child.outcome(result["exit_code"], task.run_dir, task.log_path)

    def close(self) -> None:
        """Cancel unfinished attempts and disconnect."""
        for _, future in self.active.values():
            future.cancel()
        self.active.clear()
        self.client.close()
