"""PyMC's NUTS against nutpie, by model path and size: where the engine choice should cross over.

Invented data (fixed seed) in a few shapes, each taking one of hierwork's
paths: parcel minutes by depot (normal, one factor: ``collapsed``), by courier
x address x region (normal, crossed: ``reduced``, or ``semi_collapsed`` when
asked), late deliveries and parcel counts with two categorical predictors
(bernoulli and poisson rows that merge into cells: ``reduced``), and parcel
counts against a numeric predictor (poisson, no two rows alike: ``plain``).

For every problem, in two fresh child processes one after the other (the
second sees whatever the first cached on disk): building the PyMC model;
compiling it for PyMC's NUTS (PyTensor's C backend) and timing one log
density + gradient evaluation (median of repeats) and a short one-chain run
(300 iterations, warm-up included), so the cost of one leapfrog step with the
sampler's own work; then the same for nutpie (PyTensor's numba backend, then
numba's JIT). With ``--again`` the nutpie compile is repeated in the first
process (an in-process cache?); with ``--fits`` the whole ``hierwork fit``
command is also timed on each engine (2 chains x (1,000 + 1,000)).

Times are CPU seconds of the process, its threads and the compiler it runs:
on a machine shared with other work they stay what an idle machine's wall
clock would show for one chain, where wall times do not. The gradient work
of :func:`hierwork.model.paths.gradient_work` is printed beside the measured
gradient, and the engine a 2 x 2,000-iteration run would sample faster on,
from the measured compile, step cost and steps.

Usage::

    nice -n 10 python benchmarks/bench_engine.py                 # every problem
    nice -n 10 python benchmarks/bench_engine.py --problems crossed-S semi-S --fits pymc nutpie --json out.json
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
        frame["weight_kg"] = rng.gamma(2.0, 1.5, n_rows).round(6)  # no two rows alike
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


def _cpu() -> float:
    """CPU seconds of this process (every thread) and of its finished children (the C compiler)."""
    import resource

    own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


def _timed(fn, *args, **kwargs):
    """``(result, wall seconds, CPU seconds)`` of one call."""
    w, c = time.perf_counter(), _cpu()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - w, _cpu() - c


def _per_call(fn, x, budget: float = 1.0) -> float:
    """Median CPU seconds (this thread) of one call of ``fn(x)`` over repeats within about ``budget`` seconds."""
    fn(x)
    times = []
    start = time.perf_counter()
    while len(times) < 5 or (time.perf_counter() - start < budget and len(times) < 2000):
        t = time.thread_time()
        fn(x)
        times.append(time.thread_time() - t)
    return float(np.median(times))


def _steps(idata) -> int:
    """Leapfrog steps of every iteration kept (warm-up included when kept)."""
    groups = [g for g in ("warmup_sample_stats", "sample_stats") if g in idata.groups()]
    return int(sum(np.nansum(idata[g]["n_steps"].values) for g in groups))


def parts(spec: Path, again: bool = False, iterations: int = 300) -> dict:
    """Build, compile, time one gradient and a short one-chain run of a problem's model on each engine.

    Times are CPU seconds (this process, its threads and the compiler it runs), so they do not depend on
    what else the shared machine runs; wall seconds of the compiles are kept beside them.
    """
    t0 = time.perf_counter()
    import nutpie
    import pymc as pm

    import hierwork
    from hierwork.model.paths import gradient_work
    from hierwork.pipeline import path_model

    imports = time.perf_counter() - t0
    report = hierwork.check(spec)
    (model, _), build, _ = _timed(path_model, report.plan, report.path)
    x0 = np.concatenate([np.ravel(v) for v in model.initial_point().values()])
    with model:
        step, compile_c_wall, compile_c = _timed(pm.NUTS, target_accept=0.9)
    fn = model.logp_dlogp_function(ravel_inputs=True)
    fn.set_extra_values({})
    grad_c = _per_call(fn, x0)
    half = iterations // 2
    trace, _, run_c = _timed(pm.sample, draws=half, tune=half, chains=1, cores=1, step=step, model=model,
                             random_seed=SEED, progressbar=False, discard_tuned_samples=False,
                             compute_convergence_checks=False)
    compiled, compile_nutpie_wall, compile_nutpie = _timed(nutpie.compile_pymc_model, model)
    grad_nutpie = _per_call(compiled.logp_func, x0)
    draws, _, run_nutpie = _timed(nutpie.sample, compiled, draws=half, tune=half, chains=1, cores=1, seed=SEED,
                                  progress_bar=False)
    compile_nutpie_again = None
    if again:
        compile_nutpie_again = _timed(nutpie.compile_pymc_model, path_model(report.plan, report.path)[0])[2]
    steps_c, steps_nutpie = _steps(trace), _steps(draws)
    return {"path": report.path, "dim": int(x0.size), "work": gradient_work(report.plan, report.path), "rows": int(report.plan.n), "imports": imports,
            "build": build, "compile_c": compile_c, "compile_c_wall": compile_c_wall, "grad_c": grad_c,
            "step_c": run_c / steps_c, "steps_per_iteration_c": steps_c / iterations,
            "compile_nutpie": compile_nutpie, "compile_nutpie_wall": compile_nutpie_wall,
            "compile_nutpie_again": compile_nutpie_again, "grad_nutpie": grad_nutpie,
            "step_nutpie": run_nutpie / steps_nutpie, "steps_per_iteration_nutpie": steps_nutpie / iterations,
            "load": os.getloadavg()[0]}


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


def measure(name: str, engines=(), again: bool = False) -> dict:
    """Parts in two fresh processes (the second sees what the first cached on disk), then whole fits."""
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        spec = write_problem(name, folder)
        first = _parts_process(spec, again)
        if "failed" in first:
            return {"problem": name, **first}
        second = _parts_process(spec, False)
        if "failed" in second:
            return {"problem": name, **second}
        result = {"problem": name, **second, "first": first, "fits": [fit(spec, e, folder) for e in engines]}
    return result


def table(results: list) -> str:
    """One line per problem: work, gradient and step costs per engine (CPU), compiles, steps, the faster engine."""
    head = ("| problem | path | dim | rows | gradient work | grad C us | grad numba us | step PyMC us | "
            "step nutpie us | steps/iter (PyMC, nutpie) | compile C s (1st, 2nd process) | "
            "compile nutpie s (1st, 2nd process) | faster at 2 x 2,000 iterations (measured) |")
    lines = [head, "|" + "---|" * 13]
    for r in results:
        if "failed" in r:
            lines.append(f"| {r['problem']} | failed: {r['failed']} |" + " |" * 11)
            continue
        steps = 2_000 * r["steps_per_iteration_nutpie"]
        secs = {"pymc": r["compile_c"] + steps * r["step_c"], "nutpie": r["compile_nutpie"] + steps * r["step_nutpie"]}
        best = min(secs, key=secs.get)
        lines.append(
            f"| {r['problem']} | {r['path']} | {r['dim']:,} | {r['rows']:,} | {r['work']:,} | {1e6 * r['grad_c']:.0f} | "
            f"{1e6 * r['grad_nutpie']:.0f} | {1e6 * r['step_c']:.0f} | {1e6 * r['step_nutpie']:.0f} | "
            f"{r['steps_per_iteration_c']:.1f}, {r['steps_per_iteration_nutpie']:.1f} | "
            f"{r['first']['compile_c']:.1f}, {r['compile_c']:.1f} | "
            f"{r['first']['compile_nutpie']:.1f}, {r['compile_nutpie']:.1f} | "
            f"{best} ({secs['pymc']:.0f} s against {secs['nutpie']:.0f} s on nutpie) |")
        for f in r["fits"]:
            lines.append(f"| | whole fit on {f['engine']} | | | | | | | | | | | " + (
                f"failed: {f['failed']} |" if "failed" in f else
                f"sampling {f['sampling']:.1f} s, wall {f['wall']:.1f} s, {f['steps_per_draw']:.1f} steps/draw, "
                f"gate {'passed' if f['passed'] else 'FAILED'} |"))
    return "\n".join(lines)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--problems", nargs="+", default=list(PROBLEMS), choices=list(PROBLEMS))
    parser.add_argument("--fits", nargs="*", default=[], choices=["pymc", "nutpie"],
                        help="also time the whole hierwork fit on these engines (wall time: load-dependent)")
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
        results.append(measure(name, args.fits, args.again))
        print(f"{name}: {json.dumps(results[-1])} (load {os.getloadavg()[0]:.1f})", file=sys.stderr, flush=True)
        if args.json:
            args.json.write_text(json.dumps(results, indent=1))
    print(table(results))
    print(f"load average at the end {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
