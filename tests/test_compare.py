"""hierwork compare, and the report and compare commands as a user runs them."""
from __future__ import annotations

import json
import subprocess
import sys

import pandas as pd
import pytest

from hierwork.report.compare import compare_runs
from hierwork.report.compare import spec_differences
from test_report_fixture import HOSTILE, Page, build_run, copy_run, run_root  # noqa: F401

pytestmark = pytest.mark.slow  # every test here fits a model (MCMC)


def _cli(*args):
    return subprocess.run([sys.executable, "-m", "hierwork", *map(str, args)],
                          capture_output=True, text=True, timeout=300)


def test_spec_differences_are_dotted_keys():
    a = {"sampling": {"draws": 1000, "seed": 1}, "groups": {"farm": {"column": "farm"}}}
    b = {"sampling": {"draws": 500, "seed": 1},
         "groups": {"farm": {"column": "farm", "parameterisation": "non_centred"}}}
    # A key one spec leaves out shows the key table's default (README key table).
    assert spec_differences(a, b) == [("sampling.draws", "1000", "500"),
                                      ("groups.farm.parameterisation", "auto (default)", "non_centred")]
    assert spec_differences(a, a) == []


def test_moved_estimates_are_those_shifted_by_more_than_their_sd(run_root):
    a, b = build_run(run_root), build_run(run_root, shift=0.5)
    comparison = compare_runs(a, b)
    # The shifted run adds exactly 0.5 to every partial mean and leaves the SDs alone,
    # so a group moved exactly when 0.5 exceeds its posterior SD.
    table = pd.read_csv(a / "group_estimates.csv", keep_default_na=False)
    expected = set(table.loc[table["partial_sd"] < 0.5, "group"])
    assert set(comparison.moved_groups["group"]) == expected and expected
    assert comparison.moved_groups["change"].round(12).eq(0.5).all()
    ratios = comparison.moved_groups["change_in_sd"].abs()
    assert ratios.is_monotonic_decreasing
    assert comparison.moved_parameters.empty and comparison.spec_changes == []
    assert comparison.same_data is True
    # Symmetric in A and B: the same groups moved, in the other direction.
    back = compare_runs(b, a)
    assert set(back.moved_groups["group"]) == expected
    assert back.moved_groups["change"].round(12).eq(-0.5).all()


def test_compare_reports_spec_data_and_diagnostics_changes(run_root, tmp_path):
    a = build_run(run_root)
    b = copy_run(build_run(run_root, failing=True), tmp_path / "b")
    provenance = json.loads((b / "provenance.json").read_text())
    provenance["data_sha256"] = "0" * 64
    (b / "provenance.json").write_text(json.dumps(provenance))
    text = compare_runs(a, b).text()
    assert "Data: DIFFERENT file contents" in text
    assert "Gate: A passed; B FAILED (R-hat, Bulk ESS)." in text
    assert "Spec differences (2):" in text
    assert "gate.ess_bulk_min  100   100000" in text
    bulk = [line.split() for line in text.splitlines() if line.strip().startswith("Bulk ESS")][0]
    assert bulk[-2:] == ["pass", "FAIL"]


def test_compare_html_escapes_labels_and_is_self_contained(run_root):
    html = compare_runs(build_run(run_root), build_run(run_root, shift=0.5)).html()
    page = Page(html)
    assert page.errors == []
    assert "<script>alert(1)" not in html
    assert any(text == HOSTILE for _, _, text in page.find("td"))
    assert len(page.find("script")) == 1
    assert page.find("img") and all(a["src"].startswith("data:image/svg+xml;base64,") for _, a, _ in page.find("img"))
    assert "http://" not in html and "https://" not in html


def test_a_prior_change_lists_every_parameter_with_its_change(run_root):
    # Two runs differing only in the prior of farm.sd (half-normal 0.05 against the default): every
    # parameter of summary.csv is listed with both runs' values, largest change first, and the spec
    # difference shows the prior each run actually used (plan.json), not "(absent)".
    a, b = build_run(run_root), build_run(run_root, farm_sd_prior=0.05)
    comparison = compare_runs(a, b, moved=0.25)
    summary = pd.read_csv(a / "summary.csv")
    assert set(comparison.parameters["parameter"]) == set(summary["parameter"])
    sizes = comparison.parameters["change_in_sd"].abs()
    assert sizes.is_monotonic_decreasing and comparison.parameters.iloc[0]["parameter"] == "farm.sd"
    assert (comparison.moved_parameters["change_in_sd"].abs() > 0.25).all()
    plan_a = json.loads((a / "plan.json").read_text())["priors"]["farm.sd"]
    assert comparison.spec_changes == [("priors.farm.sd", _prior(plan_a), "half_normal(sigma=0.05)")]
    text = comparison.text()
    assert "(absent)" not in text and f"({len(summary)}; " in text
    assert "farm.sd" in text.split("Every population and variance parameter")[1].splitlines()[2]


def _prior(prior):
    from hierwork.formatting import number

    return (f"{prior['dist']}(" + ", ".join(f"{k}={number(v)}" for k, v in prior["params"].items())
            + ") (default)")


def test_groups_in_one_run_only_are_listed(run_root, tmp_path):
    a = build_run(run_root)
    b = copy_run(a, tmp_path / "fewer")
    table = pd.read_csv(b / "group_estimates.csv", keep_default_na=False)
    table[table["group"] != "west_03"].to_csv(b / "group_estimates.csv", index=False)
    comparison = compare_runs(a, b)
    assert comparison.only_a == [["farm", "west_03", "intercept"]] and comparison.only_b == []
    assert "Groups only in A (1): farm/west_03/intercept" in comparison.text()


@pytest.mark.slow
def test_report_and_compare_commands(run_root, tmp_path):
    passing = copy_run(build_run(run_root), tmp_path / "passing")
    failing = copy_run(build_run(run_root, failing=True), tmp_path / "failing")
    done = _cli("report", passing)
    assert done.returncode == 0, done.stderr
    assert (passing / "report.html").is_file() and (passing / "summary.md").is_file()
    assert done.stdout.splitlines()[-1] == "Gate passed: all 6 convergence checks met their limits."
    done = _cli("report", failing)
    assert done.returncode == 3  # contracts.md: fitted but the gate failed
    assert "do not use these estimates" in done.stdout
    out = tmp_path / "compare.html"
    done = _cli("compare", passing, failing, "--html", out)
    assert done.returncode == 0, done.stderr
    assert "Gate: A passed; B FAILED (R-hat, Bulk ESS)." in done.stdout and out.is_file()


def test_commands_reject_a_missing_run_folder_in_one_line(tmp_path):
    done = _cli("report", tmp_path / "nowhere")
    assert done.returncode == 2 and done.stdout == ""
    assert done.stderr == (f"hierwork: error: {tmp_path / 'nowhere'}: run folder not found "
                           "(give the --out folder of 'hierwork fit')\n")
    done = _cli("compare", tmp_path, tmp_path / "nowhere")
    assert done.returncode == 2 and len(done.stderr.splitlines()) == 1
    assert "not a run folder" in done.stderr
