"""The fit pipeline end to end: the run folder contract, exit codes, reproducibility, atomicity.

Data: the rail travel times (Devore 2000, Example 10.10; tests/data/SOURCES.md).
Values are checked by the external tests; here we check the pipeline's contract.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import hierwork
from hierwork.cli import main
from test_report_fixture import Page

pytestmark = pytest.mark.slow  # every test here fits a model (MCMC)

RAIL = Path(__file__).parent / "data" / "rail.csv"
SPEC = f"""
format: hierwork/1
name: rail
data: {RAIL}
outcome: {{column: travel_ns}}
groups:
  rail: {{}}
sampling: {{chains: 2, warmup: 300, draws: 300, seed: 11}}
"""


@pytest.fixture(scope="module")
def rail_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fit")
    spec = folder / "rail.yaml"
    spec.write_text(SPEC)
    return hierwork.fit(spec, out=folder / "run", overrides={"gate.ess_bulk_min": 100, "gate.ess_tail_min": 100})


def test_run_folder_has_every_file(rail_run):
    names = {p.name for p in rail_run.path.iterdir()}
    assert {"posterior.nc", "diagnostics.json", "group_estimates.csv", "summary.csv", "spec.yaml",
            "provenance.json", "plan.json", "pooling.csv", "report.html", "summary.md", "figures"} <= names
    figures = {p.name for p in (rail_run.path / "figures").iterdir()}
    assert {"ranked-rail-intercept.svg", "ranked-rail-intercept.png", "pooling-rail-intercept.svg",
            "pooling-rail-intercept.png", "traces.svg", "traces.png"} <= figures
    assert (rail_run.path / "figures" / "traces.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert not [p for p in rail_run.path.parent.iterdir() if ".tmp-" in p.name]


def test_group_estimates_columns_and_units(rail_run):
    table = rail_run.group_estimates
    assert list(table.columns) == [
        "factor", "group", "term", "rows", "no_pooling", "complete_pooling", "partial_mean", "partial_sd",
        "lower", "upper", "outcome_mean", "outcome_lower", "outcome_upper", "no_pooling_outcome",
        "complete_pooling_outcome", "pooling_weight", "p_above_population", "p_beyond_target",
        "rank_median", "rank_lower", "rank_upper", "p_top", "p_bottom"]
    assert len(table) == 6 and set(table["rows"]) == {3}
    # Normal outcome: the outcome's scale is the linear predictor's.
    np.testing.assert_allclose(table["outcome_mean"], table["partial_mean"])
    assert table["p_beyond_target"].isna().all()  # no estimates.target in the spec
    # No pooling is each rail's mean, complete pooling the grand mean (closed forms).
    data = pd.read_csv(RAIL)
    means = data.groupby("rail")["travel_ns"].mean()
    np.testing.assert_allclose(table["no_pooling"].to_numpy(), means.loc[table["group"].astype(int)].to_numpy())
    np.testing.assert_allclose(table["complete_pooling"], data["travel_ns"].mean())
    assert (table["lower"] < table["partial_mean"]).all() and (table["partial_mean"] < table["upper"]).all()


def test_summary_and_diagnostics_contract(rail_run):
    summary = rail_run.summary
    assert list(summary.columns) == ["parameter", "mean", "sd", "lower", "upper", "ess_bulk", "ess_tail", "r_hat"]
    assert list(summary["parameter"]) == ["intercept", "residual_sd", "rail.sd", "outcome"]
    # No predictors: the population value on the outcome's scale is the intercept.
    np.testing.assert_allclose(summary["mean"].iloc[3], summary["mean"].iloc[0])
    diag = rail_run.diagnostics
    assert diag["format"] == "hierwork-diagnostics/1"
    assert [c["name"] for c in diag["checks"]] == ["r_hat", "ess_bulk", "ess_tail", "divergences", "bfmi",
                                                    "treedepth"]
    assert diag["passed"] == all(c["passed"] for c in diag["checks"])
    prov = rail_run.provenance
    assert prov["seed"] == 11 and len(prov["data_sha256"]) == 64 and prov["path"] == "collapsed"
    assert prov["packages"]["pymc"]


def test_same_seed_same_numbers(rail_run, tmp_path):
    again = hierwork.fit(rail_run.path / "spec.yaml", out=tmp_path / "again")
    pd.testing.assert_frame_equal(again.group_estimates, rail_run.group_estimates)


def test_spec_as_run_refits(rail_run):
    spec = hierwork.load_spec(rail_run.path / "spec.yaml")
    assert spec.data_path == RAIL.resolve()
    assert spec.gate["ess_bulk_min"] == 100


def test_gate_failure_exits_3_and_marks_every_output(rail_run, tmp_path, capsys):
    out = tmp_path / "strict"
    code = main(["fit", str(rail_run.path / "spec.yaml"), "--out", str(out), "--quiet",
                 "--set", "gate.ess_bulk_min=1000000"])
    last = capsys.readouterr().out.strip().splitlines()[-1]
    assert code == 3
    assert last.startswith("gate FAILED")
    diag = json.loads((out / "diagnostics.json").read_text())
    assert diag["passed"] is False
    failed = [c for c in diag["checks"] if not c["passed"]]
    assert [c["name"] for c in failed] == ["ess_bulk"] and failed[0]["worst_parameter"]
    page = Page((out / "report.html").read_text())
    verdict = page.find("section", id="verdict")[0]
    assert "failed" in verdict[1]["class"] and "Gate failed (Bulk ESS): do not use these estimates." in verdict[2]
    assert "GATE FAILED" in (out / "summary.md").read_text().upper()
    assert json.loads((out / "provenance.json").read_text())["passed"] is False


def test_force_replaces_only_after_success(rail_run, tmp_path, capsys):
    out = tmp_path / "run"
    shutil.copytree(rail_run.path, out)
    (out / "old.txt").write_text("old")
    code = main(["fit", str(rail_run.path / "spec.yaml"), "--out", str(out), "--force", "--quiet"])
    assert code in (0, 3)
    assert not (out / "old.txt").exists() and (out / "posterior.nc").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"]  # no staging or old folder left


def test_run_load_rejects_incomplete_folder(tmp_path):
    (tmp_path / "diagnostics.json").write_text("{}")
    with pytest.raises(hierwork.RunFolderError, match="incomplete"):
        hierwork.Run.load(tmp_path)
