"""The wheat demo's population table: it fits the wheat specs and its truth is the hectare-weighted mean.

The truth is recomputed here from the farms' true values (``truth/wheat_groups.csv``)
and the true tillage effects, independently of the demo code's own arithmetic.
"""
from __future__ import annotations

import pandas as pd
import pytest
import yaml

from hierwork.demo import TRUE_PARAMETERS, make_demo_data
from hierwork.pipeline import demo_specs_folder


def test_population_table_and_its_truth(tmp_path):
    make_demo_data(tmp_path)
    population = pd.read_csv(tmp_path / "wheat_population.csv")
    farms = pd.read_csv(tmp_path / "truth" / "wheat_groups.csv").set_index("farm")
    truth = pd.read_csv(tmp_path / "truth" / "wheat_population.csv").set_index("area")
    spec = yaml.safe_load((demo_specs_folder() / "wheat.yaml").read_text(encoding="utf-8"))
    needed = {p if isinstance(p, str) else p["column"] for p in spec["predictors"]} | {"farm"}
    assert needed <= set(population.columns) and (population["hectares"] >= 0).all()
    assert set(population["farm"]) == set(farms.index)
    p = TRUE_PARAMETERS["wheat"]
    shift = population["tillage"].map({"conventional": 0.0, "reduced": p["tillage=reduced"], "none": p["tillage=none"]})
    expected = (farms.loc[population["farm"], "true_intercept"].to_numpy()
                + farms.loc[population["farm"], "true_nitrogen_slope"].to_numpy() * population["nitrogen_kg"] + shift)
    weighted = expected * population["hectares"]
    assert truth.loc["all", "true_mean_yield"] == pytest.approx(weighted.sum() / population["hectares"].sum(),
                                                                abs=5e-5)
    for region, part in population.groupby("region"):
        assert truth.loc[region, "true_mean_yield"] == pytest.approx(
            weighted[part.index].sum() / part["hectares"].sum(), abs=5e-5)
    # The population's make-up differs from the plots': less conventional tillage than the plots' half.
    share = population.groupby("tillage")["hectares"].sum() / population["hectares"].sum()
    assert share["conventional"] < 0.4
