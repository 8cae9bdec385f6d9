"""Batches of real fits: kill and resume, remedies, bad input, dry run, status and summary."""
import json
import os
import re
import signal

import pytest

from hierwork.cli import main
from hierwork.report.markdown import md_escape

from batchkit import (assert_run_folders_sound, batch_state, chain_processes, fit_process, hierwork,
                      kill_session, line_output, pid_alive, process, running_attempt, start_batch, wait_for)

pytestmark = pytest.mark.slow  # every test here runs batches of real fits in child processes


@pytest.mark.slow
def test_batch_killed_during_second_job_resumes_without_rerunning_the_first(tmp_path, capsys):
    specs = tmp_path / "specs"
    specs.mkdir()
    for i, name in enumerate(("a_first", "b_second", "c_third")):
        line_output(specs, name, group_sd=1.0, seed=i + 1)
    out = tmp_path / "batch"
    batch = start_batch(specs, "--out", out, "--workers", "1")
    try:
        guard = wait_for(lambda: (row := running_attempt(out, "b_second")) and row["pid"] and process(row["pid"]),
                         what="the second job to start")
        fit = wait_for(lambda: fit_process(guard), what="its fit process")
        # cores=2 (from --workers 1 on 2 cores): chain processes appear when sampling starts
        chains = wait_for(lambda: chain_processes(fit), what="its chain processes")
        code, stdout, _ = in_process(capsys, "status", out)  # as from another terminal
        assert code == 0 and f"running (pid {batch.pid})" in stdout
        assert re.search(r"^  b_second attempt 1, \d+s", stdout, re.M)
        os.kill(batch.pid, signal.SIGKILL)
        batch.wait()
        # the fit dies with the batch (parent-death signal), so it cannot finish into the folder later
        for proc in [guard, fit, *chains]:
            wait_for(lambda: not pid_alive(proc.pid), timeout=20, what=f"orphan {proc.pid} to die")
    finally:
        kill_session(batch)
    assert batch_state(out)["a_first"] == ("passed", ["passed"])
    assert batch_state(out)["b_second"][0] == "running"  # as the killed batch left it
    first = out / "jobs/a_first/attempt-1/diagnostics.json"
    first_stamp = first.stat().st_mtime_ns

    resumed = hierwork("batch", "--resume", out)
    assert resumed.returncode == 0, resumed.stdout + resumed.stderr
    assert batch_state(out) == {"a_first": ("passed", ["passed"]), "b_second": ("passed", ["passed"]),
                                "c_third": ("passed", ["passed"])}
    assert first.stat().st_mtime_ns == first_stamp  # the first job was not rerun
    log = (out / "batch.log").read_text()
    assert "b_second: attempt 1 was interrupted; it will run again" in log
    assert "a_first: finished before and unchanged; skipped" in log
    assert_run_folders_sound(out)

    # an edited spec is rerun, unchanged ones are skipped
    spec = specs / "c_third.yaml"
    spec.write_text(spec.read_text() + "title: Output of line C, edited\n")
    again = hierwork("batch", specs, "--out", out, "--resume")
    assert again.returncode == 0, again.stdout + again.stderr
    assert "c_third: attempt 1 started" in again.stdout
    assert "b_second: finished before and unchanged; skipped" in again.stdout


def test_sigterm_stops_the_batch_kills_its_fit_and_keeps_the_state(tmp_path):
    spec = line_output(tmp_path, "crop", group_sd=1.0)
    out = tmp_path / "batch"
    batch = start_batch(spec, "--out", out)
    try:
        guard = wait_for(lambda: (row := running_attempt(out, "crop")) and row["pid"] and process(row["pid"]),
                         what="the job to start")
        batch.send_signal(signal.SIGTERM)
        output, _ = batch.communicate(timeout=60)
    finally:
        kill_session(batch)
    assert batch.returncode == 130, output
    assert f"continue with: hierwork batch --resume {out}" in output
    wait_for(lambda: not pid_alive(guard.pid), timeout=10, what="the fit to be killed")
    assert batch_state(out) == {"crop": ("interrupted", ["interrupted"])}
    assert "crop" in (out / "index.md").read_text()
    assert not (out / "jobs/crop/attempt-1").exists()


@pytest.mark.slow
def test_centred_funnel_is_rescued_by_the_remedies_and_attempts_are_kept(tmp_path):
    # Few rows per line and a small spread between lines: the centred form's funnel
    # gives divergences (Betancourt and Girolami 2015); raising target_accept alone
    # does not cure it, switching to non-centred does. The per-row path keeps the
    # group effects in the sampler (the exact collapsed path has no funnel).
    spec = line_output(tmp_path, "funnel", group_sd=0.1, seed=7, form="centred", path="plain",
                       draws=1000, extra="remedies:\n  steps: [{target_accept: 0.95}, parameterisation]\n")
    out = tmp_path / "batch"
    result = hierwork("batch", spec, "--out", out)
    assert result.returncode == 0, result.stdout + result.stderr
    assert batch_state(out) == {"funnel": ("passed", ["failed", "failed", "passed"])}
    first = json.loads((out / "jobs/funnel/attempt-1/diagnostics.json").read_text())
    assert any(c["name"] == "divergences" and not c["passed"] for c in first["checks"])
    assert json.loads((out / "jobs/funnel/attempt-3/plan.json").read_text())["factors"][0][
        "parameterisation"] == "non_centred"
    md = (out / "index.md").read_text()
    assert re.search(r"^2\. target\\_accept: 0.95 \(failed: .*divergences.*\) -> failed", md, re.M)
    assert re.search(r"^3\. parameterisation \(failed: .*\) -> passed", md, re.M)
    status = hierwork("status", out)
    assert status.returncode == 0
    assert re.search(r"^funnel\s+passed\s+3\s", status.stdout, re.M)
    assert "1 job: 1 passed" in status.stdout and "not running" in status.stdout


def test_bad_data_fails_its_job_with_its_message_and_the_others_finish(tmp_path):
    line_output(tmp_path, "good_one", group_sd=1.0, seed=3)
    line_output(tmp_path, "good_two", group_sd=1.0, seed=4)
    line_output(tmp_path, "bad_data", group_sd=1.0, seed=5)
    csv = tmp_path / "bad_data.csv"
    csv.write_text(csv.read_text().replace("\nL03,", "\nL03,not-a-number\nL03,", 1))
    out = tmp_path / "batch"
    result = hierwork("batch", tmp_path, "--out", out, "--workers", "2")
    assert result.returncode == 3, result.stdout + result.stderr
    state = batch_state(out)
    assert state["good_one"] == ("passed", ["passed"]) and state["good_two"] == ("passed", ["passed"])
    assert state["bad_data"] == ("invalid", ["invalid"])
    check = hierwork("check", tmp_path / "bad_data.yaml")  # the same message a user gets from check
    assert check.returncode == 2
    message = check.stderr.strip().splitlines()[-1]
    page = (out / "index.html").read_text()
    md = (out / "index.md").read_text()
    assert "bad input" in page and md_escape(message) in md
    assert_run_folders_sound(out)


def in_process(capsys, *args):
    """Run the CLI in this process (no import cost): ``(exit code, stdout, stderr)``."""
    code = main([str(a) for a in args])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_dry_run_lists_variants_and_writes_nothing(tmp_path, capsys):
    spec = line_output(tmp_path, "crop", group_sd=1.0, extra=(
        "variants:\n  sweep:\n    groups.line.parameterisation: [centred, non_centred]\n"
        "remedies: false\n"))
    code, stdout, _ = in_process(capsys, "batch", spec, "--out", tmp_path / "batch", "--dry-run")
    assert code == 0
    assert stdout.splitlines() == [
        "2 jobs:",
        f"  crop.parameterisation-centred  from {spec}  groups.line.parameterisation='centred'  "
        "[up to 1 attempts; remedies: none]",
        f"  crop.parameterisation-non_centred  from {spec}  groups.line.parameterisation='non_centred'  "
        "[up to 1 attempts; remedies: none]"]
    assert not (tmp_path / "batch").exists()


def test_dry_run_validates_each_variant_like_fit(tmp_path, capsys):
    spec = line_output(tmp_path, "crop", group_sd=1.0, extra=(
        "variants: [{name: ok}, {name: typo, set: {groups.line.parameterisation: centered}}]\n"))
    code, stdout, _ = in_process(capsys, "batch", spec, "--dry-run")
    assert code == 0
    assert stdout.splitlines()[1].startswith("  crop.ok  from ")
    assert stdout.splitlines()[2] == (
        "  crop.typo  [cannot run: override groups.line.parameterisation='centered': "
        "groups.line.parameterisation: 'centered' is not allowed "
        "(did you mean 'centred'? valid: 'auto', 'centred', 'non_centred', 'partial')]")


def test_batch_usage_errors_exit_2_with_one_line(tmp_path, capsys):
    spec = line_output(tmp_path, "crop", group_sd=1.0)
    (tmp_path / "old").mkdir()
    (tmp_path / "old" / "batch.sqlite").write_bytes(b"")
    cases = [
        (("batch", tmp_path / "nope.yaml", "--out", tmp_path / "b"),
         f"hierwork: error: hierwork batch: no spec file or folder at '{tmp_path / 'nope.yaml'}' "
         "(give spec files or folders holding *.yaml specs)"),
        (("batch", spec, "--out", tmp_path / "old"),
         f"hierwork: error: hierwork batch: '{tmp_path / 'old'}' already holds a batch "
         "(add --resume to continue it, or choose another --out folder)"),
        (("batch", "--resume", tmp_path / "empty"),
         f"hierwork: error: hierwork batch: no batch to resume in '{tmp_path / 'empty'}' "
         "(give spec files or folders to start one)"),
        (("status", tmp_path / "empty"),
         f"hierwork: error: no batch found in '{tmp_path / 'empty'}' (missing batch.sqlite) "
         "(give the folder passed to 'hierwork batch --out')"),
    ]
    for args, message in cases:
        code, _, stderr = in_process(capsys, *args)
        assert (code, stderr.strip()) == (2, message)
        assert not (tmp_path / "b").exists() and not (tmp_path / "empty").exists()
