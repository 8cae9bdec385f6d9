"""PyMC's NUTS against nutpie, by model path and size: where the engine choice should cross over.

Invented data (fixed seed) in a few shapes, each taking one of hierwork's
paths: parcel minutes by depot (normal, one factor: ``collapsed``), by courier
x address x region (normal, crossed: ``reduced``, or ``semi_collapsed`` when
asked), late deliveries and parcel counts with two categorical predictors
(bernoulli and poisson rows that merge into cells: ``reduced``), and parcel
counts against a numeric predictor (poisson, no two rows alike: ``plain``).

For every problem, in child processes:

* **parts**: building the PyMC model; compiling its log density and
  gradient with PyTensor's C backend (what PyMC's NUTS runs) and timing one
  evaluation (median of repeats); compiling it for nutpie (PyTensor's numba
  backend, then numba's JIT) and timing one evaluation of that; with
  ``--again``, the same nutpie compile a second time in the same process;
* **fit**: the whole ``hierwork fit`` command on each engine
  (``--engine pymc`` / ``--engine nutpie``), after the parts have filled the
  compile caches: wall time, the sampling time (compile included, from
  provenance), the leapfrog steps taken (every gradient NUTS evaluated), and
  the gate;
* **parts** again, in a fresh process after the fits: the compile times a
  user's second run sees (whatever the first runs cached on disk).

From these: each engine's cost per leapfrog step while sampling (sampling
time less compile, over the steps of the slowest chain) next to its bare
gradient, and so its per-step overhead.

Usage::

    nice -n 10 python benchmarks/bench_engine.py                 # every problem
    nice -n 10 python benchmarks/bench_engine.py --problems crossed-S semi-S --json out.json
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
import bench_scale  # noqa: E402  (machine line)

SEED = 20261205
#: name -> family, factors {name: groups}, rows, predictors kind, path asked for (None: auto).
PROBLEMS = {
    "collapsed-S": ("normal", {"depot": 85}, 1_000, "numeric", None),
    "collapsed-M": ("normal", {"depot": 2_000}, 50_000, "numeric", None),
    "crossed-S": ("normal", {"courier": 60, "address": 25, "region": 5}, 800, "numeric", None),
    "crossed-M": ("normal", {"courier": 600, "address": 220, "region": 14}, 12_000, "numeric", None),
    "semi-S": ("normal", {"courier": 60, "address": 25, "region": 5}, 800, "numeric", "semi_collapsed"),
    "semi-M": ("normal", {"courier": 600, "address": 220, "region": 14}, 12_000, "numeric", "semi_collapsed"),
    "poisson-cells": ("poisson", {"depot": 300}, 30_000, "categorical", None),
    "bernoulli-cells": ("bernoulli", {"depot": 1_000}, 100_000, "categorical", None),
    "plain-S": ("poisson", {"depot": 40}, 1_000, "numeric", None),
    "plain-M": ("poisson", {"depot": 200}, 20_000, "numeric", None),
    "plain-L": ("poisson", {"depot": 500}, 100_000, "numeric", None),
}
VEHICLES = (0.0, -0.4, 0.3)
SLOTS = (0.0, 0.2, 0.5, 0.9)


def make_frame(family: str, factors: dict, n_rows: int, predictors: str, seed: int = SEED):
    """Invented parcel rows: group memberships with log-normal sizes, a numeric weight or two categorical
    predictors, the outcome drawn from the family around the linear predictor."""
    import pandas as pd

    rng = np.random.default_rng([seed, n_rows, *factors.values()])
    frame, eta = {}, np.zeros(n_rows)
    for name, n in factors.items():
        w = rng.lognormal(0.0, 0.5, n)
        code = rng.choice(n, n_rows, p=w / w.sum())
        frame[name] = [f"{name[0]}{k:04d}" for k in code]
        eta += rng.normal(0.0, 0.4, n)[code]
    if predictors == "numeric":
        frame["weight_kg"] = rng.gamma(2.0, 1.5, n_rows).round(3)
        eta += 0.1 * frame["weight_kg"]
    else:
        vehicle, slot = rng.integers(0, len(VEHICLES), n_rows), rng.integers(0, len(SLOTS), n_rows)
        frame["vehicle"] = np.array(["van", "bike", "truck"])[vehicle]
        frame["slot"] = np.array(["morning", "midday", "afternoon", "evening"])[slot]
        eta += np.array(VEHICLES)[vehicle] + np.array(SLOTS)[slot]
    if family == "normal":
        frame["y"] = (30.0 + 10.0 * eta + rng.normal(0.0, 9.0, n_rows)).round(2)
    elif family == "poisson":
        frame["y"] = rng.poisson(np.exp(1.0 + eta))
    else:
        frame["y"] = (rng.random(n_rows) < 1.0 / (1.0 + np.exp(1.5 - eta))).astype(int)
    return pd.DataFrame(frame)


def write_problem(name: str, folder: Path) -> Path:
    """CSV and spec of a problem (2 chains x (1,000 + 1,000)); returns the spec path."""
    import yaml

    family, factors, n_rows, predictors, path = PROBLEMS[name]
    frame = make_frame(family, factors, n_rows, predictors)
    frame.to_csv(folder / "rows.csv", index=False)
    spec = {"format": "hierwork/1", "name": f"bench-engine-{name}", "data": "rows.csv",
            "outcome": {"column": "y", "family": family},
            "predictors": ["weight_kg"] if predictors == "numeric" else ["vehicle", "slot"],
            "groups": {f: {} for f in factors},
            "sampling": {"chains": bench_scale.CHAINS, "warmup": bench_scale.WARMUP, "draws": bench_scale.DRAWS,
                         "seed": SEED, **({"path": path} if path else {})}}
    (folder / "spec.yaml").write_text(yaml.safe_dump(spec, sort_keys=False))
    return folder / "spec.yaml"


def _per_call(fn, x, budget: float = 1.0) -> float:
    """Median seconds of one call of ``fn(x)`` over repeats within about ``budget`` seconds."""
    fn(x)
    times = []
    start = time.perf_counter()
    while len(times) < 5 or (time.perf_counter() - start < budget and len(times) < 2000):
        t = time.perf_counter()
        fn(x)
        times.append(time.perf_counter() - t)
    return float(np.median(times))


def parts(spec: Path, again: bool = False) -> dict:
    """Build, compile and time one gradient of a problem's model on each engine (in this process)."""
    t0 = time.perf_counter()
    import nutpie

    import hierwork
    from hierwork.pipeline import path_model

    imports = time.perf_counter() - t0
    report = hierwork.check(spec)
    t = time.perf_counter()
    model, _ = path_model(report.plan, report.path)
    build = time.perf_counter() - t
    t = time.perf_counter()
    fn = model.logp_dlogp_function(ravel_inputs=True)
    fn.set_extra_values({})
    compile_c = time.perf_counter() - t
    x0 = np.concatenate([np.ravel(v) for v in model.initial_point().values()])
    grad_c = _per_call(fn, x0)
    t = time.perf_counter()
    compiled = nutpie.compile_pymc_model(model)
    compile_nutpie = time.perf_counter() - t
    grad_nutpie = _per_call(compiled.logp_func, x0)
    compile_nutpie_again = None
    if again:
        t = time.perf_counter()
        nutpie.compile_pymc_model(path_model(report.plan, report.path)[0])
        compile_nutpie_again = time.perf_counter() - t
    return {"path": report.path, "dim": int(x0.size), "rows": int(report.plan.n), "imports": imports,
            "build": build, "compile_c": compile_c, "grad_c": grad_c, "compile_nutpie": compile_nutpie,
            "compile_nutpie_again": compile_nutpie_again, "grad_nutpie": grad_nutpie}


def fit(spec: Path, engine: str, folder: Path) -> dict:
    """The whole ``hierwork fit`` on one engine: wall, sampling seconds, leapfrog steps, gate."""
    import arviz as az

    out = folder / f"run-{engine}"
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "hierwork", "fit", str(spec), "--out", str(out), "--quiet",
                           "--engine", engine, "--force"], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                          text=True)
    wall = time.perf_counter() - start
    if done.returncode not in (0, 3):
        return {"engine": engine, "failed": done.stderr.strip().splitlines()[-1:]}
    prov = json.loads((out / "provenance.json").read_text())
    diag = json.loads((out / "diagnostics.json").read_text())
    stats = az.from_netcdf(str(out / "posterior.nc")).sample_stats
    steps = stats["n_steps"].values.sum(axis=1)  # per chain, draws only (warm-up is not kept)
    checks = {c["name"]: c["value"] for c in diag["checks"]}
    return {"engine": engine, "wall": wall, "sampling": prov["sampling_seconds"], "passed": diag["passed"],
            "steps_per_draw": float(steps.max() / stats.sizes["draw"]), "checks": checks}


def _parts_process(spec: Path, again: bool) -> dict:
    done = subprocess.run([sys.executable, __file__, "--parts", str(spec), *(["--again"] if again else [])],
                          capture_output=True, text=True)
    if done.returncode:
        return {"failed": done.stderr.strip().splitlines()[-3:]}
    return json.loads(done.stdout.strip().splitlines()[-1])


def measure(name: str, engines=("pymc", "nutpie"), again: bool = False) -> dict:
    """Parts (a fresh process), the whole fit on each engine, the parts again (another process)."""
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        spec = write_problem(name, folder)
        first = _parts_process(spec, again)
        if "failed" in first:
            return {"problem": name, **first}
        fits = [fit(spec, e, folder) for e in engines]
        result = {"problem": name, **_parts_process(spec, False), "fits": fits,
                  "compile_nutpie_first_process": first["compile_nutpie"],
                  "compile_c_first_process": first["compile_c"],
                  "compile_nutpie_again": first["compile_nutpie_again"]}
        if "failed" in result:
            return result
    for f in result["fits"]:
        if "failed" in f:
            continue
        compile_ = result["compile_nutpie"] if f["engine"] == "nutpie" else result["compile_c"]
        # Steps of the slowest chain over warm-up and draws (warm-up assumed as costly per draw).
        steps = f["steps_per_draw"] * (bench_scale.WARMUP + bench_scale.DRAWS)
        f["per_step"] = max(f["sampling"] - compile_, 0.0) / steps
    return result


def table(results: list) -> str:
    head = ("| problem | path | dim | rows | grad C ms | grad numba ms | compile C s (first / later process) | "
            "compile nutpie s (first / later process) | engine | sampling s | wall s | steps/draw | per step ms | gate |")
    lines = [head, "|" + "---|" * 14]
    for r in results:
        if "failed" in r:
            lines.append(f"| {r['problem']} | failed: {r['failed']} |" + " |" * 12)
            continue
        for k, f in enumerate(r["fits"]):
            first = (f"| {r['problem']} | {r['path']} | {r['dim']} | {r['rows']:,} | {1e3 * r['grad_c']:.3f} | "
                     f"{1e3 * r['grad_nutpie']:.3f} | {r['compile_c_first_process']:.1f} / {r['compile_c']:.1f} | "
                     f"{r['compile_nutpie_first_process']:.1f} / {r['compile_nutpie']:.1f} ") if k == 0 else "| | | | | | | | "
            if "failed" in f:
                lines.append(first + f"| {f['engine']} | failed: {f['failed']} | | | | | |")
                continue
            lines.append(first + f"| {f['engine']} | {f['sampling']:.1f} | {f['wall']:.1f} | "
                         f"{f['steps_per_draw']:.1f} | {1e3 * f['per_step']:.3f} | "
                         f"{'passed' if f['passed'] else 'FAILED'} |")
    return "\n".join(lines)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--problems", nargs="+", default=list(PROBLEMS), choices=list(PROBLEMS))
    parser.add_argument("--engines", nargs="+", default=["pymc", "nutpie"], choices=["pymc", "nutpie"])
    parser.add_argument("--json", type=Path, help="also write every measurement here")
    parser.add_argument("--again", action="store_true", help="also time a second nutpie compile in one process")
    parser.add_argument("--parts", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.parts:
        print(json.dumps(parts(args.parts, args.again)))
        return
    print(f"Machine: {bench_scale.machine()}", flush=True)
    results = []
    for name in args.problems:
        results.append(measure(name, args.engines, args.again))
        print(f"{name}: {json.dumps(results[-1])} (load {os.getloadavg()[0]:.1f})", file=sys.stderr, flush=True)
        if args.json:
            args.json.write_text(json.dumps(results, indent=1))
    print(table(results))
    print(f"load average at the end {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
