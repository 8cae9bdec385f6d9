"""Predictions for new rows (hierwork/predict.py, ``hierwork predict``).

Checks: rows in known groups reproduce the group's posterior mean from
group_estimates.csv (computed by hierwork/estimates.py from the same draws);
an unseen group's predictive variance equals the closed form of the law of
total variance for a normal model, E[tau^2] + E[sigma^2] + Var(b x), within
Monte Carlo error; bad NEW.csv exits 2 with one message and writes nothing.
Data: the invented wheat demo (hierwork/demo.py).
"""
from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

import predictive_kit as kit
from hierwork.cli import main
from hierwork.data.labels import group_labels
from hierwork.results.predict import _group_index, predict

pytestmark = pytest.mark.slow  # every test here fits a model (MCMC)

WHEAT = (kit.Path(__file__).parent.parent / "model_specs" / "wheat.yaml").read_text().replace("../demo/data", "DEMO")


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("wheat")
    return kit.fit_run(folder, kit.write(folder, WHEAT))


def _rows(farms, nitrogen=0.0, tillage="conventional"):
    return pd.DataFrame({"farm": farms, "nitrogen_kg": nitrogen, "tillage": tillage})


def _reference(run, column):
    """The value at which group_estimates.csv compares groups (plan.json, estimands)."""
    return next(v["value"] for v in run.plan["estimands"]["values"] if v["column"] == column)


def test_known_groups_match_posterior_group_means(run):
    table = run.group_estimates.set_index("group")
    farms = list(table.index[:5])
    # At the reference values (nitrogen at its mean, tillage at its reference level): the farm's row.
    out = predict(run, _rows(farms, nitrogen=_reference(run, "nitrogen_kg"), tillage=_reference(run, "tillage")))
    np.testing.assert_allclose(out["link_mean"], table.loc[farms, "partial_mean"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(out["outcome_mean"], table.loc[farms, "outcome_mean"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(out["outcome_lower"], table.loc[farms, "outcome_lower"], rtol=0, atol=1e-9)
    assert (out["group_status"] == "known").all()
    # the outcome's predictive mean equals the link mean (identity) within Monte Carlo error:
    # SE = pred_sd / sqrt(draws) (600 draws here); 5 SE.
    se = out["pred_sd"] / np.sqrt(600)
    assert (np.abs(out["pred_mean"] - out["link_mean"]) < 5 * se).all()


def test_unseen_group_variance_matches_total_variance(run):
    # Law of total variance over draws, for y = b0 + u + e with u ~ N(0, tau^2), e ~ N(0, sigma^2):
    # Var(y) = E[tau^2] + E[sigma^2] + Var(b0). 40 new farms (independent effects) at x = 0;
    # the mean of 40 sample variances of 600 draws has relative SE ~ sqrt(2/600/40) ~ 1%; 5% is ~4 SE.
    post = run.posterior.posterior
    expected = float((post["farm__sd"] ** 2).mean() + (post["residual_sd"] ** 2).mean()
                     + post["b"].sel(term="intercept").var())
    out = predict(run, _rows([f"new_{k}" for k in range(40)]))
    assert (out["group_status"] == "new").all()
    assert float((out["pred_sd"] ** 2).mean()) == pytest.approx(expected, rel=0.05)
    known = predict(run, _rows([str(run.group_estimates["group"].iloc[0])]))
    assert (out["pred_upper"] - out["pred_lower"]).min() > (known["pred_upper"] - known["pred_lower"]).iloc[0]


def test_nested_labels_compose_like_fitting():
    factors = [SimpleNamespace(name="region", column="region", within=None),
               SimpleNamespace(name="farm", column="farm", within="region")]
    frame = pd.DataFrame({"region": ["north", "south"], "farm": ["7", "7"]})
    labels = group_labels(frame, factors)  # the one rule, shared by fitting and predict
    assert list(labels["farm"]) == ["north/7", "south/7"]
    index, new = _group_index(labels["farm"], ["north/7"])
    assert list(index) == [0, 1] and new == ["south/7"]


def test_cli_writes_predictions(run, tmp_path, capsys):
    new = tmp_path / "new.csv"
    _rows(["farm_01", "farm_99"], nitrogen=120, tillage="reduced").to_csv(new, index=False)
    out = tmp_path / "pred.csv"
    assert main(["predict", str(run.path), str(new), "--out", str(out)]) == 0
    table = pd.read_csv(out)
    assert list(table["group_status"]) == ["known", "new"]
    assert {"pred_mean", "pred_sd", "pred_lower", "pred_upper", "link_mean"} <= set(table.columns)
    assert "1 with an unseen group" in capsys.readouterr().out


@pytest.mark.parametrize("frame, message", [
    (pd.DataFrame({"farm": ["farm_01"], "tillage": ["none"]}), "missing column 'nitrogen_kg'"),
    (pd.DataFrame({"farm": ["farm_01"], "nitrogen_kg": [1.0], "tillage": ["deep"]}), "level 'deep' not seen"),
    (pd.DataFrame({"farm": ["farm_01"], "nitrogen_kg": ["lots"], "tillage": ["none"]}), "must be numeric"),
], ids=["missing-column", "unknown-level", "not-numeric"])
def test_bad_new_rows_exit_2(run, tmp_path, capsys, frame, message):
    new = tmp_path / "new.csv"
    frame.to_csv(new, index=False)
    out = tmp_path / "pred.csv"
    assert main(["predict", str(run.path), str(new), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err and err.count("\n") == 1
    assert not out.exists()
