"""Bernoulli at scale: hierwork's exact cell aggregation against the hand-written per-row PyMC model.

Invented data (fixed seed): whether a parcel arrived late (0/1), 1,000 depots
varying in their level, two categorical predictors (vehicle: van, bike,
truck; time slot: morning, midday, afternoon, evening), 1,000,000 rows. The
rows collapse exactly into at most 12,000 binomial cells. Both methods fit
the same model with hierwork's default priors, 2 chains x (1,000 warm-up +
1,000 draws), measured by ``bench_scale.measure`` (one child process per fit,
killed at the cap).

Usage::

    python benchmarks/bench_bernoulli.py --cap 1800
"""
from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
import bench_scale  # noqa: E402  (the shared measuring code)

SEED = 20261204
N_DEPOTS, N_ROWS = 1_000, 1_000_000
VEHICLES = {"van": 0.0, "bike": -0.4, "truck": 0.3}
SLOTS = {"morning": 0.0, "midday": 0.2, "afternoon": 0.5, "evening": 0.9}
TRUE = {"intercept": -1.5, "depot_sd": 0.5}


def make_problem(seed: int = SEED):
    """Invented late-delivery rows: (frame, depot codes)."""
    import pandas as pd

    rng = np.random.default_rng(seed)
    w = rng.lognormal(0.0, 0.7, N_DEPOTS)
    depot = rng.choice(N_DEPOTS, N_ROWS, p=w / w.sum())
    vehicle = rng.integers(0, len(VEHICLES), N_ROWS)
    slot = rng.integers(0, len(SLOTS), N_ROWS)
    eta = (TRUE["intercept"] + rng.normal(0, TRUE["depot_sd"], N_DEPOTS)[depot]
           + np.array(list(VEHICLES.values()))[vehicle] + np.array(list(SLOTS.values()))[slot])
    late = (rng.random(N_ROWS) < 1 / (1 + np.exp(-eta))).astype(int)
    frame = pd.DataFrame({"depot": [f"d{k:04d}" for k in depot], "vehicle": np.array(list(VEHICLES))[vehicle],
                          "slot": np.array(list(SLOTS))[slot], "late": late})
    return frame, depot


def write_problem(folder: Path) -> Path:
    import yaml

    frame, _ = make_problem()
    frame.to_csv(folder / "parcels.csv", index=False)
    spec = {"format": "hierwork/1", "name": "bench-bernoulli", "data": "parcels.csv",
            "outcome": {"column": "late", "family": "bernoulli"}, "predictors": ["vehicle", "slot"],
            "groups": {"depot": {}},
            "sampling": {"chains": bench_scale.CHAINS, "warmup": bench_scale.WARMUP,
                         "draws": bench_scale.DRAWS, "seed": SEED}}
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


def run_hierwork(folder: Path) -> dict:
    """The whole ``hierwork fit`` command (:func:`bench_scale.time_fit`)."""
    return bench_scale.time_fit(write_problem(folder), folder, ["b", "depot__sd", "depot__effect"])


def run_handwritten(folder: Path) -> dict:
    """The non-centred per-row model a PyMC user would write, PyMC's NUTS, hierwork's default priors."""
    import pymc as pm

    import hierwork
    from hierwork.model.blocks import prior_rv  # the spec's prior table as PyMC variables

    plan = hierwork.check(write_problem(folder)).plan
    frame, depot = make_problem()
    start = time.perf_counter()
    X, y = plan.X, frame["late"].to_numpy()  # the same dummy coding as hierwork's (reference levels first)
    with pm.Model() as model:
        b0 = prior_rv("b0", [plan.priors["intercept"]])
        slopes = pm.math.stack([prior_rv(f"b{k}", [plan.priors[t]]) for k, t in enumerate(plan.terms[1:], 1)])
        tau = prior_rv("tau", [plan.priors["depot.sd"]])
        u = pm.Deterministic("u", tau * pm.Normal("z", 0.0, 1.0, shape=N_DEPOTS))
        pm.Bernoulli("y", logit_p=b0 + pm.math.dot(X[:, 1:], slopes) + u[depot], observed=y)
    idata = pm.sample(draws=bench_scale.DRAWS, tune=bench_scale.WARMUP, chains=bench_scale.CHAINS,
                      cores=bench_scale.CHAINS, random_seed=SEED, model=model, progressbar=False,
                      compute_convergence_checks=False)
    wall = time.perf_counter() - start
    return {**bench_scale.summarise(idata, ["b0", *[f"b{k}" for k in range(1, plan.X.shape[1])], "tau", "u"]), "wall": wall, "gate": None,
            "note": "non-centred, per row"}


def main(argv=None) -> None:
    bench_scale.sibling_main(__doc__, "bernoulli", SEED, __file__,
                             {"hierwork": run_hierwork, "pymc-nc": run_handwritten}, argv)


if __name__ == "__main__":
    os.environ.setdefault("PYTENSOR_FLAGS", f"base_compiledir={Path.home() / '.cache' / 'hierwork-bench'}")
    main()
