"""Interaction and transformed terms (hierwork/plan/design.py), from spec to ``predict``.

Fast checks are closed forms: a transformed term's column is the transform of
its column (numpy), an interaction's is the product of its parts', a
standardised term scales new rows with the fitted data's mean and SD, and the
reference row of the design is the design at the reference values. The slow
check fits simulated data with known coefficients (simulation recovery, common
practice) and compares the posterior means with statsmodels' MixedLM fitted to
the same columns built by hand (REML; a reference library), then predicts new
rows against their known expected values.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import hierwork
from conftest import write_spec
from hierwork.errors import SpecError
from hierwork.plan.design import Design

SPEC = """
format: hierwork/1
name: catch
data: catch.csv
outcome: {{column: catch_kg}}
predictors:
  - engine_hours
  - sea_state
  - {{column: bait_kg, transform: log}}
  - {{column: crew, transform: standardise}}
  - {{interaction: [engine_hours, sea_state]}}
groups:
  boat: {{}}
{extra}
sampling: {{chains: 2, warmup: 300, draws: 300, seed: 7}}
"""
#: Known coefficients of the simulation (catch in kg).
TRUE = {"intercept": 20.0, "engine_hours": 1.5, "sea_state=moderate": -2.0, "sea_state=rough": -6.0,
        "log(bait_kg)": 4.0, "standardised(crew)": 1.0, "engine_hours:sea_state=moderate": -0.5,
        "engine_hours:sea_state=rough": -1.0}
SIGMA, TAU, BOATS, TRIPS = 1.5, 2.0, 12, 25


def simulate(rng, n_boats=BOATS, trips=TRIPS, boat_effects=None):
    """Trips of fishing boats with the known coefficients; the boat effects drawn unless given."""
    n = n_boats * trips
    frame = pd.DataFrame({"boat": np.repeat([f"b{k:02d}" for k in range(n_boats)], trips),
                          "engine_hours": rng.uniform(2, 10, n).round(2),
                          "sea_state": rng.choice(["calm", "moderate", "rough"], n),
                          "bait_kg": np.exp(rng.uniform(0, 3, n)).round(3),
                          "crew": rng.integers(2, 9, n)})
    u = rng.normal(0, TAU, n_boats) if boat_effects is None else boat_effects
    frame["expected"] = expected(frame) + np.repeat(u, trips)
    frame["catch_kg"] = frame["expected"] + rng.normal(0, SIGMA, n)
    return frame, u


def expected(frame, crew_mean=None, crew_sd=None):
    """The known population mean of each row (crew standardised with the given or the rows' own mean and SD)."""
    crew_mean = frame["crew"].mean() if crew_mean is None else crew_mean
    crew_sd = frame["crew"].std(ddof=1) if crew_sd is None else crew_sd
    moderate, rough = (frame["sea_state"] == "moderate").astype(float), (frame["sea_state"] == "rough").astype(float)
    h = frame["engine_hours"]
    return (TRUE["intercept"] + TRUE["engine_hours"] * h + TRUE["sea_state=moderate"] * moderate
            + TRUE["sea_state=rough"] * rough + TRUE["log(bait_kg)"] * np.log(frame["bait_kg"])
            + TRUE["standardised(crew)"] * (frame["crew"] - crew_mean) / crew_sd
            + TRUE["engine_hours:sea_state=moderate"] * h * moderate + TRUE["engine_hours:sea_state=rough"] * h * rough)


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    folder = tmp_path_factory.mktemp("terms")
    frame, u = simulate(np.random.default_rng(2026))
    frame.drop(columns="expected").to_csv(folder / "catch.csv", index=False)
    return folder, frame, u


def spec_of(folder, extra=""):
    return write_spec(folder, SPEC.format(extra=extra))


def test_term_names_and_columns_are_the_closed_forms(data):
    folder, frame, _ = data
    plan = hierwork.check(spec_of(folder)).plan
    assert plan.terms == tuple(TRUE)
    X = pd.DataFrame(plan.X, columns=plan.terms)
    h, rough = frame["engine_hours"].to_numpy(), (frame["sea_state"] == "rough").to_numpy(float)
    np.testing.assert_allclose(X["log(bait_kg)"], np.log(frame["bait_kg"]))
    np.testing.assert_allclose(X["standardised(crew)"], (frame["crew"] - frame["crew"].mean()) / frame["crew"].std())
    np.testing.assert_allclose(X["engine_hours:sea_state=rough"], h * rough)


def test_saved_design_rebuilds_new_rows_with_the_fitted_scaling(data):
    folder, frame, _ = data
    design = hierwork.check(spec_of(folder)).plan.design
    again = Design.from_dict(design.to_dict())
    new = frame.head(7).copy()
    np.testing.assert_array_equal(again.matrix(new), design.matrix(new))
    # standardise uses the fitted rows' mean and SD, not the new rows' own
    column = again.matrix(new)[:, again.index("standardised(crew)")]
    np.testing.assert_allclose(column, (new["crew"] - frame["crew"].mean()) / frame["crew"].std(ddof=1))
    assert set(again.columns) == {"engine_hours", "sea_state", "bait_kg", "crew"}


def test_reference_row_is_the_design_at_the_reference_values(data):
    folder, frame, _ = data
    plan = hierwork.check(spec_of(folder, "estimates: {at: {engine_hours: 4, sea_state: rough}}")).plan
    x = dict(zip(plan.terms, plan.estimands.x))
    assert x["engine_hours"] == 4 and x["sea_state=rough"] == 1 and x["sea_state=moderate"] == 0
    assert x["engine_hours:sea_state=rough"] == 4 and x["engine_hours:sea_state=moderate"] == 0
    assert x["log(bait_kg)"] == pytest.approx(np.log(frame["bait_kg"].mean()))  # the column's mean, transformed
    assert x["standardised(crew)"] == pytest.approx(0.0, abs=1e-12)
    with pytest.raises(SpecError, match=r"log\(bait_kg\) is not defined at bait_kg = 0"):
        hierwork.check(spec_of(folder, "estimates: {at: {bait_kg: zero}}"))


def test_priors_are_keyed_by_term_names(data):
    folder, _, _ = data
    extra = ('priors:\n  "log(bait_kg)": {normal: {mu: 0, sigma: 3}}\n'
             '  "engine_hours:sea_state": {normal: {mu: 0, sigma: 2}}')
    priors = hierwork.check(spec_of(folder, extra)).plan.priors
    assert priors["log(bait_kg)"].params == {"mu": 0.0, "sigma": 3.0} and not priors["log(bait_kg)"].default
    for term in ("engine_hours:sea_state=moderate", "engine_hours:sea_state=rough"):
        assert priors[term].params["sigma"] == 2.0
    assert priors["standardised(crew)"].default


@pytest.fixture(scope="module")
def fitted(data, tmp_path_factory):
    folder, _, _ = data
    return hierwork.fit(spec_of(folder), out=tmp_path_factory.mktemp("fit") / "run",
                        overrides={"gate.ess_bulk_min": 100, "gate.ess_tail_min": 100})


def by_hand(frame, crew_mean, crew_sd) -> pd.DataFrame:
    """The design's columns built from their closed forms, named as hierwork names them."""
    X = pd.DataFrame({"intercept": 1.0, "engine_hours": frame["engine_hours"]})
    for state in ("moderate", "rough"):
        X[f"sea_state={state}"] = (frame["sea_state"] == state).astype(float)
    X["log(bait_kg)"] = np.log(frame["bait_kg"])
    X["standardised(crew)"] = (frame["crew"] - crew_mean) / crew_sd
    for state in ("moderate", "rough"):
        X[f"engine_hours:sea_state={state}"] = frame["engine_hours"] * X[f"sea_state={state}"]
    return X[list(TRUE)]


@pytest.fixture(scope="module")
def reference(fitted, data):
    """statsmodels' MixedLM (REML) on the design built by hand."""
    import statsmodels.api as sm

    _, frame, _ = data
    X = by_hand(frame, frame["crew"].mean(), frame["crew"].std(ddof=1))
    return sm.MixedLM(frame["catch_kg"], X, groups=frame["boat"]).fit(reml=True)


@pytest.mark.slow
def test_fit_recovers_the_terms_and_matches_statsmodels(fitted, reference):
    b = fitted.posterior.posterior["b"]
    mean, sd = b.mean(("chain", "draw")).to_series(), b.std(("chain", "draw")).to_series()
    for term, value in TRUE.items():
        # within 3 posterior SDs of the truth; within half a posterior SD of the REML estimate
        assert abs(mean[term] - value) < 3 * sd[term], term
        assert abs(mean[term] - reference.fe_params[term]) < 0.5 * sd[term], term


@pytest.mark.slow
def test_predict_applies_the_terms_to_new_rows(fitted, reference, data):
    _, frame, u = data
    new, _ = simulate(np.random.default_rng(99), n_boats=3, trips=20, boat_effects=u[:3])
    new["boat"] = new["boat"].replace({"b02": "new boat"})
    out = hierwork.predict(fitted, new.drop(columns=["expected", "catch_kg"]))
    # the REML fixed part at the new rows, crew standardised with the fitted rows' mean and SD
    fixed = by_hand(new, frame["crew"].mean(), frame["crew"].std(ddof=1)).to_numpy() @ reference.fe_params.to_numpy()
    blup = new["boat"].map({g: float(v.iloc[0]) for g, v in reference.random_effects.items()}).fillna(0.0)
    known = (new["boat"] != "new boat").to_numpy()
    # known boats: the fixed part plus the boat's BLUP; a new boat: the fixed part (its effect averages out)
    assert np.abs(out["outcome_mean"] - (fixed + blup))[known].max() < 0.2
    assert np.abs(out["outcome_mean"] - fixed)[~known].max() < 0.4  # Monte Carlo error of new effects (tau 2, 600 draws)
    assert (out["group_status"] == np.where(known, "known", "new")).all()


# --- categorical group-level predictors (chick weights: Crowder and Hand 1990; tests/data/SOURCES.md)

CHICKS = """
format: hierwork/1
name: chicks
data: {data}
outcome: {{column: weight_g}}
predictors: [day]
groups:
  chick:
    predictors: [{{column: diet, type: categorical{reference}}}]
{extra}
"""


def chick_plan(tmp_path, reference="", extra=""):
    from conftest import DATA

    return hierwork.check(write_spec(tmp_path, CHICKS.format(data=DATA / "chickweight.csv", reference=reference,
                                                             extra=extra))).plan


def test_categorical_group_predictor_is_dummy_coded_per_group(tmp_path):
    from conftest import DATA

    plan = chick_plan(tmp_path)
    f = plan.factor("chick")
    assert f.predictors == ("diet=2", "diet=3", "diet=4")
    table = pd.read_csv(DATA / "chickweight.csv").groupby("chick", sort=False)["diet"].first()
    diet = table.loc[[int(g) for g in f.levels]].to_numpy()
    np.testing.assert_array_equal(f.W, np.column_stack([diet == k for k in (2, 3, 4)]).astype(float))
    np.testing.assert_array_equal(plan.estimands.w["chick"], [0.0, 0.0, 0.0])  # the reference level, diet 1
    assert [p for p in plan.priors if p.startswith("chick.diet")] == ["chick.diet=2", "chick.diet=3", "chick.diet=4"]


def test_group_predictor_reference_level_and_priors_on_the_column(tmp_path):
    extra = "priors:\n  chick.diet: {normal: {mu: 0, sigma: 20}}\nestimates: {at: {diet: 2}}"
    plan = chick_plan(tmp_path, reference=", reference: 3", extra=extra)
    assert plan.factor("chick").predictors == ("diet=1", "diet=2", "diet=4")
    assert all(plan.priors[f"chick.diet={k}"].params["sigma"] == 20 for k in (1, 2, 4))
    np.testing.assert_array_equal(plan.estimands.w["chick"], [0.0, 1.0, 0.0])


def test_predict_codes_a_new_groups_level_with_the_stored_design(tmp_path):
    from types import SimpleNamespace

    from hierwork.data.rows import RowRef
    from hierwork.errors import DataError
    from hierwork.plan.describe import plan_as_dict
    from hierwork.results.predict import _new_group_values

    stored = plan_as_dict(chick_plan(tmp_path))["factors"][0]
    factor = SimpleNamespace(**stored)
    new = pd.DataFrame({"chick": ["n1", "n1", "n2"], "diet": ["4", "4", "1"], "day": [0, 2, 0]})
    ref = RowRef.of("new", 3, csv=False)
    W = _new_group_values(new, factor, new["chick"].to_numpy(), ["n1", "n2"], ref)
    np.testing.assert_array_equal(W, [[0, 0, 1], [0, 0, 0]])
    with pytest.raises(DataError, match="level '7' not seen when fitting"):
        _new_group_values(new.assign(diet=["7", "7", "1"]), factor, new["chick"].to_numpy(), ["n1", "n2"], ref)
    with pytest.raises(DataError, match="not constant within new chick 'n1'"):
        _new_group_values(new.assign(diet=["4", "2", "1"]), factor, new["chick"].to_numpy(), ["n1", "n2"], ref)
