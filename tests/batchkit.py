"""Helpers for the batch tests: tiny invented specs and data, and running ``hierwork`` as a user does."""
import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import psutil

from hierwork.batch.queue import Queue

# Small draws keep each fit to seconds; the gate's ESS minimum is lowered to
# match (400 is common practice for 4 chains x 1000 draws; these fits keep 4 x 500 by default).
SAMPLING = "sampling: {chains: 4, warmup: 500, draws: %d, engine: pymc, path: %s, seed: %d}\n"
GATE = "gate: {ess_bulk_min: 100, ess_tail_min: 100}\n"


def line_output(folder, name, group_sd, groups=10, per_group=3, seed=1, form="non_centred",
                path="auto", draws=500, extra=""):
    """Spec + CSV: hourly output of production lines, normal outcome, one factor ``line``.

    ``path: plain`` samples the group effects per row (no exact integration), so
    the centred form shows its funnel.
    """
    rng = np.random.default_rng(seed)
    effects = rng.normal(0, group_sd, groups)
    frame = pd.DataFrame({"line": np.repeat([f"L{g:02d}" for g in range(groups)], per_group)})
    frame["output"] = 5 + effects[np.repeat(np.arange(groups), per_group)] + rng.normal(0, 1, len(frame))
    frame.to_csv(folder / f"{name}.csv", index=False)
    spec = folder / f"{name}.yaml"
    spec.write_text(f"format: hierwork/1\nname: {name}\ndata: {name}.csv\noutcome: {{column: output}}\n"
                    f"groups:\n  line: {{column: line, parameterisation: {form}}}\n"
                    + SAMPLING % (draws, path, seed) + GATE + extra)
    return spec


def hierwork(*args, **kwargs) -> subprocess.CompletedProcess:
    """Run ``python -m hierwork ARGS`` and capture its output."""
    return subprocess.run([sys.executable, "-m", "hierwork", *map(str, args)], capture_output=True,
                          text=True, timeout=kwargs.pop("timeout", 900), **kwargs)


def start_batch(*args) -> subprocess.Popen:
    """Start ``hierwork batch ARGS`` in the background (its own session)."""
    return subprocess.Popen([sys.executable, "-m", "hierwork", "batch", *map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                            start_new_session=True)


def wait_for(condition, timeout=300, step=0.25, what="condition"):
    """Poll ``condition()`` until it returns something truthy."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = condition()
        if value:
            return value
        time.sleep(step)
    raise AssertionError(f"timed out waiting for {what}")


def running_attempt(batch_dir, job):
    """The job's running attempt row, if the batch database says one is running."""
    if not (batch_dir / "batch.sqlite").exists():
        return None
    queue = Queue(batch_dir)
    try:
        return next((a for a in queue.running() if a["job"] == job), None)
    finally:
        queue.close()


def batch_state(batch_dir):
    """``{job: (status, [attempt statuses])}`` from the batch database."""
    queue = Queue(batch_dir)
    try:
        return {j["name"]: (j["status"], [a["status"] for a in queue.attempts(j["name"])])
                for j in queue.jobs()}
    finally:
        queue.close()


def assert_run_folders_sound(batch_dir):
    """Every attempt folder holds parseable diagnostics; no temporary folder is left behind."""
    for job in (batch_dir / "jobs").iterdir():
        for entry in job.iterdir():
            assert not entry.name.startswith("."), f"leftover temporary {entry}"
            if entry.is_dir():
                diagnostics = json.loads((entry / "diagnostics.json").read_text())
                assert isinstance(diagnostics["passed"], bool)
                assert (entry / "posterior.nc").stat().st_size > 0


def pid_alive(pid) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    try:  # a zombie has exited already
        with open(f"/proc/{pid}/stat") as handle:
            return handle.read().split(")")[-1].split()[0] != "Z"
    except OSError:
        return True


def process(pid):
    """``psutil.Process(pid)``, or None if it is gone."""
    try:
        return psutil.Process(pid)
    except psutil.Error:
        return None


def kill_session(proc: subprocess.Popen) -> None:
    """Make sure a background command started by a test is gone (with its process group)."""
    if proc.poll() is None:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()


def fit_process(root):
    """The ``python -m hierwork fit`` process at or below ``root`` (e.g. the guard or a Dask worker)."""
    try:
        for proc in [root, *root.children(recursive=True)]:
            if proc.cmdline()[1:4] == ["-m", "hierwork", "fit"]:
                return proc
    except psutil.Error:
        return None
    return None


def chain_processes(fit):
    """Python processes below a fit (PyMC's chain workers), at least two once sampling runs."""
    try:
        found = [p for p in fit.children(recursive=True) if "python" in p.name()]
    except psutil.Error:
        return None
    return found if len(found) >= 2 else None
