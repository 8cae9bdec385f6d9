"""Crossed normal at scale: hierwork's semi-collapsed path against the hand-written per-row PyMC model.

Invented parcel-handling data (fixed seed): minutes a parcel took from depot
to door against its weight, by ~3,000 couriers crossed with ~1,100 delivery
addresses and 14 regions, ~73,000 rows, a few parcels per courier-address
pair (the reduced path's cells merge almost nothing). Both methods fit the
same model with hierwork's default priors, 2 chains x (1,000 warm-up + 1,000
draws); timing, ESS and the process-tree memory are measured by
``bench_scale.measure`` (one child process per fit, killed at the cap).

Usage::

    python benchmarks/bench_crossed.py --cap 1800
    python benchmarks/bench_crossed.py --methods hierwork hierwork-semi-nutpie

``hierwork`` fits with path and engine ``auto``; ``hierwork-semi-nutpie``,
``hierwork-semi-pymc`` and ``hierwork-reduced-nutpie`` fix them in the spec.
"""
from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
import bench_scale  # noqa: E402  (the shared measuring code)

SEED = 20261203
N_COURIERS, N_ADDRESSES, N_REGIONS, N_ROWS = 3_000, 1_100, 14, 73_000
TRUE = {"intercept": 38.0, "weight_kg": 0.8, "courier_sd": 5.0, "address_sd": 4.0, "region_sd": 3.0,
        "residual_sd": 9.0}


def make_problem(seed: int = SEED):
    """Invented crossed data: (frame, codes) with codes the integer courier, address, region of each row."""
    import pandas as pd

    rng = np.random.default_rng(seed)
    courier = rng.choice(N_COURIERS, N_ROWS, p=_weights(rng, N_COURIERS))
    address = rng.choice(N_ADDRESSES, N_ROWS, p=_weights(rng, N_ADDRESSES))
    region = rng.integers(0, N_REGIONS, N_ROWS)
    weight = rng.gamma(2.0, 1.5, N_ROWS)
    minutes = (TRUE["intercept"] + TRUE["weight_kg"] * weight
               + rng.normal(0, TRUE["courier_sd"], N_COURIERS)[courier]
               + rng.normal(0, TRUE["address_sd"], N_ADDRESSES)[address]
               + rng.normal(0, TRUE["region_sd"], N_REGIONS)[region]
               + rng.normal(0, TRUE["residual_sd"], N_ROWS))
    frame = pd.DataFrame({"courier": [f"c{k:04d}" for k in courier], "address": [f"a{k:04d}" for k in address],
                          "region": [f"r{k:02d}" for k in region], "weight_kg": weight.round(3),
                          "minutes": minutes.round(2)})
    return frame, {"courier": courier, "address": address, "region": region}


def _weights(rng, n):
    w = rng.lognormal(0.0, 0.5, n)
    return w / w.sum()


def write_problem(folder: Path, **sampling) -> Path:
    """CSV and spec (2 chains x (1,000 + 1,000), and any other ``sampling`` keys); returns the spec path."""
    import yaml

    frame, _ = make_problem()
    frame.to_csv(folder / "parcels.csv", index=False)
    spec = {"format": "hierwork/1", "name": "bench-crossed", "data": "parcels.csv",
            "outcome": {"column": "minutes", "family": "normal"}, "predictors": ["weight_kg"],
            "groups": {"courier": {}, "address": {}, "region": {}},
            "sampling": {"chains": bench_scale.CHAINS, "warmup": bench_scale.WARMUP,
                         "draws": bench_scale.DRAWS, "seed": SEED, **sampling}}
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


def run_hierwork(folder: Path, **sampling) -> dict:
    """The whole ``hierwork fit`` command (:func:`bench_scale.time_fit`), path and engine ``auto`` unless given."""
    names = ["b", "residual_sd"] + [f"{f}__{v}" for f in ("courier", "address", "region") for v in ("sd", "effect")]
    return bench_scale.time_fit(write_problem(folder, **sampling), folder, names)


def run_handwritten(folder: Path) -> dict:
    """The per-row non-centred model a PyMC user would write, PyMC's NUTS, hierwork's default priors."""
    import pymc as pm

    import hierwork
    from hierwork.model.blocks import prior_rv  # the spec's prior table as PyMC variables

    priors = hierwork.check(write_problem(folder)).plan.priors
    frame, codes = make_problem()
    start = time.perf_counter()
    x, y = frame["weight_kg"].to_numpy(), frame["minutes"].to_numpy()
    with pm.Model() as model:
        mu = prior_rv("b0", [priors["intercept"]]) + prior_rv("b1", [priors["weight_kg"]]) * x
        for name, n in (("courier", N_COURIERS), ("address", N_ADDRESSES), ("region", N_REGIONS)):
            tau = prior_rv(f"{name}_sd", [priors[f"{name}.sd"]])
            u = pm.Deterministic(f"{name}_u", tau * pm.Normal(f"{name}_z", 0.0, 1.0, shape=n))
            mu = mu + u[codes[name]]
        pm.Normal("y", mu, prior_rv("sigma", [priors["residual_sd"]]), observed=y)
    idata = pm.sample(draws=bench_scale.DRAWS, tune=bench_scale.WARMUP, chains=bench_scale.CHAINS,
                      cores=bench_scale.CHAINS, random_seed=SEED, model=model, progressbar=False,
                      compute_convergence_checks=False)
    wall = time.perf_counter() - start
    names = ["b0", "b1", "sigma"] + [f"{f}_{v}" for f in ("courier", "address", "region") for v in ("sd", "u")]
    return {**bench_scale.summarise(idata, names), "wall": wall, "gate": None, "note": "non-centred, per row"}


def main(argv=None) -> None:
    bench_scale.sibling_main(__doc__, "crossed", SEED, __file__, {
        "hierwork": run_hierwork, "pymc-nc": run_handwritten,
        "hierwork-semi-nutpie": lambda folder: run_hierwork(folder, path="semi_collapsed", engine="nutpie"),
        "hierwork-semi-pymc": lambda folder: run_hierwork(folder, path="semi_collapsed", engine="pymc"),
        "hierwork-reduced-nutpie": lambda folder: run_hierwork(folder, path="reduced", engine="nutpie")}, argv)


if __name__ == "__main__":
    os.environ.setdefault("PYTENSOR_FLAGS", f"base_compiledir={Path.home() / '.cache' / 'hierwork-bench'}")
    main()
