"""A small crossed design end to end: the whole ``hierwork fit`` command against hand-written PyMC models.

Invented assay data (fixed seed; ``bench_parameterisation.simulate("crossed")``):
the diameter of a zone on 24 plates crossed with 6 samples, one reading per
plate-sample pair (144 rows; SDs 0.85 and 1.9, residual 0.55). Every method
fits the same model with hierwork's default priors, 2 chains x (1,000 warm-up +
1,000 draws). hierwork's time is the whole command as a shell runs it (start-up
and imports, checks, compile, sampling, gate, baselines, predictive checks,
LOO, run folder and report); the hand-written models' clock starts after their
imports and covers building, compiling and sampling only. Each method runs in
its own child process (``bench_scale.measure``).

Usage::

    python benchmarks/bench_plates.py
    python benchmarks/bench_plates.py --methods hierwork
"""
from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
import bench_scale  # noqa: E402  (the shared measuring code)
from bench_parameterisation import SEED, simulate, write_spec  # noqa: E402  (the same problem)

FACTORS = ("plate", "sample")


def write_problem(folder: Path) -> Path:
    """The spec of ``bench_parameterisation``'s crossed problem, with the benchmark's sampling settings."""
    import yaml

    path = write_spec(folder, "crossed")
    spec = yaml.safe_load(path.read_text())
    spec["sampling"] = {"chains": bench_scale.CHAINS, "warmup": bench_scale.WARMUP, "draws": bench_scale.DRAWS,
                        "seed": SEED}
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


def run_hierwork(folder: Path) -> dict:
    """The whole ``hierwork fit`` command (:func:`bench_scale.time_fit`)."""
    names = ["b", "residual_sd"] + [f"{f}__{v}" for f in FACTORS for v in ("sd", "effect")]
    return bench_scale.time_fit(write_problem(folder), folder, names)


def handwritten(folder: Path, centred: bool) -> dict:
    """The per-row model a PyMC user would write for crossed factors, PyMC's NUTS, hierwork's default priors."""
    import pandas as pd
    import pymc as pm

    import hierwork
    from hierwork.model.blocks import prior_rv  # the spec's prior table as PyMC variables

    priors = hierwork.check(write_problem(folder)).plan.priors
    frame = simulate("crossed", np.random.default_rng(SEED))
    start = time.perf_counter()
    with pm.Model() as model:
        mu = prior_rv("b0", [priors["intercept"]])
        for name in FACTORS:
            codes, levels = pd.factorize(frame[name])
            tau = prior_rv(f"{name}_sd", [priors[f"{name}.sd"]])
            if centred:
                u = pm.Normal(f"{name}_u", 0.0, tau, shape=len(levels))
            else:
                u = pm.Deterministic(f"{name}_u", tau * pm.Normal(f"{name}_z", 0.0, 1.0, shape=len(levels)))
            mu = mu + u[codes]
        pm.Normal("y", mu, prior_rv("sigma", [priors["residual_sd"]]), observed=frame["diameter_mm"].to_numpy())
    idata = pm.sample(draws=bench_scale.DRAWS, tune=bench_scale.WARMUP, chains=bench_scale.CHAINS,
                      cores=bench_scale.CHAINS, random_seed=SEED, model=model, progressbar=False,
                      compute_convergence_checks=False)
    wall = time.perf_counter() - start
    names = ["b0", "sigma"] + [f"{f}_{v}" for f in FACTORS for v in ("sd", "u")]
    return {**bench_scale.summarise(idata, names), "wall": wall, "gate": None,
            "note": f"{'centred' if centred else 'non-centred'}, per row"}


def main(argv=None) -> None:
    bench_scale.sibling_main(__doc__, "plates", SEED, __file__,
                             {"hierwork": run_hierwork, "pymc-nc": lambda folder: handwritten(folder, False),
                              "pymc-c": lambda folder: handwritten(folder, True)}, argv)


if __name__ == "__main__":
    os.environ.setdefault("PYTENSOR_FLAGS", f"base_compiledir={Path.home() / '.cache' / 'hierwork-bench'}")
    main()
