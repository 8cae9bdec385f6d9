"""The invented demo data: reproducible, valid for its specs, and built so that
partial pooling visibly beats no pooling for small groups.

The pooling checks estimate group values with general-purpose tools that are
not part of hierwork (statsmodels MixedLM with REML; a random-effects
meta-analysis with the Paule-Mandel between-group variance, Paule and Mandel
1982, shrinking each group's own estimate towards the mean as in Efron and
Morris 1975) and compare them with the true values the simulation used.
"""
from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
import yaml
from statsmodels.stats.meta_analysis import combine_effects

from hierwork.demo import DEFAULT_SEED, DEMO_DATASETS, TRUE_PARAMETERS, make_demo_data

SPEC_DIR = Path(__file__).resolve().parents[1] / "model_specs"
DEMO_SPECS = ("wheat.yaml", "wheat_slopes.yaml", "line_defects.yaml",
              "line_defects_nb.yaml", "depot_delays.yaml", "depot_repairs.yaml", "plot_birds.yaml",
              "ward_infections.yaml", "depot_ratings.yaml")
# Seeds for the checks that must hold on average, not only for the demo's seed.
OTHER_SEEDS = (1, 2, 3, 4, 5, 6)


@pytest.fixture(scope="session")
def demo(tmp_path_factory):
    """``demo(name, seed)`` -> (data, truth) tables, generated once per seed."""
    folders = {}

    def read(name, seed=DEFAULT_SEED):
        if seed not in folders:
            folders[seed] = tmp_path_factory.mktemp(f"demo_{seed}")
            make_demo_data(folders[seed], seed=seed)
        folder = folders[seed]
        return (pd.read_csv(folder / f"{name}.csv"),
                pd.read_csv(folder / "truth" / f"{name}_groups.csv"))

    read("wheat")
    read.folder = folders[DEFAULT_SEED]
    return read


def test_writes_every_scenario_and_its_truth(tmp_path):
    written = make_demo_data(tmp_path / "fresh" / "data")
    assert sorted(written) == sorted(DEMO_DATASETS)
    for name, path in written.items():
        assert path == tmp_path / "fresh" / "data" / f"{name}.csv"
        assert path.is_file()
        assert (path.parent / "truth" / f"{name}_groups.csv").is_file()
    assert not [p for p in (tmp_path / "fresh").rglob("*.tmp")], "temporary files left behind"


def test_same_seed_same_bytes_other_seed_other_data(demo, tmp_path):
    again = make_demo_data(tmp_path / "again", seed=DEFAULT_SEED)
    other = make_demo_data(tmp_path / "other", seed=DEFAULT_SEED + 1)
    for name in DEMO_DATASETS:
        first = (demo.folder / f"{name}.csv").read_bytes()
        assert again[name].read_bytes() == first
        assert other[name].read_bytes() != first


def test_files_are_small(demo):
    # "a couple of minutes on 2 cores" for the whole demo: keep each table small.
    for name in DEMO_DATASETS:
        data, _ = demo(name)
        assert 500 <= len(data) <= 3000, (name, len(data))


def test_wheat_structure(demo):
    data, truth = demo("wheat")
    assert data.columns.tolist() == ["region", "farm", "plot", "soil_carbon", "tillage",
                                     "nitrogen_kg", "yield_t_ha"]
    sizes = data.groupby("farm").size()
    assert sizes.size == 30
    assert (sizes <= 3).sum() >= 5 and (sizes >= 60).sum() >= 3       # very unequal farms
    assert (data.groupby("farm")["region"].nunique() == 1).all()       # farms nested in regions
    assert data["region"].nunique() == 5
    assert (data.groupby("farm")["soil_carbon"].nunique() == 1).all()  # farm-level predictor
    assert set(data["tillage"]) == {"conventional", "reduced", "none"}
    assert data["tillage"].value_counts().idxmax() == "conventional"   # the reference level
    assert data["nitrogen_kg"].between(0, 240).all()
    assert (data["yield_t_ha"] > 0).all() and data.notna().all().all()
    assert truth.set_index("farm")["n_plots"].equals(sizes.rename("n_plots").rename_axis("farm"))


def test_line_defects_structure(demo):
    data, truth = demo("line_defects")
    sizes = data.groupby("line").size()
    assert sizes.size == 25 and sizes.min() <= 3 and sizes.max() >= 100
    assert data["defects"].dtype.kind == "i" and (data["defects"] >= 0).all()
    assert (data["hours_run"] > 0).all()
    assert set(data["shift"]) == {"day", "evening", "night"}
    assert truth.set_index("line")["n_shifts"].equals(sizes.rename("n_shifts").rename_axis("line"))


def test_line_defects_are_over_dispersed(demo):
    # Poisson deviance per residual degree of freedom near 1 means no
    # over-dispersion (McCullagh and Nelder 1989, §6.2); the gamma-Poisson
    # simulation must show clearly more, so the negative binomial variant earns its place.
    data, _ = demo("line_defects")
    fit = smf.glm("defects ~ 0 + C(line) + C(shift, Treatment('day'))", data,
                  family=sm.families.Poisson(), offset=np.log(data["hours_run"])).fit()
    assert fit.pearson_chi2 / fit.df_resid > 1.2


def test_depot_delays_structure(demo):
    data, truth = demo("depot_delays")
    sizes = data.groupby("depot").size()
    assert sizes.size == 40 and sizes.min() <= 3 and sizes.max() >= 50
    assert (data["deliveries"] > 0).all()
    assert ((data["late"] >= 0) & (data["late"] <= data["deliveries"])).all()
    assert data["rain_days"].between(0, 7).all()
    assert truth.set_index("depot")["n_weeks"].equals(sizes.rename("n_weeks").rename_axis("depot"))


def test_depot_repairs_structure(demo):
    data, truth = demo("depot_repairs")
    sizes = data.groupby("depot").size()
    assert sizes.size == 30 and sizes.min() <= 3 and sizes.max() >= 100
    assert (data["cost"] > 0).all() and data.notna().all().all()
    assert set(data["job"]) == {"service", "brakes", "engine"}
    assert data["vehicle_age_years"].between(0, 15).all()
    assert truth.set_index("depot")["n_jobs"].equals(sizes.rename("n_jobs").rename_axis("depot"))


def test_repair_costs_spread_with_their_mean(demo):
    # A gamma's SD is proportional to its mean: within job types, the coefficient of variation
    # stays near the stated one while the SD grows with the mean (engine jobs cost most).
    data, _ = demo("depot_repairs")
    by_job = data.groupby("job")["cost"].agg(["mean", "std"])
    assert by_job["mean"].idxmax() == "engine" and by_job["std"].idxmax() == "engine"
    cv = TRUE_PARAMETERS["depot_repairs"]["cv"]
    # Depot and age differences add to the spread within a job type: the CV is a little above the stated one.
    assert ((by_job["std"] / by_job["mean"]).between(cv, 1.6 * cv)).all(), by_job


def test_plot_birds_structure(demo):
    data, truth = demo("plot_birds")
    sizes = data.groupby("plot").size()
    assert sizes.size == 40 and sizes.min() <= 2 and sizes.max() >= 40
    assert data["birds"].dtype.kind == "i" and (data["birds"] >= 0).all()
    assert (data["survey_minutes"] > 0).all() and data["wind_bft"].between(0, 5).all()
    assert truth.set_index("plot")["n_visits"].equals(sizes.rename("n_visits").rename_axis("plot"))


def test_plot_birds_have_excess_zeros(demo):
    # More zero counts than a Poisson GLM with the same terms expects (sum of exp(-mu) over rows,
    # the expected number of zeros; cf. Lambert 1992, Technometrics 34, 1-14), so the zero-inflated
    # family earns its place.
    data, _ = demo("plot_birds")
    fit = smf.glm("birds ~ 0 + C(plot) + wind_bft", data, family=sm.families.Poisson(),
                  offset=np.log(data["survey_minutes"])).fit()
    expected_zeros = float(np.exp(-fit.fittedvalues).sum())
    assert (data["birds"] == 0).sum() > 1.5 * expected_zeros


def test_ward_infections_structure(demo):
    data, truth = demo("ward_infections")
    sizes = data.groupby("ward").size()
    assert sizes.size == 36 and sizes.min() <= 2 and sizes.max() >= 36
    assert (data["admitted"] > 0).all()
    assert ((data["infected"] >= 0) & (data["infected"] <= data["admitted"])).all()
    assert (data.groupby("ward")["ward_type"].nunique() == 1).all()
    assert data["ward_type"].value_counts().idxmax() == "general"       # the reference level
    assert truth.set_index("ward")["n_months"].equals(sizes.rename("n_months").rename_axis("ward"))


def test_ward_infections_are_over_dispersed(demo):
    # Binomial Pearson chi-square per residual degree of freedom clearly above 1 (McCullagh and
    # Nelder 1989, §4.5): month-to-month proportions vary more than a binomial allows.
    data, _ = demo("ward_infections")
    fit = smf.glm("infected + I(admitted - infected) ~ 0 + C(ward)", data, family=sm.families.Binomial()).fit()
    assert fit.pearson_chi2 / fit.df_resid > 1.5


def test_depot_ratings_structure(demo):
    data, truth = demo("depot_ratings")
    sizes = data.groupby("depot").size()
    assert sizes.size == 30 and sizes.min() <= 3 and sizes.max() >= 150
    assert set(data["rating"]) == {1, 2, 3, 4, 5}
    assert (data["minutes_late"] >= 0).all() and data.notna().all().all()
    assert truth.set_index("depot")["n_journeys"].equals(sizes.rename("n_journeys").rename_axis("depot"))


def test_late_journeys_are_rated_lower(demo):
    # The simulated slope is negative: statsmodels' OrderedModel (cumulative logit, a general-purpose
    # library) on the ratings and minutes late recovers it within 0.02 per minute of the truth.
    from statsmodels.miscmodels.ordinal_model import OrderedModel

    data, _ = demo("depot_ratings")
    fit = OrderedModel(data["rating"], data[["minutes_late"]], distr="logit").fit(method="bfgs", disp=0)
    assert abs(fit.params["minutes_late"] - TRUE_PARAMETERS["depot_ratings"]["minutes_late"]) < 0.02


@pytest.mark.parametrize("spec_file", DEMO_SPECS)
def test_default_priors_imply_outcomes_on_the_observed_scale(demo_data, spec_file):
    # The default-prior rule (README, "Default priors") must pass the prior predictive check on
    # every demo spec: no warning, few simulated outcomes far outside the observed range.
    from hierwork.pipeline import check
    from hierwork.results.prior_predictive import prior_predictive

    plan = check(SPEC_DIR / spec_file).plan
    summary = prior_predictive(plan, seed=3, draws=300)
    assert summary["warnings"] == [], summary


@pytest.mark.parametrize("spec_file", DEMO_SPECS)
def test_specs_name_columns_of_their_data(demo, spec_file):
    spec = yaml.safe_load((SPEC_DIR / spec_file).read_text())
    data_path = (SPEC_DIR / spec["data"]).resolve()
    assert data_path.parent == (SPEC_DIR.parent / "demo" / "data").resolve()
    name = data_path.stem
    assert name in DEMO_DATASETS
    # The spec's columns against the columns this generator writes.
    data, _ = demo(name)
    columns = set(data.columns)
    outcome = spec["outcome"]
    named = [outcome["column"]] + [outcome[k] for k in ("trials", "exposure") if k in outcome]
    for term in spec.get("predictors", []):
        named.append(term["column"] if isinstance(term, dict) else term)
    for factor in spec["groups"].values():
        named.append(factor["column"])
        named += factor.get("predictors", [])
        named += [v for v in factor.get("varying", []) if v != "intercept"]
    assert set(named) <= columns, set(named) - columns
    for term in spec.get("predictors", []):
        if isinstance(term, dict) and "reference" in term:
            assert term["reference"] in set(data[term["column"]])


# ---------------------------------------------------------------------------
# Partial pooling beats no pooling for small groups (against the known truth)
# ---------------------------------------------------------------------------

def _rmse(estimate, truth, small):
    return float(np.sqrt(np.mean((np.asarray(estimate) - np.asarray(truth))[small] ** 2)))


def _shrink(estimate, variance):
    """Random-effects meta-analysis shrinkage (Paule-Mandel between-group variance)."""
    result = combine_effects(np.asarray(estimate), np.asarray(variance), method_re="pm")
    weight = result.tau2 / (result.tau2 + np.asarray(variance))
    return result.mean_effect_re + weight * (np.asarray(estimate) - result.mean_effect_re)


def _wheat_errors(demo, seed):
    """Small-farm RMSE of MixedLM (REML) predictions and of per-farm OLS.

    Compared at 120 kg N with conventional tillage: the farms' nitrogen
    responses vary a little, so the intercept-only model's farm intercepts at
    0 kg N absorb (slope - mean slope) x (the farm's typical N); at the typical
    N both estimators target the same quantity.
    """
    data, truth = demo("wheat", seed)
    truth = truth.set_index("farm")
    target = truth["true_intercept"] + 120 * truth["true_nitrogen_slope"]
    rhs = "nitrogen_kg + C(tillage, Treatment('conventional'))"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        mixed = smf.mixedlm(f"yield_t_ha ~ {rhs}", data, groups=data["farm"]).fit(reml=True)
    level = mixed.fe_params["Intercept"] + 120 * mixed.fe_params["nitrogen_kg"]
    partial = [level + mixed.random_effects[f].iloc[0] for f in truth.index]
    separate = smf.ols(f"yield_t_ha ~ 0 + C(farm) + {rhs}", data).fit()
    no_pool = [separate.params[f"C(farm)[{f}]"] + 120 * separate.params["nitrogen_kg"] for f in truth.index]
    small = (truth["n_plots"] <= 4).to_numpy()
    return _rmse(partial, target, small), _rmse(no_pool, target, small)


def _line_errors(demo, seed):
    """Small-line RMSE of shrunken and separate log defect rates (quasi-Poisson GLM)."""
    data, truth = demo("line_defects", seed)
    truth = truth.set_index("line")
    fit = smf.glm("defects ~ 0 + C(line) + C(shift, Treatment('day'))", data,
                  family=sm.families.Poisson(), offset=np.log(data["hours_run"])).fit(scale="X2")
    names = [f"C(line)[{line}]" for line in truth.index]
    own = fit.params[names].to_numpy()
    variance = np.diag(fit.cov_params().loc[names, names])
    small = (truth["n_shifts"] <= truth["n_shifts"].quantile(1 / 3)).to_numpy()
    return (_rmse(_shrink(own, variance), truth["true_log_rate"], small),
            _rmse(own, truth["true_log_rate"], small))


def _depot_errors(demo, seed):
    """Small-depot RMSE of shrunken and separate log odds (empirical logits, Cox 1970)."""
    data, truth = demo("depot_delays", seed)
    truth = truth.set_index("depot")
    pooled = smf.glm("late + I(deliveries - late) ~ rain_days", data,
                     family=sm.families.Binomial()).fit()
    per = data.groupby("depot").agg(late=("late", "sum"), n=("deliveries", "sum"),
                                    rain=("rain_days", "mean")).loc[truth.index]
    on_time = per["n"] - per["late"]
    own = (np.log((per["late"] + 0.5) / (on_time + 0.5))
           - pooled.params["rain_days"] * per["rain"]).to_numpy()
    variance = (1 / (per["late"] + 0.5) + 1 / (on_time + 0.5)).to_numpy()
    small = (truth["n_weeks"] <= truth["n_weeks"].quantile(1 / 3)).to_numpy()
    return (_rmse(_shrink(own, variance), truth["true_log_odds"], small),
            _rmse(own, truth["true_log_odds"], small))


def _repair_errors(demo, seed):
    """Small-depot RMSE of shrunken and separate log mean costs (gamma GLM with log link)."""
    data, truth = demo("depot_repairs", seed)
    truth = truth.set_index("depot")
    fit = smf.glm("cost ~ 0 + C(depot) + C(job, Treatment('service')) + vehicle_age_years", data,
                  family=sm.families.Gamma(sm.families.links.Log())).fit()
    names = [f"C(depot)[{d}]" for d in truth.index]
    own = fit.params[names].to_numpy()
    variance = np.diag(fit.cov_params().loc[names, names])
    small = (truth["n_jobs"] <= truth["n_jobs"].quantile(1 / 3)).to_numpy()
    return (_rmse(_shrink(own, variance), truth["true_log_mean"], small),
            _rmse(own, truth["true_log_mean"], small))


def _ward_errors(demo, seed):
    """Small-ward RMSE of shrunken and separate log odds: empirical logits (Cox 1970) with their
    binomial variances inflated by the Pearson dispersion of a binomial GLM (McCullagh and Nelder 1989,
    §4.5), shrunk towards the ward's type (a pooled fit's type effect)."""
    data, truth = demo("ward_infections", seed)
    truth = truth.set_index("ward")
    separate = smf.glm("infected + I(admitted - infected) ~ 0 + C(ward)", data, family=sm.families.Binomial()).fit()
    dispersion = separate.pearson_chi2 / separate.df_resid
    per = data.groupby("ward").agg(infected=("infected", "sum"), n=("admitted", "sum"),
                                   kind=("ward_type", "first")).loc[truth.index]
    healthy = per["n"] - per["infected"]
    own = np.log((per["infected"] + 0.5) / (healthy + 0.5)).to_numpy()
    variance = dispersion * (1 / (per["infected"] + 0.5) + 1 / (healthy + 0.5)).to_numpy()
    pooled = smf.glm("infected + I(admitted - infected) ~ C(ward_type, Treatment('general'))", data,
                     family=sm.families.Binomial()).fit()
    share = pooled.predict(pd.DataFrame({"ward_type": per["kind"].to_numpy()})).to_numpy()
    by_type = np.log(share / (1 - share))
    small = (truth["n_months"] <= truth["n_months"].quantile(1 / 3)).to_numpy()
    return (_rmse(by_type + _shrink(own - by_type, variance), truth["true_log_odds"], small),
            _rmse(own, truth["true_log_odds"], small))


@pytest.mark.parametrize("errors", [_wheat_errors, _line_errors, _depot_errors, _repair_errors, _ward_errors],
                         ids=["wheat", "line_defects", "depot_delays", "depot_repairs", "ward_infections"])
def test_partial_pooling_beats_no_pooling_for_small_groups(demo, errors):
    # The demo's own seed: a clear win (at least 15 % lower error).
    partial, separate = errors(demo, DEFAULT_SEED)
    assert partial < 0.85 * separate, (partial, separate)
    # And by design, not by luck of one seed: on average over other seeds too.
    ratios = [p / s for p, s in (errors(demo, seed) for seed in OTHER_SEEDS)]
    assert np.mean(ratios) < 0.9, ratios


def test_truth_matches_the_stated_parameters(demo):
    # The realised group effects scatter around the stated population values
    # with the stated SD (a loose check of the generator's bookkeeping: the
    # sample SD of k normal draws lies within a factor 0.5..1.6 of sigma with
    # probability > 0.99 for k >= 25, chi-square with k - 1 df).
    _, farms = demo("wheat")
    wheat = TRUE_PARAMETERS["wheat"]
    slope_sd = farms["true_nitrogen_slope"].std()
    assert 0.5 < slope_sd / wheat["farm.nitrogen_kg.sd"] < 1.6
    _, lines = demo("line_defects")
    assert 0.5 < lines["true_log_rate"].std() / TRUE_PARAMETERS["line_defects"]["line.sd"] < 1.6
    _, depots = demo("depot_delays")
    assert 0.5 < depots["true_log_odds"].std() / TRUE_PARAMETERS["depot_delays"]["depot.sd"] < 1.6
    _, repairs = demo("depot_repairs")
    assert 0.5 < repairs["true_log_mean"].std() / TRUE_PARAMETERS["depot_repairs"]["depot.sd"] < 1.6
    _, wards = demo("ward_infections")
    ward = TRUE_PARAMETERS["ward_infections"]
    by_type = wards["ward_type"].map({"general": 0.0, "surgical": ward["ward_type=surgical"],
                                      "intensive": ward["ward_type=intensive"]})
    assert 0.5 < (wards["true_log_odds"] - by_type).std() / ward["ward.sd"] < 1.6
    _, plots = demo("plot_birds")
    assert 0.5 < plots["true_log_rate"].std() / TRUE_PARAMETERS["plot_birds"]["plot.sd"] < 1.6
