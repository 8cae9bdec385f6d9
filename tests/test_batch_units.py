"""Batch building blocks without sampling: variants, remedies, jobs, queue, outcomes, summary."""
import json
import re
import sqlite3
import subprocess
import sys
from types import SimpleNamespace

import pytest

from hierwork.batch import child, summary
from hierwork.batch.progress import duration, eta_seconds
from hierwork.batch.jobs import load_jobs
from hierwork.batch.queue import Queue
from hierwork.batch.remedies import next_remedy
from hierwork.declare.remedies import DEFAULT_POLICY, Policy, Step, parse_policy
from hierwork.declare.variants import describe_variants, expand_variants, parse_variants
from hierwork.errors import HierworkError, SpecError


def check(name, value, threshold, comparison, passed, worst=None):
    return {"name": name, "value": value, "threshold": threshold, "comparison": comparison,
            "passed": passed, "worst_parameter": worst}


# A failed gate as hierwork fit writes it (names from hierwork/diagnostics.py).
FUNNEL = {"passed": False, "checks": [
    check("r_hat", 1.021, 1.01, "<=", False, "plot__coef[p5, intercept]"),
    check("ess_bulk", 127.4, 100.0, ">=", True, "plot__sd[intercept]"),
    check("ess_tail", 162.2, 100.0, ">=", True),
    check("divergences", 7, 0, "<=", False, "plot__sd[intercept]"),
    check("bfmi", 0.76, 0.3, ">=", True, "chain 1"),
]}
LOW_ESS = {"passed": False, "checks": [
    check("r_hat", 1.004, 1.01, "<=", True), check("ess_bulk", 210.0, 400.0, ">=", False, "b[intercept]"),
    check("divergences", 0, 0, "<=", True)]}
SETTINGS = {"sampling.target_accept": 0.9, "sampling.warmup": 1000, "sampling.draws": 1000,
            "groups.plot.parameterisation": "centred", "groups.site.parameterisation": "non_centred"}


# ---------------------------------------------------------------- variants
def test_named_variants_expand_to_jobs_in_order():
    spec = {"name": "crop", "variants": [
        {"name": "centred", "set": {"groups.plot.parameterisation": "centred"}},
        {"name": "base"}]}
    assert expand_variants(spec) == [("crop.centred", {"groups.plot.parameterisation": "centred"}),
                                     ("crop.base", {})]


def test_sweep_is_the_cartesian_product_with_readable_names():
    spec = {"name": "crop", "variants": {"sweep": {
        "groups.plot.parameterisation": ["centred", "non_centred"],
        "sampling.target_accept": [0.9, 0.95],
        "priors.plot.sd": [{"half_normal": {"sigma": 1}}]}}}
    jobs = expand_variants(spec)
    assert [name for name, _ in jobs] == [
        "crop.parameterisation-centred.target_accept-0_9.sd-v1",
        "crop.parameterisation-centred.target_accept-0_95.sd-v1",
        "crop.parameterisation-non_centred.target_accept-0_9.sd-v1",
        "crop.parameterisation-non_centred.target_accept-0_95.sd-v1"]
    assert jobs[1][1] == {"groups.plot.parameterisation": "centred", "sampling.target_accept": 0.95,
                          "priors.plot.sd": {"half_normal": {"sigma": 1}}}


def test_a_spec_without_variants_is_one_job():
    assert expand_variants({"name": "crop"}) == [("crop", {})]
    assert describe_variants({"name": "crop"}) == []


def test_check_text_lists_the_jobs_of_a_sweep():
    spec = {"name": "crop", "variants": [{"name": "base"}, {"name": "nc", "set": {
        "groups.plot.parameterisation": "non_centred"}}]}
    assert describe_variants(spec) == ["variants (2 jobs in a batch)", "  crop.base: as written",
                                       "  crop.nc: groups.plot.parameterisation='non_centred'"]


def test_sweep_keys_sharing_a_last_part_use_the_whole_path():
    jobs = expand_variants({"name": "m", "variants": {"sweep": {"groups.a.parameterisation": ["centred"],
                                                                "groups.b.parameterisation": ["centred"]}}})
    assert jobs[0][0] == "m.groups-a-parameterisation-centred.groups-b-parameterisation-centred"


@pytest.mark.parametrize("value, message", [
    ([{"name": "a b"}], "variant name 'a b' may only hold letters, digits, '-' and '_'"),
    ([{"name": "a"}, {"name": "a"}], "two variants are named 'a'"),
    ([{"set": {}}], "each variant needs a name and a set of overrides, got {'set': {}}"),
    ([{"name": "a", "set": {"variants": 1}}], "a variant cannot set 'variants'"),
    ([{"name": "a", "set": {"sampling draws": 1}}], "override key 'sampling draws' is not a dotted spec path"),
    ({"sweep": {"sampling.draws": 500}}, "sweep values for 'sampling.draws' must be a non-empty list, got 500"),
    ({"grid": {}}, "a variants mapping holds only 'sweep', found 'grid'"),
    ("all", "variants must be a list of {name, set} or {sweep: ...}, got 'all'"),
])
def test_bad_variants_are_named_exactly(value, message):
    with pytest.raises(SpecError, match=re.escape(message)):
        parse_variants(value, where="crop.yaml: variants")


# ---------------------------------------------------------------- remedies
def test_default_policy_is_documented_order():
    assert [s.text() for s in DEFAULT_POLICY.steps] == [
        "target_accept: 0.95", "target_accept: 0.99", "parameterisation", "warmup_factor: 2", "draws_factor: 2"]
    assert parse_policy(None) == DEFAULT_POLICY and parse_policy(True) == DEFAULT_POLICY
    assert parse_policy(False) == Policy((), 1)


def test_divergences_walk_the_policy_in_order():
    first = next_remedy(DEFAULT_POLICY, 0, 1, FUNNEL, SETTINGS)
    assert first.overrides == {"sampling.target_accept": 0.95} and first.cursor == 1
    assert first.reason == "target_accept: 0.95 (failed: r_hat, divergences)"
    second = next_remedy(DEFAULT_POLICY, first.cursor, 2, FUNNEL, {**SETTINGS, **first.overrides})
    assert second.overrides == {"sampling.target_accept": 0.99}
    third = next_remedy(DEFAULT_POLICY, second.cursor, 3, FUNNEL, {**SETTINGS, **second.overrides})
    # the failing factor is named by worst_parameter 'plot__...'; 'site' is left alone
    assert third.overrides == {"groups.plot.parameterisation": "non_centred"}
    fourth = next_remedy(DEFAULT_POLICY, third.cursor, 4, FUNNEL, SETTINGS)
    assert fourth.overrides == {"sampling.warmup": 2000}
    assert next_remedy(DEFAULT_POLICY, fourth.cursor, 5, FUNNEL, SETTINGS) is None  # max_attempts reached


def test_low_ess_asks_for_more_draws_first():
    # Only ESS failed: more draws first (ESS grows with the draws; Vehtari et al. 2021, section 4), and
    # again while only ESS keeps failing; the steps before it stay available for other failures.
    remedy = next_remedy(DEFAULT_POLICY, 0, 1, LOW_ESS, SETTINGS)
    assert remedy.overrides == {"sampling.draws": 2000} and remedy.cursor == 0
    again = next_remedy(DEFAULT_POLICY, remedy.cursor, 2, LOW_ESS, {**SETTINGS, **remedy.overrides})
    assert again.overrides == {"sampling.draws": 4000}
    assert next_remedy(DEFAULT_POLICY, 0, 5, LOW_ESS, SETTINGS) is None  # max_attempts reached


def test_low_ess_with_r_hat_walks_the_policy_skipping_what_does_not_address_it():
    mixing = {"checks": [check("r_hat", 1.03, 1.01, "<=", False, "b[intercept]"), *LOW_ESS["checks"][1:]]}
    remedy = next_remedy(DEFAULT_POLICY, 0, 1, mixing, SETTINGS)
    # no divergences: target_accept skipped; worst parameter 'b[...]' names no factor
    assert remedy.overrides == {"sampling.warmup": 2000} and remedy.cursor == 4
    last = next_remedy(DEFAULT_POLICY, remedy.cursor, 2, mixing, SETTINGS)
    assert last.overrides == {"sampling.draws": 2000}
    assert next_remedy(DEFAULT_POLICY, last.cursor, 3, mixing, SETTINGS) is None  # steps used up


def test_collapsed_runs_list_no_form_so_the_parameterisation_step_skips(tmp_path):
    # On the collapsed path the effects are integrated out: switching the form cannot change the result.
    from hierwork.batch.runner import attempt_settings

    job = SimpleNamespace(spec={"groups": {"plot": {"column": "plot"}}})
    plan = {"path": "collapsed", "factors": [{"name": "plot", "parameterisation": "centred"}]}
    (tmp_path / "plan.json").write_text(json.dumps(plan))
    settings = attempt_settings(job, {}, tmp_path)
    assert not any(k.startswith("groups.") for k in settings)
    funnel = {"checks": [check("divergences", 3, 0, "<=", False, "plot.sd")]}
    policy = parse_policy({"steps": ["parameterisation", {"warmup_factor": 2}]})
    assert next_remedy(policy, 0, 1, funnel, settings).overrides == {"sampling.warmup": 2000}
    (tmp_path / "plan.json").write_text(json.dumps({**plan, "path": "plain"}))
    assert next_remedy(policy, 0, 1, funnel, attempt_settings(job, {}, tmp_path)).overrides == {
        "groups.plot.parameterisation": "non_centred"}


def test_divergences_without_a_named_factor_switch_every_centred_factor():
    unnamed = {"checks": [check("divergences", 3, 0, "<=", False, None)]}
    policy = parse_policy({"steps": ["parameterisation"]})
    assert next_remedy(policy, 0, 1, unnamed, SETTINGS).overrides == {
        "groups.plot.parameterisation": "non_centred"}


def test_a_non_centred_factor_is_switched_to_centred():
    named = {"checks": [check("r_hat", 1.05, 1.01, "<=", False, "site__sd[intercept]")]}
    policy = Policy((Step("parameterisation"),), 3)
    assert next_remedy(policy, 0, 1, named, SETTINGS).overrides == {"groups.site.parameterisation": "centred"}


def test_a_partial_factor_goes_to_the_form_its_weights_misjudged():
    # Divergences: the groups know less than the weights assumed, so all non-centred; slow mixing
    # without divergences: they know more, so all centred (Papaspiliopoulos, Roberts and Skold 2007).
    policy = Policy((Step("parameterisation"),), 3)
    settings = {**SETTINGS, "groups.plot.parameterisation": "partial"}
    funnel = {"checks": [check("divergences", 4, 0, "<=", False, "plot.sd")]}
    assert next_remedy(policy, 0, 1, funnel, settings).overrides == {"groups.plot.parameterisation": "non_centred"}
    unnamed = {"checks": [check("divergences", 4, 0, "<=", False, None)]}
    assert next_remedy(policy, 0, 1, unnamed, settings).overrides == {"groups.plot.parameterisation": "non_centred"}
    slow = {"checks": [check("r_hat", 1.03, 1.01, "<=", False, "plot=p5 intercept")]}
    assert next_remedy(policy, 0, 1, slow, settings).overrides == {"groups.plot.parameterisation": "centred"}


def test_target_accept_never_lowers():
    policy = Policy((Step("target_accept", 0.95),), 3)
    assert next_remedy(policy, 0, 1, FUNNEL, {**SETTINGS, "sampling.target_accept": 0.97}) is None


@pytest.mark.parametrize("value, message", [
    ({"steps": [{"target_accept": 1.5}]}, "target_accept must lie strictly between 0 and 1, got 1.5"),
    ({"steps": [{"draws_factor": 1}]}, "draws_factor must be a number above 1, got 1"),
    ({"steps": [{"thin": 2}]}, "unknown remedy step 'thin'"),
    ({"steps": ["more"]}, "a remedy step is 'parameterisation' or one 'kind: value' pair, got 'more'"),
    ({"max_attempts": 0}, "max_attempts must be a whole number of at least 1, got 0"),
    ({"retries": 2}, "unknown remedies key 'retries'"),
])
def test_bad_policies_are_named_exactly(value, message):
    with pytest.raises(SpecError, match=re.escape(message)):
        parse_policy(value)


# ---------------------------------------------------------------- jobs
def write_spec(folder, name, extra=""):
    (folder / f"{name}.csv").write_text("g,y\na,1.0\nb,2.0\n")
    path = folder / f"{name}.yaml"
    path.write_text(f"format: hierwork/1\nname: {name}\ndata: {name}.csv\noutcome: {{column: y}}\n"
                    f"groups: {{g: {{column: g}}}}\n{extra}")
    return path


def test_jobs_carry_absolute_data_and_change_hash_with_spec_or_data(tmp_path):
    write_spec(tmp_path, "crop", "variants: [{name: a}, {name: b, set: {sampling.draws: 300}}]\n")
    a, b = load_jobs([tmp_path])
    assert (a.name, b.name) == ("crop.a", "crop.b")
    assert a.spec["data"] == str(tmp_path / "crop.csv") and "variants" not in a.spec
    assert b.overrides == {"sampling.draws": 300} and a.job_sha != b.job_sha
    (tmp_path / "crop.csv").write_text("g,y\na,1.0\nb,2.5\n")
    assert load_jobs([tmp_path])[0].data_sha != a.data_sha
    assert load_jobs([tmp_path])[0].job_sha == a.job_sha


def test_a_variant_may_point_at_other_data_relative_to_its_spec(tmp_path):
    write_spec(tmp_path, "crop", "variants: [{name: y1}, {name: y2, set: {data: season2/crop.csv}}]\n")
    (tmp_path / "season2").mkdir()
    (tmp_path / "season2" / "crop.csv").write_text("g,y\na,3.0\nb,4.0\n")
    one, two = load_jobs([tmp_path / "crop.yaml"])
    assert two.spec["data"] == str(tmp_path / "season2" / "crop.csv") and two.overrides == {}
    assert one.data_sha != two.data_sha and one.job_sha != two.job_sha


def test_unreadable_spec_becomes_an_invalid_job_and_duplicates_are_refused(tmp_path):
    (tmp_path / "broken.yaml").write_text("name: [unclosed\n")
    (job,) = load_jobs([tmp_path / "broken.yaml"])
    assert job.name == "broken" and job.error.startswith(f"{tmp_path / 'broken.yaml'}: cannot read the spec:")
    (tmp_path / "escape.yaml").write_text("name: ../../outside\nvariants: 3\n")
    (escape,) = load_jobs([tmp_path / "escape.yaml"])
    assert escape.name == "escape"  # a name that is no slug never becomes a path
    assert escape.error == (f"{tmp_path / 'escape.yaml'}: variants: variants must be a list of "
                            "{name, set} or {sweep: ...}, got 3 (see docs/batch.md, 'Variants')")
    write_spec(tmp_path, "crop")
    (tmp_path / "other").mkdir()
    write_spec(tmp_path / "other", "crop")
    with pytest.raises(HierworkError, match=re.escape("two jobs are named 'crop'")):
        load_jobs([tmp_path / "crop.yaml", tmp_path / "other"])
    with pytest.raises(HierworkError, match=re.escape("no spec file or folder at")):
        load_jobs([tmp_path / "missing.yaml"])


# ---------------------------------------------------------------- queue
def test_complete_attempt_left_unrecorded_is_adopted_not_rerun(tmp_path):
    """Killed after the run folder was renamed into place, before the queue recorded it."""
    from hierwork import runfolder
    from hierwork.batch.progress import batch_status
    from hierwork.batch.runner import adopt

    q = Queue(tmp_path, create=True)
    q.upsert_job("a", 0, "a.yaml", {}, "s1", "d1")
    q.start_attempt("a", 1, {}, None, 0, "jobs/a/attempt-1")
    q.upsert_job("b", 1, "b.yaml", {}, "s1", "d1")
    q.start_attempt("b", 1, {}, None, 0, "jobs/b/attempt-1")
    q.close()
    status = batch_status(tmp_path)  # its batch process is gone: nothing reads as running
    assert "2 jobs: 2 interrupted" in status and "running" not in status.replace("not running", "")
    run = tmp_path / "jobs" / "a" / "attempt-1"
    run.mkdir(parents=True)
    for name in runfolder.REQUIRED_FILES:
        (run / name).write_text("x")
    (run / "provenance.json").write_text(json.dumps({"format": runfolder.RUN_FORMAT}))
    (run / "diagnostics.json").write_text(json.dumps(FUNNEL))
    q = Queue(tmp_path)
    stale = {a["job"]: a for a in q.interrupt_stale()}
    assert adopt(tmp_path, q, stale["a"]) == "failed"
    assert adopt(tmp_path, q, stale["b"]) is None  # no folder: it runs again
    assert q.upsert_job("a", 0, "a.yaml", {}, "s1", "d1") == "resume"
    assert [(a["number"], a["status"], a["exit_code"]) for a in q.attempts("a")] == [(1, "failed", 3)]
    assert q.attempts("a")[0]["message"].startswith("r_hat 1.021 > 1.01")

def test_queue_resume_rules(tmp_path):
    q = Queue(tmp_path, create=True)
    assert q.upsert_job("a", 0, "a.yaml", {}, "s1", "d1") == "fresh"
    q.start_attempt("a", 1, {}, None, 0, "jobs/a/attempt-1")
    q.finish_attempt("a", 1, "failed", 3, "r_hat 1.05 > 1.01", FUNNEL)
    q.start_attempt("a", 2, {"sampling.target_accept": 0.95}, "target_accept", 1, "jobs/a/attempt-2")
    # the batch dies here: attempt 2 is left 'running' by a process that no longer exists
    q.close()
    q = Queue(tmp_path)
    assert [a["number"] for a in q.interrupt_stale()] == [2]
    assert q.job("a")["status"] == "interrupted"
    assert q.upsert_job("a", 0, "a.yaml", {}, "s1", "d1") == "resume"
    assert [(a["number"], a["status"]) for a in q.attempts("a")] == [(1, "failed")]
    q.finish_job("a", "passed", None, 1, 0)
    assert q.upsert_job("a", 0, "a.yaml", {}, "s1", "d1") == "final"
    assert q.upsert_job("a", 0, "a.yaml", {}, "s1", "d2") == "fresh"  # data changed
    assert q.attempts("a") == [] and q.job("a")["status"] == "pending"


def test_a_second_live_batch_is_refused(tmp_path):
    Queue(tmp_path, create=True).close()
    code = ("import sys, time; from hierwork.batch.queue import Queue; q = Queue(sys.argv[1]); "
            "q.acquire(); print('held', flush=True); time.sleep(60)")
    holder = subprocess.Popen([sys.executable, "-c", code, str(tmp_path)], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        with pytest.raises(HierworkError, match=re.escape(f"another batch (pid {holder.pid}) is running")):
            Queue(tmp_path).acquire()
    finally:
        holder.kill()
        holder.wait()
    Queue(tmp_path).acquire()  # the holder is dead: the lock is free


def test_missing_batch_and_foreign_database_are_user_errors(tmp_path):
    with pytest.raises(HierworkError, match=re.escape("no batch found in")):
        Queue(tmp_path)
    db = sqlite3.connect(tmp_path / "batch.sqlite")
    db.execute("CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)")
    db.execute("INSERT INTO meta VALUES ('format', '\"other/9\"')")
    db.commit()
    with pytest.raises(HierworkError, match=re.escape("holds batch format 'other/9'")):
        Queue(tmp_path)


# ---------------------------------------------------------------- outcomes
def test_outcome_trusts_exit_code_only_with_matching_diagnostics(tmp_path):
    run = tmp_path / "run"
    log = tmp_path / "fit.log"
    log.write_text("sampling...\nhierwork: error: data.csv: row 3: column 'y' is not a number\n")
    assert child.outcome(2, run, log) == child.Outcome(
        "invalid", 2, "hierwork: error: data.csv: row 3: column 'y' is not a number", None)
    assert child.outcome(0, run, log).status == "crashed"  # exit 0 but no folder
    run.mkdir()
    (run / "diagnostics.json").write_text(json.dumps(FUNNEL))
    assert child.outcome(0, run, log).status == "crashed"  # exit 0 but the gate says failed
    failed = child.outcome(3, run, log)
    assert failed.status == "failed"
    assert failed.message == "r_hat 1.021 > 1.01 (plot__coef[p5, intercept]); divergences 7 > 0 (plot__sd[intercept])"
    assert child.outcome(-9, run, log).message == \
        "fit was killed by SIGKILL (signal 9) (by the out-of-memory killer, or by hand)"
    assert child.outcome(-15, run, log).message == "fit was killed by SIGTERM (signal 15)"


def test_guard_mirrors_a_kill_9_and_ends_what_the_fit_left(tmp_path):
    """A fit killed by the out-of-memory killer (SIGKILL): no OSError from the guard, no orphan left."""
    import os
    import time

    import psutil

    pid_file = tmp_path / "orphan.pid"
    script = ("import os, signal, subprocess, sys; "
              "p = subprocess.Popen([sys.executable, '-c', 'import time; time.sleep(60)']); "
              f"open({str(pid_file)!r}, 'w').write(str(p.pid)); os.kill(os.getpid(), signal.SIGKILL)")
    guard = subprocess.run([sys.executable, child.GUARD, str(os.getpid()), sys.executable, "-c", script],
                           capture_output=True, text=True, timeout=60, start_new_session=True)
    assert guard.returncode == -9 and guard.stderr == ""
    orphan = int(pid_file.read_text())
    deadline = time.monotonic() + 10
    while psutil.pid_exists(orphan) and psutil.Process(orphan).status() != psutil.STATUS_ZOMBIE:
        assert time.monotonic() < deadline, "the fit's leftover process still runs"
        time.sleep(0.1)


def test_fit_command_passes_overrides_as_yaml_readable_values():
    argv = child.fit_command("s.yaml", "out", {"sampling.target_accept": 0.95,
                                               "priors.plot.sd": {"half_normal": {"sigma": 2}}})
    assert argv[1:] == ["-m", "hierwork", "fit", "s.yaml", "--out", "out", "--force",
                        "--set", "sampling.target_accept=0.95",
                        "--set", 'priors.plot.sd={"half_normal": {"sigma": 2}}']


# ---------------------------------------------------------------- summary
def test_summary_escapes_user_strings_and_lists_attempts(tmp_path):
    q = Queue(tmp_path, create=True)
    q.upsert_job("a<b>", 0, "/specs/<x>.yaml", {}, "s", "d")
    q.start_attempt("a<b>", 1, {}, None, 0, "jobs/a<b>/attempt-1")
    q.finish_attempt("a<b>", 1, "failed", 3, "r_hat 1.021 > 1.01 (<script>)", FUNNEL)
    q.start_attempt("a<b>", 2, {}, "target_accept: 0.95", 1, "jobs/a<b>/attempt-2")
    q.finish_attempt("a<b>", 2, "passed", 0, None, {"passed": True, "checks": [
        check("r_hat", 1.003, 1.01, "<=", True), check("ess_bulk", 812.0, 400, ">=", True),
        check("ess_tail", 640.0, 400, ">=", True), check("divergences", 0.0, 0, "<=", True)]})
    q.finish_job("a<b>", "passed", None, 2, 0)
    report = tmp_path / "jobs" / "a<b>" / "attempt-2" / "report.html"
    report.parent.mkdir(parents=True)
    report.write_text("<html></html>")
    summary.write(tmp_path, q)
    page = (tmp_path / "index.html").read_text()
    assert "<script>" not in page and "(&lt;script&gt;)" in page and "a&lt;b&gt;" in page
    assert 'href="jobs/a%3Cb%3E/attempt-2/report.html"' in page
    assert "qualified analyst" in page
    md = (tmp_path / "index.md").read_text()
    assert "<b>" not in md and "<script>" not in md  # raw HTML from user strings never passes through
    row = next(line for line in md.splitlines() if line.startswith("| a&lt;b&gt;"))
    assert row.split(" | ")[1:6] == ["passed the gate", "2", "1.003", "640", "0"]
    assert "2. target\\_accept: 0.95 -> passed" in md


# ---------------------------------------------------------------- spec keys
def test_spec_accepts_variants_and_remedies_and_expands_them(tmp_path):
    from hierwork.declare.spec import load_spec

    path = write_spec(tmp_path, "crop", "variants: {sweep: {sampling.draws: [300, 600]}}\n"
                                        "remedies: {max_attempts: 2}\n")
    spec = load_spec(path)
    assert expand_variants(spec) == [("crop.draws-300", {"sampling.draws": 300}),
                                     ("crop.draws-600", {"sampling.draws": 600})]


def test_spec_names_file_line_and_key_of_a_bad_remedies_value(tmp_path):
    from hierwork.declare.spec import load_spec

    path = write_spec(tmp_path, "crop", "remedies: {max_attempts: 0}\n")
    with pytest.raises(SpecError, match=re.escape(
            f"{path}:6: remedies.max_attempts: max_attempts must be a whole number of at least 1, got 0")):
        load_spec(path)


# ---------------------------------------------------------------- progress
def test_eta_spreads_the_mean_job_time_over_the_workers():
    jobs = [{"status": "passed", "started": 0.0, "finished": 10.0},
            {"status": "failed", "started": 0.0, "finished": 20.0},
            {"status": "pending", "started": None, "finished": None},
            {"status": "interrupted", "started": 50.0, "finished": None},
            {"status": "running", "started": 95.0, "finished": None}]
    # mean 15 s; two queued jobs 15 s each, the running one 15 - 5 = 10 s left; over 2 workers
    assert eta_seconds(jobs, slots=2, now=100.0) == (15 + 15 + 10) / 2
    assert eta_seconds(jobs[2:], slots=2, now=100.0) is None
    assert [duration(s) for s in (42, 425, 11520)] == ["42s", "7m05s", "3h12m"]


def test_summary_links_the_best_attempt_not_the_last(tmp_path):
    # Issue 13: a job's last attempt may be worse than an earlier one; the index links the attempt
    # that passed, else the one with the fewest failing checks.
    one_failure = {"passed": False, "checks": [check("r_hat", 1.02, 1.01, "<=", False),
                                               check("ess_bulk", 812.0, 400, ">=", True)]}
    two_failures = {"passed": False, "checks": [check("r_hat", 1.05, 1.01, "<=", False),
                                                check("ess_bulk", 120.0, 400, ">=", False)]}
    q = Queue(tmp_path, create=True)
    q.upsert_job("job", 0, "/specs/job.yaml", {}, "s", "d")
    for number, diagnostics in ((1, one_failure), (2, two_failures)):
        q.start_attempt("job", number, {}, None if number == 1 else "more draws", 0, f"jobs/job/attempt-{number}")
        q.finish_attempt("job", number, "failed", 3, None, diagnostics)
        (tmp_path / "jobs" / "job" / f"attempt-{number}").mkdir(parents=True)
        (tmp_path / "jobs" / "job" / f"attempt-{number}" / "report.html").write_text("<html></html>")
    q.finish_job("job", "failed", None, 2, 3)
    assert summary.best_attempt(q.attempts("job"))["number"] == 1
    summary.write(tmp_path, q)
    assert 'href="jobs/job/attempt-1/report.html"' in (tmp_path / "index.html").read_text()
    assert "report of attempt 1" in (tmp_path / "index.md").read_text()


def test_remedies_read_the_factor_from_reader_facing_names():
    from hierwork.batch.remedies import failing_factors

    failing = [{"worst_parameter": "plot.sd"}, {"worst_parameter": "farm=F01 intercept (standardised offset)"},
               {"worst_parameter": "farm_zone__sd[intercept]"}, {"worst_parameter": "intercept"}]
    assert failing_factors(failing, ["farm", "farm_zone", "plot"]) == ["plot", "farm", "farm_zone"]
