"""Scale benchmark: hierwork against the models a user would otherwise write.

Builds three problems with a fixed seed (delivery depots: minutes late per
delivery against distance, depots vary in their level):

* S:     85 depots, ~1,000 rows
* M:  2,000 depots, ~200,000 rows
* L: 20,000 depots, ~2,000,000 rows (unequal group sizes throughout)
* M/10: M's 2,000 depots with 20,000 rows (with M: what 10x the rows costs at fixed groups)

and fits each, in the same run and with the same priors, chains and draws, by

* ``hierwork``  -- the ``hierwork fit`` command end to end (Python start-up and imports,
  spec + CSV -> run folder with report), fast path, compile cache warm;
* ``hierwork-cold`` -- the same with an empty compile cache (a machine's first run; not
  run unless asked for with ``--methods``);
* ``pymc-nc``   -- a hand-written non-centred PyMC model, per-row likelihood, PyMC's NUTS;
* ``nutpie-nc`` -- the same model sampled with nutpie;
* ``nutpie-c``  -- its centred form sampled with nutpie.

Compile cache: every fit uses one PyTensor compile folder of the benchmark's own
(``--compiledir``), filled first by one untimed S fit per method, so each method
is timed as on a user's second run (``hierwork-cold`` uses an empty folder
instead). PyTensor reads the index of its whole compile folder at start-up, so
on a machine whose default folder has grown to thousands of entries every
method starts about 2 s slower than measured here.

Each fit runs in its own process, killed at the time cap. Reported: wall time
(including compile; for hierwork the whole command: imports, reading the data,
writing the run folder and report; the baselines' clocks start after their
imports),
min bulk and tail ESS over every parameter and group effect, max R-hat,
divergences, min-ESS per second, peak memory of the process tree, and
hierwork's min-ESS/s ratio to each baseline.

Usage::

    python benchmarks/bench_scale.py --sizes S            # print the table
    python benchmarks/bench_scale.py --sizes S M --cap 3600 --markdown results.md
"""
from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

SIZES = {"S": (85, 1_000), "M": (2_000, 200_000), "L": (20_000, 2_000_000),
         "M/10": (2_000, 20_000)}  # M's groups with a tenth of its rows: the rows-scaling check
SEED = 20261202
CHAINS, WARMUP, DRAWS = 2, 1000, 1000
METHODS = ("hierwork", "pymc-nc", "nutpie-nc", "nutpie-c", "hierwork-cold")
TRUE = {"intercept": 25.0, "distance_km": 1.5, "depot_sd": 6.0, "residual_sd": 12.0}


def make_problem(size: str, seed: int = SEED):
    """Invented delivery data: (frame, depots). Group sizes are log-normal, at least 1."""
    import pandas as pd

    n_groups, n_rows = SIZES[size]
    rng = np.random.default_rng([seed, *map(ord, size)])
    weights = rng.lognormal(0.0, 1.0, n_groups)
    counts = 1 + rng.multinomial(n_rows - n_groups, weights / weights.sum())
    depot = np.repeat(np.arange(n_groups), counts)
    distance = rng.gamma(4.0, 2.5, depot.size)
    level = rng.normal(0.0, TRUE["depot_sd"], n_groups)
    minutes = (TRUE["intercept"] + TRUE["distance_km"] * distance + level[depot]
               + rng.normal(0.0, TRUE["residual_sd"], depot.size))
    frame = pd.DataFrame({"depot": [f"d{k:05d}" for k in depot], "distance_km": distance.round(3),
                          "minutes_late": minutes.round(3)})
    return frame, n_groups


def write_problem(size: str, folder: Path) -> Path:
    """CSV and spec of a problem; returns the spec path."""
    import yaml

    frame, _ = make_problem(size)
    frame.to_csv(folder / "deliveries.csv", index=False)
    spec = {"format": "hierwork/1", "name": f"bench-{size.replace('/', '-')}", "data": "deliveries.csv",
            "outcome": {"column": "minutes_late", "family": "normal"},
            "predictors": ["distance_km"], "groups": {"depot": {"column": "depot"}},
            "sampling": {"chains": CHAINS, "warmup": WARMUP, "draws": DRAWS, "seed": SEED}}
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


def summarise(idata, names) -> dict:
    """Min bulk/tail ESS and max R-hat over the named variables (every element)."""
    import arviz as az

    post = idata.posterior[list(names)]
    ess_bulk = az.ess(post, method="bulk")
    ess_tail = az.ess(post, method="tail")
    rhat = az.rhat(post)
    lo = lambda ds: float(min(ds[v].min() for v in ds.data_vars))  # noqa: E731
    return {"ess_bulk": lo(ess_bulk), "ess_tail": lo(ess_tail),
            "r_hat": float(max(rhat[v].max() for v in rhat.data_vars)),
            "divergences": int(idata.sample_stats["diverging"].sum())}


def time_fit(spec: Path, folder: Path, names: list, env: dict | None = None) -> dict:
    """The whole ``hierwork fit`` command on ``spec``, timed from the shell's point of view (imports
    included); its run folder's draws of ``names`` summarised. A failed gate (exit 3) is a result."""
    import arviz as az

    import hierwork

    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "hierwork", "fit", str(spec), "--out", str(folder / "run"),
                           "--quiet"], env=env, stdout=subprocess.DEVNULL)
    if done.returncode not in (0, 3):  # 3: the run folder is written, the gate failed
        raise RuntimeError(f"hierwork fit exited {done.returncode}")
    wall = time.perf_counter() - start
    run = hierwork.Run.load(folder / "run")
    idata = az.from_netcdf(str(folder / "run" / "posterior.nc"))
    prov = run.provenance
    return {**summarise(idata, names), "wall": wall, "gate": bool(run.passed),
            "note": f"{prov['path']} / {prov['engine']}"}


def run_hierwork(size: str, folder: Path, cold: bool = False) -> dict:
    """:func:`time_fit` on a size's problem; ``cold``: with an empty PyTensor compile cache, as on a
    machine that never ran hierwork."""
    env = dict(os.environ)
    if cold:
        env["PYTENSOR_FLAGS"] = f"base_compiledir={folder / 'compiledir'}"
    out = time_fit(write_problem(size, folder), folder, ["b", "residual_sd", "depot__sd", "depot__effect"], env)
    return {**out, "note": out["note"] + ("; empty compile cache" if cold else "")}


def run_handwritten(size: str, folder: Path, engine: str, centred: bool) -> dict:
    """The model as a PyMC user would write it, with hierwork's default priors."""
    import pymc as pm

    import hierwork

    spec = write_problem(size, folder)
    priors = hierwork.check(spec).plan.priors
    frame, n_groups = make_problem(size)
    start = time.perf_counter()
    depot = frame["depot"].str[1:].astype(int).to_numpy()
    x, y = frame["distance_km"].to_numpy(), frame["minutes_late"].to_numpy()
    p = {k: priors[k].params for k in ("intercept", "distance_km", "residual_sd", "depot.sd")}
    with pm.Model() as model:
        b0 = pm.Normal("b0", **p["intercept"])
        b1 = pm.Normal("b1", **p["distance_km"])
        sigma = pm.HalfNormal("sigma", **p["residual_sd"])
        tau = pm.HalfNormal("tau", **p["depot.sd"])
        if centred:
            u = pm.Normal("u", 0.0, tau, shape=n_groups)
        else:
            u = pm.Deterministic("u", tau * pm.Normal("z", 0.0, 1.0, shape=n_groups))
        pm.Normal("y", b0 + b1 * x + u[depot], sigma, observed=y)
    if engine == "nutpie":
        import nutpie

        idata = nutpie.sample(nutpie.compile_pymc_model(model), draws=DRAWS, tune=WARMUP, chains=CHAINS,
                              cores=CHAINS, seed=SEED, progress_bar=False)
    else:
        idata = pm.sample(draws=DRAWS, tune=WARMUP, chains=CHAINS, cores=CHAINS, random_seed=SEED,
                          model=model, progressbar=False, compute_convergence_checks=False)
    wall = time.perf_counter() - start
    return {**summarise(idata, ["b0", "b1", "sigma", "tau", "u"]), "wall": wall, "gate": None,
            "note": "centred" if centred else "non-centred"}


def one(method: str, size: str) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        if method.startswith("hierwork"):
            return run_hierwork(size, Path(tmp), cold=method == "hierwork-cold")
        engine, form = method.split("-")
        return run_handwritten(size, Path(tmp), "nutpie" if engine == "nutpie" else "pymc", form == "c")


def measure(method: str, size: str, cap: float, script: str = __file__, argv: list | None = None) -> dict:
    """Run one fit in a child process; track the tree's peak memory; kill at the cap.

    ``script`` and ``argv`` name the child (default: this script's ``--one METHOD SIZE``),
    which prints its result as one JSON line; sibling benchmarks reuse this.
    """
    import psutil

    cmd = [sys.executable, script, *(argv or ["--one", method, size])]
    start = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    parent, peak = psutil.Process(proc.pid), 0
    while proc.poll() is None:
        if time.perf_counter() - start > cap:
            for p in parent.children(recursive=True) + [parent]:
                p.kill()
            proc.wait()
            return {"method": method, "size": size, "skipped": f"exceeded the {cap:.0f} s cap"}
        try:
            procs = [parent] + parent.children(recursive=True)
            peak = max(peak, sum(p.memory_info().rss for p in procs))
        except psutil.NoSuchProcess:
            pass
        time.sleep(0.2)
    stdout, stderr = proc.communicate()
    if proc.returncode != 0:
        return {"method": method, "size": size, "skipped": f"failed: {stderr.strip().splitlines()[-1:]}"}
    result = json.loads(stdout.strip().splitlines()[-1])
    result.update(method=method, size=size, peak_gib=peak / 2**30)
    result["ess_per_s"] = min(result["ess_bulk"], result["ess_tail"]) / result["wall"]
    return result


def sibling_main(doc: str, size: str, seed: int, script: str, methods: dict, argv=None) -> None:
    """The command line of a one-problem benchmark script: each method measured in its own child process
    (``--one METHOD``, killed at ``--cap``), then the table. ``methods``: name -> function of a folder."""
    parser = argparse.ArgumentParser(description=doc.split("\n\n")[0])
    parser.add_argument("--methods", nargs="+", default=list(methods), choices=list(methods))
    parser.add_argument("--cap", type=float, default=1800.0, help="seconds per fit (default 1800)")
    parser.add_argument("--markdown", type=Path, help="also write the table and machine line here")
    parser.add_argument("--one", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.one:
        with tempfile.TemporaryDirectory() as tmp:
            print(json.dumps(methods[args.one](Path(tmp))))
        return
    results = []
    for method in args.methods:
        results.append(measure(method, size, args.cap, script=script, argv=["--one", method]))
        print(f"{size} {method}: {json.dumps(results[-1])}", file=sys.stderr, flush=True)
    text = (f"Machine: {machine()}\nChains {CHAINS} x ({WARMUP} warmup + {DRAWS} draws), seed {seed}.\n\n"
            f"{table(results)}")
    print(text)
    if args.markdown:
        args.markdown.write_text(text + "\n", encoding="utf-8")


def machine() -> str:
    import psutil

    cpu = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return (f"{cpu}; {os.cpu_count()} cores visible; {psutil.virtual_memory().total / 2**30:.1f} GiB RAM; "
            f"Python {platform.python_version()}; load average at start {os.getloadavg()[0]:.1f}")


def table(results: list[dict]) -> str:
    head = ("| size | method | wall s | min ESS bulk | min ESS tail | max R-hat | divergences | "
            "min-ESS/s | peak GiB | hierwork ratio | note |")
    lines = [head, "|" + "---|" * 11]
    for r in results:
        if "skipped" in r:
            lines.append(f"| {r['size']} | {r['method']} | | | | | | | | | {r['skipped']} |")
            continue
        ours = next((h for h in results if h["size"] == r["size"] and h["method"] == "hierwork"
                     and "skipped" not in h), None)
        ratio = ("" if ours is None or r["method"].startswith("hierwork")
                 else f"{ours['ess_per_s'] / r['ess_per_s']:.1f}x")
        gate = "" if r["gate"] is None else ("; gate passed" if r["gate"] else "; gate FAILED")
        lines.append(f"| {r['size']} | {r['method']} | {r['wall']:.1f} | {r['ess_bulk']:.0f} | "
                     f"{r['ess_tail']:.0f} | {r['r_hat']:.3f} | {r['divergences']} | {r['ess_per_s']:.2f} | "
                     f"{r['peak_gib']:.2f} | {ratio} | {r['note']}{gate} |")
    return "\n".join(lines)


def scaling(results: list[dict]) -> str:
    """Ratios of hierwork's wall time: M over M/10 (10x rows, fixed groups) and L over M."""
    wall = {r["size"]: r["wall"] for r in results if r["method"] == "hierwork" and "skipped" not in r}
    lines = [f"hierwork wall time, {big} / {small} ({what}): {wall[big] / wall[small]:.2f}x"
             for big, small, what in (("M", "M/10", "10x rows, same groups"), ("L", "M", "10x rows and groups"))
             if big in wall and small in wall]
    return "".join("\n\n" + line for line in lines)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sizes", nargs="+", default=["S"], choices=list(SIZES))
    parser.add_argument("--methods", nargs="+", default=list(METHODS[:4]), choices=METHODS)
    parser.add_argument("--cap", type=float, default=3600.0, help="seconds per baseline fit (default 3600)")
    parser.add_argument("--markdown", type=Path, help="also write the table and machine line here")
    parser.add_argument("--compiledir", type=Path, default=Path.home() / ".cache" / "hierwork-bench",
                        help="PyTensor compile cache for every fit (default ~/.cache/hierwork-bench)")
    parser.add_argument("--no-warmup", action="store_true",
                        help="skip the untimed S fit per method that fills the compile cache first")
    parser.add_argument("--one", nargs=2, metavar=("METHOD", "SIZE"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.one:
        print(json.dumps(one(*args.one)))
        return
    os.environ["PYTENSOR_FLAGS"] = f"base_compiledir={args.compiledir}"  # inherited by every fit
    if not args.no_warmup:
        for method in (m for m in args.methods if m != "hierwork-cold"):
            subprocess.run([sys.executable, __file__, "--one", method, "S"], check=True,
                           stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    results = []
    for size in args.sizes:
        for method in args.methods:
            results.append(measure(method, size, args.cap))
            print(f"{size} {method}: {json.dumps(results[-1])}", file=sys.stderr, flush=True)
    text = f"Machine: {machine()}\nChains {CHAINS} x ({WARMUP} warmup + {DRAWS} draws), seed {SEED}.\n\n"
    text += table(results)
    text += scaling(results)
    print(text)
    if args.markdown:
        args.markdown.write_text(text + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
