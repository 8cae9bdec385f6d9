"""A batch on a real local Dask cluster, started with Dask's own commands; one worker is killed mid-job."""
import json
import signal
import subprocess
import time

import psutil
import pytest
import yaml

from batchkit import (assert_run_folders_sound, batch_state, chain_processes, fit_process, kill_session,
                      line_output, pid_alive, start_batch, wait_for)

pytest.importorskip("distributed")
pytestmark = pytest.mark.cluster


def _start(*args) -> subprocess.Popen:
    return subprocess.Popen(list(args), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)


@pytest.fixture
def dask_cluster(tmp_path):
    """A scheduler on 127.0.0.1 and two one-thread workers (each behind a nanny, so tasks run
    in a daemonic process, as in a default Dask deployment)."""
    info = tmp_path / "scheduler.json"
    procs = [_start("dask", "scheduler", "--host", "127.0.0.1", "--port", "0", "--no-dashboard",
                    "--scheduler-file", str(info))]
    try:
        address = wait_for(lambda: info.exists() and json.loads(info.read_text() or "{}").get("address"),
                           timeout=120, what="the scheduler")
        workers = [_start("dask", "worker", address, "--host", "127.0.0.1", "--nthreads", "1",
                          "--no-dashboard", "--memory-limit", "0", "--local-directory", str(tmp_path / f"w{i}"))
                   for i in range(2)]
        procs += workers
        from distributed import Client
        with Client(address, timeout=60) as client:
            client.wait_for_workers(2, timeout=120)
        yield address, workers
    finally:
        for proc in reversed(procs):
            kill_session(proc)


def test_batch_on_dask_survives_a_killed_worker(tmp_path, dask_cluster):
    address, workers = dask_cluster
    specs = tmp_path / "specs"
    specs.mkdir()
    for i, name in enumerate(("depot_a", "depot_b", "depot_c")):
        line_output(specs, name, group_sd=1.0, seed=10 + i)
    out = tmp_path / "batch"
    batch = start_batch(specs, "--out", out, "--scheduler", address)
    try:
        victim, fit = wait_for(lambda: next(((w, f) for w in workers
                                             if (f := fit_process(psutil.Process(w.pid)))), None),
                               what="a fit on a worker")
        # the worker's task process is daemonic, yet the fit starts its chains as processes
        chains = wait_for(lambda: chain_processes(fit), what="chain processes on the worker")
        killed_at = time.time()
        victim.send_signal(signal.SIGKILL)
        kill_session(victim)
        for proc in [fit, *chains]:  # the fit dies with its worker
            wait_for(lambda: not pid_alive(proc.pid), timeout=20, what=f"fit {proc.pid} to die")
        output, _ = batch.communicate(timeout=900)
    finally:
        kill_session(batch)
    assert batch.returncode == 0, output
    assert batch_state(out) == {name: ("passed", ["passed"]) for name in ("depot_a", "depot_b", "depot_c")}
    # every job was unpacked from the worker's archive after the kill or completed before it
    for name in ("depot_a", "depot_b", "depot_c"):
        run = out / "jobs" / name / "attempt-1"
        assert json.loads((run / "diagnostics.json").read_text())["passed"] is True
        assert (out / "jobs" / name / "attempt-1.log").read_text().startswith("[ran on ")
        # the fit read the data shipped with the task, from the worker's temporary folder
        assert "hierwork-job-" in yaml.safe_load((run / "spec.yaml").read_text())["data"]
    assert any((out / "jobs" / n / "attempt-1" / "diagnostics.json").stat().st_mtime > killed_at
               for n in ("depot_a", "depot_b", "depot_c"))
    assert_run_folders_sound(out)
    assert "depot_a" in (out / "index.md").read_text()
