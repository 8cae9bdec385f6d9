"""Invented demo data: seven scenarios with known true group effects.

The data are simulated from multilevel models whose group effects come from a
normal distribution with a moderate standard deviation, and whose groups are of
very unequal size. That is the setting in which partial pooling clearly beats
estimating each group on its own: small groups are pulled towards the
population, large ones keep their own estimate.

Scenarios (all invented; see ``docs/demo.md``):

``wheat``
    Wheat yield (t/ha) on plots of 30 farms in 5 regions; plot-level nitrogen
    (kg/ha) and tillage; farm-level soil organic carbon (%). Farms range from
    2 to 72 plots. The nitrogen response varies a little by farm.
``line_defects``
    Defect counts per shift on 25 production lines, with the hours run as the
    exposure; counts are mildly over-dispersed (gamma-Poisson), so both a
    Poisson and a negative binomial model make sense.
``depot_delays``
    Late deliveries out of all deliveries per week at 40 delivery depots,
    with the number of rainy days in the week as a predictor.
``depot_repairs``
    Cost of each vehicle repair job at 30 maintenance depots (3 to 120 jobs),
    by job type and vehicle age: positive and right-skewed, with an SD
    proportional to the mean (gamma).
``ward_infections``
    Patients who acquired an infection out of those admitted, per ward and
    month, at 36 hospital wards (2 to 36 months): the monthly proportions vary
    more than a binomial allows (beta-binomial).
``plot_birds``
    Birds of one species counted on each survey visit to 40 farmland plots
    (2 to 40 visits), with the minutes surveyed as the exposure and the wind as
    a predictor; on a share of visits the species is absent from the plot
    altogether, so there are more zeros than a Poisson count allows.
``depot_ratings``
    Passengers' ratings (1 to 5) of bus journeys run from 30 bus depots (3 to
    150 rated journeys), with the minutes the bus was late as a predictor: an
    ordered outcome (cumulative logit).

Besides each data file, ``truth/<scenario>_groups.csv`` records the true
group-level values used to simulate it, so that fits can be compared with the
truth.

``wheat_population.csv`` is the population the wheat plots sample: the
hectares of wheat on each of the 30 farms by tillage and nitrogen rate, whose
make-up differs from the plots' (large farms have many more hectares than
sampled plots, and till less). ``truth/wheat_population.csv`` has the true
hectare-weighted mean yield per region and for all farms, for checking
``hierwork poststratify``.
"""
from __future__ import annotations

import os
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["DEFAULT_SEED", "DEMO_DATASETS", "TRUE_PARAMETERS", "make_demo_data"]

DEFAULT_SEED = 20261202

DEMO_DATASETS = ("wheat", "line_defects", "depot_delays", "depot_repairs", "plot_birds", "ward_infections",
                 "depot_ratings")

#: The population-level values the data are simulated from (data units).
TRUE_PARAMETERS = {
    "wheat": {
        "intercept": 4.2,            # t/ha at 0 kg N, conventional tillage, 0 % soil carbon
        "nitrogen_kg": 0.012,        # t/ha per kg N
        "tillage=reduced": -0.25,
        "tillage=none": -0.55,
        "soil_carbon": 0.35,         # t/ha per % soil organic carbon (farm level)
        "region.sd": 0.25,
        "farm.sd": 0.35,             # farm intercepts around their region
        "farm.nitrogen_kg.sd": 0.0025,
        "residual_sd": 1.00,
    },
    "line_defects": {
        "intercept": np.log(0.2),    # log defects per hour on a day shift
        "shift=evening": 0.15,
        "shift=night": 0.35,
        "line.sd": 0.40,
        "dispersion_shape": 8.0,     # gamma-Poisson shape (negative binomial alpha)
    },
    "depot_delays": {
        "intercept": -2.5,           # log odds of a late delivery in a dry week
        "rain_days": 0.12,           # per rainy day in the week
        "depot.sd": 0.5,
    },
    "depot_repairs": {
        "intercept": np.log(180.0),  # log mean cost of a service job on a new vehicle
        "job=brakes": 0.45,
        "job=engine": 1.25,
        "vehicle_age_years": 0.05,   # per year of vehicle age
        "depot.sd": 0.3,
        "cv": 0.45,                  # SD of a job's cost relative to its mean
    },
    "plot_birds": {
        "intercept": np.log(0.25),   # log birds per survey minute in calm weather, when present
        "wind_bft": -0.18,           # per Beaufort step
        "plot.sd": 0.5,
        "zero_inflation": 0.3,       # share of visits on which the species is absent from the plot
    },
    "ward_infections": {
        "intercept": -3.2,           # log odds of an infection per admitted patient in a general ward
        "ward_type=surgical": 0.4,
        "ward_type=intensive": 1.1,
        "ward.sd": 0.35,
        "concentration": 60.0,       # beta-binomial: month-to-month spread of a ward's proportion
    },
    "depot_ratings": {
        "intercept": 2.2,            # log odds of a rating above 1 for a journey on time
        "minutes_late": -0.08,       # per minute late
        "depot.sd": 0.4,
        "cutpoints": (1.3, 2.6, 3.9),  # boundaries 2|3, 3|4, 4|5 (the boundary 1|2 is 0)
    },
}

_REGIONS = ("north", "east", "south", "west", "central")
# Farm sizes (plots): very unequal on purpose, from 2 to 72 plots.
_FARM_PLOTS = (2, 2, 2, 2, 2, 3, 3, 3, 3, 4, 4, 5, 6, 8, 10,
               12, 15, 18, 22, 26, 30, 35, 40, 45, 50, 55, 60, 64, 68, 72)
_NITROGEN_LEVELS = (0, 40, 80, 120, 160, 200, 240)
_TILLAGE = ("conventional", "reduced", "none")
# Shifts recorded per production line: from a handful to several months.
_LINE_SHIFTS = (2, 2, 3, 3, 4, 5, 6, 8, 10, 12, 15, 18, 22,
                26, 30, 36, 42, 50, 60, 70, 80, 95, 110, 125, 140)
_SHIFTS = ("day", "evening", "night")
# Weeks recorded per depot: new depots have a few weeks, old ones a year.
# Repair jobs per maintenance depot, and the job types (service is the reference).
_DEPOT_JOBS = (3, 3, 4, 4, 5, 5, 6, 7, 8, 10, 12, 14, 16, 18, 20, 24, 28, 32, 36, 40,
               45, 50, 55, 60, 70, 80, 90, 100, 110, 120)
_JOBS = ("service", "brakes", "engine")
# Survey visits per farmland plot: from a couple to a weekly series.
_PLOT_VISITS = (2, 2, 2, 3, 3, 3, 4, 4, 5, 5, 6, 6, 7, 8, 8, 9, 10, 10, 11, 12,
                13, 14, 15, 16, 17, 18, 19, 20, 21, 22, 24, 25, 26, 28, 30, 32, 34, 36, 38, 40)
# Months on record per hospital ward, and the ward types (general is the reference).
_WARD_MONTHS = (2, 2, 3, 3, 4, 4, 5, 6, 6, 7, 8, 9, 10, 11, 12, 12, 13, 14, 15, 16,
                18, 20, 21, 22, 24, 24, 26, 28, 30, 30, 32, 33, 34, 35, 36, 36)
_WARD_TYPES = ("general", "surgical", "intensive")
# Rated journeys per bus depot.
_DEPOT_RATINGS = (3, 3, 4, 4, 5, 6, 7, 8, 10, 12, 14, 16, 18, 20, 24, 28, 32, 36, 40, 45,
                  50, 60, 70, 80, 90, 100, 110, 125, 140, 150)
_DEPOT_WEEKS = (2, 2, 3, 3, 3, 4, 4, 5, 5, 6, 6, 7, 8, 8, 9, 10, 10, 12, 12, 14,
                15, 16, 18, 20, 22, 24, 26, 26, 30, 32, 35, 38, 40, 42, 45, 48, 50, 52, 52, 52)


def _wheat(rng: np.random.Generator) -> tuple[pd.DataFrame, pd.DataFrame]:
    p = TRUE_PARAMETERS["wheat"]
    n_farms = len(_FARM_PLOTS)
    plots = rng.permutation(_FARM_PLOTS)
    farms = [f"farm_{i + 1:02d}" for i in range(n_farms)]
    region_of_farm = np.array(_REGIONS)[np.arange(n_farms) % len(_REGIONS)]
    rng.shuffle(region_of_farm)
    region_effect = dict(zip(_REGIONS, rng.normal(0.0, p["region.sd"], len(_REGIONS))))
    soil_carbon = np.round(rng.uniform(1.0, 3.5, n_farms), 2)
    farm_intercept = (p["intercept"] + p["soil_carbon"] * soil_carbon
                      + np.array([region_effect[r] for r in region_of_farm])
                      + rng.normal(0.0, p["farm.sd"], n_farms))
    farm_slope = p["nitrogen_kg"] + rng.normal(0.0, p["farm.nitrogen_kg.sd"], n_farms)
    truth = pd.DataFrame({
        "farm": farms, "region": region_of_farm, "n_plots": plots,
        "soil_carbon": soil_carbon,
        "true_intercept": farm_intercept.round(4),
        "true_nitrogen_slope": farm_slope.round(6),
    })

    farm_idx = np.repeat(np.arange(n_farms), plots)
    n = farm_idx.size
    nitrogen = rng.choice(_NITROGEN_LEVELS, n)
    tillage = rng.choice(_TILLAGE, n, p=[0.5, 0.3, 0.2])
    tillage_effect = np.select([tillage == "reduced", tillage == "none"],
                               [p["tillage=reduced"], p["tillage=none"]], 0.0)
    mean = farm_intercept[farm_idx] + farm_slope[farm_idx] * nitrogen + tillage_effect
    yield_t_ha = rng.normal(mean, p["residual_sd"])
    data = pd.DataFrame({
        "region": region_of_farm[farm_idx],
        "farm": np.array(farms)[farm_idx],
        "plot": np.concatenate([np.arange(1, k + 1) for k in plots]),
        "soil_carbon": soil_carbon[farm_idx],
        "tillage": tillage,
        "nitrogen_kg": nitrogen,
        "yield_t_ha": np.round(np.clip(yield_t_ha, 0.1, None), 2),
    })
    return data, truth


def _line_defects(rng: np.random.Generator) -> tuple[pd.DataFrame, pd.DataFrame]:
    p = TRUE_PARAMETERS["line_defects"]
    n_lines = len(_LINE_SHIFTS)
    shifts = rng.permutation(_LINE_SHIFTS)
    lines = [f"L{i + 1:02d}" for i in range(n_lines)]
    line_log_rate = p["intercept"] + rng.normal(0.0, p["line.sd"], n_lines)
    truth = pd.DataFrame({
        "line": lines, "n_shifts": shifts,
        "true_log_rate": line_log_rate.round(5),
    })

    line_idx = np.repeat(np.arange(n_lines), shifts)
    n = line_idx.size
    shift = rng.choice(_SHIFTS, n, p=[0.45, 0.35, 0.20])
    hours_run = np.round(rng.uniform(4.0, 12.0, n), 1)
    shift_effect = np.select([shift == "evening", shift == "night"],
                             [p["shift=evening"], p["shift=night"]], 0.0)
    rate = np.exp(line_log_rate[line_idx] + shift_effect) * hours_run
    # Gamma-Poisson mixture: mean `rate`, variance rate + rate^2 / shape.
    shape = p["dispersion_shape"]
    defects = rng.poisson(rng.gamma(shape, rate / shape))
    data = pd.DataFrame({
        "line": np.array(lines)[line_idx],
        "shift_no": np.concatenate([np.arange(1, k + 1) for k in shifts]),
        "shift": shift,
        "hours_run": hours_run,
        "defects": defects,
    })
    return data, truth


def _depot_delays(rng: np.random.Generator) -> tuple[pd.DataFrame, pd.DataFrame]:
    p = TRUE_PARAMETERS["depot_delays"]
    n_depots = len(_DEPOT_WEEKS)
    weeks = rng.permutation(_DEPOT_WEEKS)
    depots = [f"depot_{i + 1:02d}" for i in range(n_depots)]
    depot_log_odds = p["intercept"] + rng.normal(0.0, p["depot.sd"], n_depots)
    typical_volume = np.round(np.exp(rng.uniform(np.log(10), np.log(60), n_depots)))
    truth = pd.DataFrame({
        "depot": depots, "n_weeks": weeks, "typical_deliveries": typical_volume.astype(int),
        "true_log_odds": depot_log_odds.round(5),
    })

    depot_idx = np.repeat(np.arange(n_depots), weeks)
    n = depot_idx.size
    deliveries = np.maximum(rng.poisson(typical_volume[depot_idx]), 3)
    rain_days = rng.binomial(7, 0.3, n)
    logit = depot_log_odds[depot_idx] + p["rain_days"] * rain_days
    late = rng.binomial(deliveries, 1.0 / (1.0 + np.exp(-logit)))
    data = pd.DataFrame({
        "depot": np.array(depots)[depot_idx],
        "week": np.concatenate([np.arange(1, k + 1) for k in weeks]),
        "rain_days": rain_days,
        "deliveries": deliveries,
        "late": late,
    })
    return data, truth


def _wheat_population(rng: np.random.Generator, truth: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Hectares per farm, tillage and nitrogen rate, and the true hectare-weighted mean yield."""
    p = TRUE_PARAMETERS["wheat"]
    cells = truth.merge(pd.DataFrame({"tillage": _TILLAGE}), how="cross").merge(
        pd.DataFrame({"nitrogen_kg": _NITROGEN_LEVELS}), how="cross")
    farm_area = dict(zip(truth["farm"], 25.0 * truth["n_plots"] * rng.uniform(0.5, 2.0, len(truth))))
    # Large farms till less (the plots were sampled with tillage shares 0.5, 0.3, 0.2 everywhere).
    large = cells["n_plots"].to_numpy() >= 20
    share = np.select([cells["tillage"] == "conventional", cells["tillage"] == "reduced"],
                      [np.where(large, 0.2, 0.6), np.where(large, 0.3, 0.3)], np.where(large, 0.5, 0.1))
    nitrogen_share = rng.dirichlet(np.ones(len(_NITROGEN_LEVELS)), len(truth))  # per farm, over the rates
    farm_pos = cells["farm"].map({f: i for i, f in enumerate(truth["farm"])}).to_numpy()
    rate_pos = cells["nitrogen_kg"].map({n: j for j, n in enumerate(_NITROGEN_LEVELS)}).to_numpy()
    hectares = cells["farm"].map(farm_area).to_numpy() * share * nitrogen_share[farm_pos, rate_pos]
    tillage_effect = cells["tillage"].map({"conventional": 0.0, "reduced": p["tillage=reduced"],
                                           "none": p["tillage=none"]}).to_numpy()
    expected = cells["true_intercept"] + cells["true_nitrogen_slope"] * cells["nitrogen_kg"] + tillage_effect
    population = pd.DataFrame({"region": cells["region"], "farm": cells["farm"], "tillage": cells["tillage"],
                               "nitrogen_kg": cells["nitrogen_kg"], "hectares": np.round(hectares, 1)})
    weighted = expected * population["hectares"]
    by_region = weighted.groupby(population["region"]).sum() / population.groupby("region")["hectares"].sum()
    true_means = pd.DataFrame({"by": ["region"] * len(by_region) + ["all"],
                               "area": list(by_region.index) + ["all"],
                               "true_mean_yield": list(by_region.round(4)) + [round(weighted.sum()
                                                                                   / population["hectares"].sum(), 4)]})
    return population, true_means


def _unequal_groups(rng: np.random.Generator, sizes, prefix: str, sd: float):
    """Groups of the given sizes in random order: labels, sizes, normal offsets with SD ``sd``,
    each row's group index and its number within the group (1, 2, ...)."""
    sizes = rng.permutation(sizes)
    labels = np.array([f"{prefix}{i + 1:02d}" for i in range(len(sizes))])
    offsets = rng.normal(0.0, sd, len(sizes))
    return labels, sizes, offsets, np.repeat(np.arange(len(sizes)), sizes), np.concatenate(
        [np.arange(1, k + 1) for k in sizes])


def _depot_repairs(rng: np.random.Generator) -> tuple[pd.DataFrame, pd.DataFrame]:
    p = TRUE_PARAMETERS["depot_repairs"]
    depots, jobs, offsets, idx, job_no = _unequal_groups(rng, _DEPOT_JOBS, "D", p["depot.sd"])
    depot_log_mean = p["intercept"] + offsets
    truth = pd.DataFrame({"depot": depots, "n_jobs": jobs, "true_log_mean": depot_log_mean.round(5)})
    n = idx.size
    job = rng.choice(_JOBS, n, p=[0.5, 0.3, 0.2])
    age = rng.integers(0, 16, n)
    log_mean = (depot_log_mean[idx] + p["vehicle_age_years"] * age
                + np.select([job == "brakes", job == "engine"], [p["job=brakes"], p["job=engine"]], 0.0))
    shape = 1.0 / p["cv"] ** 2
    cost = rng.gamma(shape, np.exp(log_mean) / shape)
    data = pd.DataFrame({"depot": depots[idx], "job_no": job_no, "job": job, "vehicle_age_years": age,
                         "cost": np.round(np.maximum(cost, 0.01), 2)})
    return data, truth


def _plot_birds(rng: np.random.Generator) -> tuple[pd.DataFrame, pd.DataFrame]:
    p = TRUE_PARAMETERS["plot_birds"]
    plots, visits, offsets, idx, visit = _unequal_groups(rng, _PLOT_VISITS, "P", p["plot.sd"])
    plot_log_rate = p["intercept"] + offsets
    truth = pd.DataFrame({"plot": plots, "n_visits": visits, "true_log_rate": plot_log_rate.round(5)})
    n = idx.size
    wind = rng.integers(0, 6, n)
    minutes = rng.choice((10, 15, 20, 30), n)
    rate = np.exp(plot_log_rate[idx] + p["wind_bft"] * wind) * minutes
    present = rng.random(n) >= p["zero_inflation"]
    data = pd.DataFrame({"plot": plots[idx], "visit": visit, "wind_bft": wind, "survey_minutes": minutes,
                         "birds": np.where(present, rng.poisson(rate), 0)})
    return data, truth


def _ward_infections(rng: np.random.Generator) -> tuple[pd.DataFrame, pd.DataFrame]:
    p = TRUE_PARAMETERS["ward_infections"]
    wards, months, offsets, idx, month = _unequal_groups(rng, _WARD_MONTHS, "W", p["ward.sd"])
    ward_type = rng.choice(_WARD_TYPES, len(wards), p=[0.5, 0.35, 0.15])
    ward_log_odds = p["intercept"] + offsets + np.select(
        [ward_type == "surgical", ward_type == "intensive"], [p["ward_type=surgical"], p["ward_type=intensive"]], 0.0)
    typical_admissions = np.round(np.where(ward_type == "intensive", 1, 3) * rng.uniform(10, 30, len(wards)))
    truth = pd.DataFrame({"ward": wards, "ward_type": ward_type, "n_months": months,
                          "true_log_odds": ward_log_odds.round(5)})
    admitted = np.maximum(rng.poisson(typical_admissions[idx]), 5)
    mean = 1.0 / (1.0 + np.exp(-ward_log_odds[idx]))
    phi = p["concentration"]
    infected = rng.binomial(admitted, rng.beta(mean * phi, (1 - mean) * phi))  # beta-binomial
    data = pd.DataFrame({"ward": wards[idx], "ward_type": ward_type[idx], "month": month,
                         "admitted": admitted, "infected": infected})
    return data, truth


def _depot_ratings(rng: np.random.Generator) -> tuple[pd.DataFrame, pd.DataFrame]:
    p = TRUE_PARAMETERS["depot_ratings"]
    depots, journeys, offsets, idx, journey = _unequal_groups(rng, _DEPOT_RATINGS, "B", p["depot.sd"])
    depot_log_odds = p["intercept"] + offsets
    truth = pd.DataFrame({"depot": depots, "n_journeys": journeys, "true_log_odds": depot_log_odds.round(5)})
    late = np.minimum(np.round(rng.exponential(5.0, idx.size)), 40)
    eta = depot_log_odds[idx] + p["minutes_late"] * late
    above = 1.0 / (1.0 + np.exp(-(eta[:, None] - np.r_[0.0, p["cutpoints"]])))  # P(rating > k), k = 1..4
    rating = 1 + (rng.random(idx.size)[:, None] < above).sum(axis=1)
    data = pd.DataFrame({"depot": depots[idx], "journey": journey, "minutes_late": late.astype(int),
                         "rating": rating})
    return data, truth


_SCENARIOS = {"wheat": _wheat, "line_defects": _line_defects, "depot_delays": _depot_delays,
              "depot_repairs": _depot_repairs, "plot_birds": _plot_birds, "ward_infections": _ward_infections,
              "depot_ratings": _depot_ratings}
#: The wheat population's stream follows the first six scenarios'; later scenarios take the streams after it,
#: so that adding a scenario leaves every existing file byte-identical.
_POPULATION_STREAM = 6


def _write_csv_atomically(frame: pd.DataFrame, path: Path) -> None:
    """Write ``frame`` to a temporary sibling and rename it into place."""
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", newline="") as handle:
            frame.to_csv(handle, index=False, lineterminator="\n")
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def make_demo_data(out_dir, seed: int = DEFAULT_SEED) -> dict[str, Path]:
    """Simulate the demo data sets and write them as CSV files.

    Parameters
    ----------
    out_dir : str or os.PathLike
        Folder to write into (created if missing). Each scenario ``name`` is
        written to ``name.csv`` and its true group values to
        ``truth/name_groups.csv``; existing files are replaced.
    seed : int, optional
        Seed of the random number generator. Each scenario draws from its own
        stream spawned from this seed, so the same seed gives byte-identical
        files.

    Returns
    -------
    dict of str to pathlib.Path
        The path of each data file, keyed by scenario name (see
        ``DEMO_DATASETS``).
    """
    out = Path(out_dir)
    (out / "truth").mkdir(parents=True, exist_ok=True)
    # One more stream than scenarios, for the wheat population (spawning more keeps the first ones).
    streams = np.random.SeedSequence(seed).spawn(len(DEMO_DATASETS) + 1)
    population_stream = streams.pop(_POPULATION_STREAM)
    written = {}
    for name, stream in zip(DEMO_DATASETS, streams):
        data, truth = _SCENARIOS[name](np.random.default_rng(stream))
        _write_csv_atomically(truth, out / "truth" / f"{name}_groups.csv")
        _write_csv_atomically(data, out / f"{name}.csv")
        written[name] = out / f"{name}.csv"
        if name == "wheat":
            population, true_means = _wheat_population(np.random.default_rng(population_stream), truth)
            _write_csv_atomically(true_means, out / "truth" / "wheat_population.csv")
            _write_csv_atomically(population, out / "wheat_population.csv")
    return written
