"""Interrupts and the run folder's destination: nothing cut short is published, nothing finished is lost.

Fast tests stand in for the sampler with a function that raises the
interrupt (no MCMC); the slow ones send real signals to ``hierwork fit``
child processes while their chains sample (common practice for testing
signal handling: the process and its children, observed from outside).
"""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from hierwork import runfolder
from hierwork.cli import main
from hierwork.errors import RunFolderError
from hierwork.interrupts import Interrupted, signals_deferred, stop_on_signals

PLOTS = Path(__file__).parent / "bad_inputs" / "plots.csv"
SPEC = f"format: hierwork/1\nname: ok\ndata: {PLOTS}\noutcome: {{column: yield}}\ngroups: {{site: {{}}}}\n"


@pytest.fixture
def spec(tmp_path):
    path = tmp_path / "spec.yaml"
    path.write_text(SPEC)
    return path


def _run_folder(path: Path) -> Path:
    """A folder recognisable as a run folder (its provenance names the format)."""
    path.mkdir(parents=True)
    (path / "provenance.json").write_text(json.dumps({"format": runfolder.RUN_FORMAT}))
    (path / "diagnostics.json").write_text(json.dumps({"passed": True}))
    return path


def _hidden(folder: Path) -> list:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


@pytest.mark.parametrize("signum, code", [(signal.SIGINT, 130), (signal.SIGTERM, 143)])
def test_signal_during_sampling_publishes_nothing(spec, tmp_path, capsys, monkeypatch, signum, code):
    out = _run_folder(tmp_path / "run")
    seen = {}

    def sampler(report, progress=None):
        seen["staging"] = _hidden(tmp_path)  # reserved before sampling
        os.kill(os.getpid(), signum)
        time.sleep(5)  # the handler raises at once
        raise AssertionError("the signal did not stop sampling")

    monkeypatch.setattr("hierwork.pipeline.sample_posterior", sampler)
    assert main(["fit", str(spec), "--out", str(out), "--force", "--quiet"]) == code
    err = capsys.readouterr().err.strip()
    assert err == f"hierwork: stopped by {signal.Signals(signum).name}; nothing was written"
    assert len(seen["staging"]) == 1 and ".run.tmp-" in seen["staging"][0]
    assert _hidden(tmp_path) == [] and sorted(p.name for p in out.iterdir()) == ["diagnostics.json",
                                                                                  "provenance.json"]
    assert signal.getsignal(signal.SIGTERM) is signal.SIG_DFL  # handlers restored


def test_signals_deferred_during_publish():
    with pytest.raises(Interrupted) as stop, stop_on_signals():
        with signals_deferred():
            os.kill(os.getpid(), signal.SIGTERM)
            reached = True  # not cut short inside the block
        time.sleep(5)
    assert reached and stop.value.exit_code == 143


def test_force_refuses_a_folder_that_is_not_a_run(spec, tmp_path, capsys):
    out = tmp_path / "documents"
    out.mkdir()
    (out / "letter.txt").write_text("keep me")
    assert main(["fit", str(spec), "--out", str(out), "--force"]) == 2
    err = capsys.readouterr().err
    assert "--force replaces run folders only" in err and "is not one" in err
    assert (out / "letter.txt").read_text() == "keep me" and _hidden(tmp_path) == []


def test_force_refuses_the_current_folder(spec, tmp_path, capsys, monkeypatch):
    run = _run_folder(tmp_path / "run")
    monkeypatch.chdir(run)
    assert main(["fit", str(spec), "--out", ".", "--force"]) == 2
    assert "which holds the current folder" in capsys.readouterr().err
    (run / "sub").mkdir()
    monkeypatch.chdir(run / "sub")
    assert main(["fit", str(spec), "--out", "..", "--force"]) == 2
    assert _hidden(tmp_path) == [] and (run / "provenance.json").is_file()


def test_out_under_a_file(spec, tmp_path, capsys):
    (tmp_path / "notes.txt").write_text("x")
    assert main(["fit", str(spec), "--out", str(tmp_path / "notes.txt" / "run")]) == 2
    assert "which is a file, not a folder" in capsys.readouterr().err


def test_unwritable_destination_fails_before_sampling(spec, tmp_path, capsys, monkeypatch):
    import errno

    def read_only(self, *args, **kwargs):
        raise OSError(errno.EROFS, "Read-only file system", str(self))

    monkeypatch.setattr(Path, "mkdir", read_only)  # as on a read-only mount (root passes os.access)
    assert main(["fit", str(spec), "--out", str(tmp_path / "run")]) == 2
    assert "cannot write the run folder (" in capsys.readouterr().err
    assert list(tmp_path.iterdir()) == [spec]


def test_a_second_fit_into_the_same_folder_fails_at_once(tmp_path):
    out = tmp_path / "run"
    with runfolder.Staging(out, False) as first:
        with pytest.raises(RunFolderError, match="another fit is writing"):
            runfolder.Staging(out, False).__enter__()
        first.write({"provenance.json": {"format": runfolder.RUN_FORMAT}})
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"] and not (out / ".lock").exists()


def test_leftovers_of_killed_fits_are_tidied(tmp_path):
    out = tmp_path / "run"
    stale = tmp_path / ".run.tmp-dead0001"
    stale.mkdir()
    (stale / ".lock").write_text("")  # nobody holds it: its fit died
    (stale / "posterior.nc").write_text("half")
    old = _run_folder(tmp_path / ".run.old-dead0002")  # killed between the two renames of --force
    (old / "summary.csv").write_text("the only copy")
    with runfolder.Staging(out, True):
        assert (out / "summary.csv").read_text() == "the only copy"
        assert not stale.exists() and not old.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"]


def test_write_failure_is_a_user_error_and_keeps_the_old_run(tmp_path):
    out = _run_folder(tmp_path / "run")

    def full_disk(folder):
        raise OSError(28, "No space left on device")

    with pytest.raises(RunFolderError, match="No space left on device"):
        runfolder.write_run(out, True, {"summary.csv": "x", "report": full_disk})
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"] and runfolder.is_run_folder(out)


# --------------------------------------------------------------------------- real signals (slow)

SAMPLING = "sampling: {chains: 2, cores: 2, engine: pymc, warmup: 100, draws: 100000}\n"


def _chains_of(pid: int, timeout: float = 120.0) -> list:
    """The chain processes of a fit, once both are sampling."""
    import psutil

    parent, deadline = psutil.Process(pid), time.monotonic() + timeout
    while time.monotonic() < deadline:
        children = parent.children(recursive=True)
        if len(children) >= 2:
            return children
        time.sleep(0.2)
    raise AssertionError("the fit started no chain processes")


def _alive(processes) -> list:
    import psutil

    alive = []
    for p in processes:
        try:
            if p.status() != psutil.STATUS_ZOMBIE:
                alive.append(p.pid)
        except psutil.NoSuchProcess:
            pass
    return alive


@pytest.mark.slow
@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGKILL])
def test_real_signal_ends_fit_and_its_chains(tmp_path, signum):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC + SAMPLING)
    out = tmp_path / "run"
    argv = [sys.executable, "-m", "hierwork", "fit", str(spec), "--out", str(out), "--quiet"]
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    fit = subprocess.Popen(argv, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        chains = _chains_of(fit.pid)
        time.sleep(1.0)
        fit.send_signal(signum)
        _, err = fit.communicate(timeout=60)
    finally:
        fit.kill()
    deadline = time.monotonic() + 10
    while _alive(chains) and time.monotonic() < deadline:
        time.sleep(0.2)
    assert _alive(chains) == []
    assert not out.exists()
    if signum == signal.SIGINT:
        assert fit.returncode == 130 and "Traceback" not in err
        assert err.strip().splitlines()[-1] == "hierwork: stopped by SIGINT; nothing was written"
        assert _hidden(tmp_path) == []
    else:  # a kill -9 leaves its staging folder; the next fit into the same place removes it
        assert len(_hidden(tmp_path)) == 1
        with runfolder.Staging(out, False):
            pass
        assert _hidden(tmp_path) == []
