"""Does ``parameterisation: auto`` sample as well as the better fixed choice?

Poisson problems with one factor (every group effect sampled), simulated with
a fixed seed:

* sparse: 150 groups with 1-3 rows each and a small between-group SD (0.15):
  the data say little about each group, the centred form has a funnel;
* data-rich: 5 groups with 400 rows each and a between-group SD of 0.5: each
  group is pinned down by its own data, the non-centred form is the awkward one;
* data-rich with 12 groups of 150 rows (the same with more groups);
* mixed_sizes: 4 groups of 300 rows plus 100 groups of 1-3 rows (SD 0.4): the
  groups disagree, the per-group partial form should win;

and problems with several factors, where ``auto`` judges each factor from the
variance components of all of them estimated jointly:

* crossed: normal outcome, 24 plates x 6 samples crossed, one row per pair
  (144 rows; SDs 0.85 and 1.9, residual 0.55), the reduced path;
* crossed_binomial: defective items out of 20, 8 operators x 6 machines x 2
  rows, one numeric predictor (SDs 0.6 and 0.4), as in the crossed binomial
  recovery test;
* nested_counts_obs: Poisson counts, 30 sites in 6 regions, 5 rows per site,
  plus an observation-level factor (one group per row; SDs 0.4, 0.3, 0.3).

Each is fitted through ``hierwork.fit`` with every factor's parameterisation
set to ``centred``, ``non_centred``, ``partial`` and ``auto``, plus the mixed
fixed forms in ``MIXES`` (named by the factors' short forms in spec order,
``c``, ``nc``, ``p``). Reported per fit: wall time of the
whole fit, sampling time, the smallest bulk ESS over all parameters checked by
the gate (``diagnostics.json``; includes every group effect), bulk ESS per
second of sampling, divergent transitions, and for ``auto`` the ratio of its
ESS per second to the best fixed choice's. Each fit is repeated ``--repeats``
times in alternating order and the fastest repeat is kept (sampling time
includes PyMC's compile, which is cached after the first fit of a model).

``auto`` resolves to forms that are also measured as fixed choices, so with the
same seed it draws exactly the same numbers as that choice: its ESS equals the
chosen form's and the ratio differs from 1 only by timing noise. What the
benchmark shows is whether auto picks the better form on each problem.

Run:  python benchmarks/bench_parameterisation.py [--out FOLDER] [--markdown FILE] [--problems NAME ...]
"""
from __future__ import annotations

import argparse
import json
import os
import platform
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

import hierwork

SEED = 20261202
SAMPLING = {"sampling.chains": 2, "sampling.cores": 2, "sampling.warmup": 500, "sampling.draws": 500,
            "sampling.seed": SEED}
REPEATS = 2


def simulate(kind: str, rng) -> pd.DataFrame:
    """One problem's rows (see the module docstring)."""
    if kind == "crossed":
        plate, sample = np.meshgrid(np.arange(24), np.arange(6), indexing="ij")
        plate, sample = plate.ravel(), sample.ravel()
        y = 22 + rng.normal(0, 0.85, 24)[plate] + rng.normal(0, 1.9, 6)[sample] + rng.normal(0, 0.55, 144)
        return pd.DataFrame({"plate": [f"p{g:02d}" for g in plate], "sample": [f"s{g}" for g in sample],
                             "diameter_mm": np.round(y, 3)})
    if kind == "crossed_binomial":  # tests/test_recovery.py::test_crossed_operators_and_machines_binomial
        o_idx = np.repeat(np.arange(8), 12)
        m_idx = np.tile(np.repeat(np.arange(6), 2), 8)
        x = rng.normal(0, 1, 96)
        eta = -1.0 + 0.5 * x + rng.normal(0, 0.6, 8)[o_idx] + rng.normal(0, 0.4, 6)[m_idx]
        return pd.DataFrame({"operator": [f"op{j}" for j in o_idx], "machine": [f"m{k}" for k in m_idx],
                             "x": np.round(x, 4), "items": 20, "defective": rng.binomial(20, 1 / (1 + np.exp(-eta)))})
    if kind == "nested_counts_obs":
        site = np.repeat(np.arange(30), 5)
        region = site // 5
        eta = 1.0 + rng.normal(0, 0.4, 6)[region] + rng.normal(0, 0.3, 30)[site] + rng.normal(0, 0.3, 150)
        return pd.DataFrame({"region": [f"r{g}" for g in region], "site": [f"t{g % 5}" for g in site],
                             "visit": [f"v{i:03d}" for i in range(150)], "nests": rng.poisson(np.exp(eta))})
    sizes, sd = {"sparse": (rng.integers(1, 4, size=150), 0.15), "data_rich": (np.full(5, 400), 0.5),
                 "data_rich_12": (np.full(12, 150), 0.5),
                 "mixed_sizes": (np.concatenate([np.full(4, 300), rng.integers(1, 4, size=100)]), 0.4)}[kind]
    group = np.repeat(np.arange(len(sizes)), sizes)
    u = rng.normal(0, sd, len(sizes))
    x = rng.normal(0, 1, len(group))
    counts = rng.poisson(np.exp(1.0 + 0.3 * x + u[group]))
    return pd.DataFrame({"depot": [f"d{g:03d}" for g in group], "x": np.round(x, 4), "parcels_lost": counts})


#: Outcome, predictors and groups of each problem's spec.
SPECS = {
    "crossed": ({"column": "diameter_mm", "family": "normal"}, [],
                {"plate": {"column": "plate"}, "sample": {"column": "sample"}}),
    "nested_counts_obs": ({"column": "nests", "family": "poisson"}, [],
                          {"region": {"column": "region"}, "site": {"column": "site", "within": "region"},
                           "visit": {"column": "visit"}}),
    "crossed_binomial": ({"column": "defective", "family": "binomial", "trials": "items"}, ["x"],
                         {"operator": {"column": "operator"}, "machine": {"column": "machine"}}),
}
FORMS = ("centred", "non_centred", "partial")
#: Mixed fixed forms worth measuring, per problem (factor -> form); named by their short forms.
MIXES = {"nested_counts_obs": [{"region": "non_centred", "site": "non_centred", "visit": "centred"},
                               {"region": "centred", "site": "non_centred", "visit": "centred"},
                               {"region": "non_centred", "site": "centred", "visit": "centred"}],
         "crossed_binomial": [{"operator": "centred", "machine": "non_centred"}],
         "crossed": [{"plate": "centred", "sample": "non_centred"}]}
ONE_FACTOR = ({"column": "parcels_lost", "family": "poisson"}, ["x"], {"depot": {"column": "depot"}})
PROBLEMS = ("sparse", "data_rich", "data_rich_12", "mixed_sizes", "crossed", "crossed_binomial", "nested_counts_obs")


def write_spec(folder: Path, kind: str) -> Path:
    simulate(kind, np.random.default_rng(SEED)).to_csv(folder / f"{kind}.csv", index=False)
    outcome, predictors, groups = SPECS.get(kind, ONE_FACTOR)
    doc = {"format": "hierwork/1", "name": f"bench_{kind}", "data": f"{kind}.csv", "outcome": outcome,
           "predictors": predictors, "groups": groups}
    path = folder / f"{kind}.yaml"
    path.write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    return path


def short(form: str) -> str:
    return {"non_centred": "nc", "centred": "c", "partial": "p"}.get(form, form)


def choices(kind: str) -> dict:
    """Name -> {factor: form}: every factor in each form, the problem's mixes, and auto."""
    factors = list(SPECS.get(kind, ONE_FACTOR)[2])
    out = {form: dict.fromkeys(factors, form) for form in FORMS}
    out.update({"/".join(short(m[f]) for f in factors): m for m in MIXES.get(kind, [])})
    out["auto"] = dict.fromkeys(factors, "auto")
    return out


def measure(spec: Path, choice: str, forms: dict, out: Path) -> dict:
    t0 = time.perf_counter()
    run = hierwork.fit(spec, out=out, force=True, progress=False,
                       overrides={**SAMPLING, **{f"groups.{f}.parameterisation": form for f, form in forms.items()}})
    wall = time.perf_counter() - t0
    checks = {c["name"]: c for c in run.diagnostics["checks"]}
    plan = json.loads((run.path / "plan.json").read_text())
    resolved = "/".join(short(f["parameterisation"]) for f in plan["factors"])
    sampling = float(run.provenance["sampling_seconds"])
    ess = float(checks["ess_bulk"]["value"])
    return {"choice": choice, "resolved": resolved, "wall_s": wall, "sampling_s": sampling,
            "min_ess_bulk": ess, "ess_per_s": ess / sampling,
            "min_ess_bulk_summary": float(run.summary["ess_bulk"].min()),
            "divergences": int(checks["divergences"]["value"]), "passed": run.passed}


def fastest(repeats: list) -> dict:
    """The repeat with the shortest sampling time (least disturbed by other load; common practice).

    The seed is fixed, so every repeat draws the same numbers: only the times differ.
    """
    assert len({r["min_ess_bulk"] for r in repeats}) == 1, "repeats with the same seed gave different draws"
    return min(repeats, key=lambda r: r["sampling_s"])


def machine() -> str:
    cpu = next((line.split(":", 1)[1].strip() for line in Path("/proc/cpuinfo").read_text().splitlines()
                if line.startswith("model name")), platform.processor())
    load = os.getloadavg()
    return (f"nproc {os.cpu_count()}, CPU {cpu}, load average {load[0]:.1f} / {load[1]:.1f} / {load[2]:.1f} "
            f"(1/5/15 min) at the end of the run, Python {platform.python_version()}, "
            f"hierwork {hierwork.__version__}")


def table(results: dict) -> str:
    lines = ["| problem | parameterisation | chosen | wall s | sampling s | min bulk ESS | bulk ESS/s "
             "| divergences | auto / best fixed (ESS/s) |", "|---|---|---|---:|---:|---:|---:|---:|---:|"]
    for kind, rows in results.items():
        best = max((r for r in rows if r["choice"] != "auto"), key=lambda r: r["ess_per_s"])
        for r in rows:
            ratio = f"{r['ess_per_s'] / best['ess_per_s']:.2f} (best: {best['choice']})" if r["choice"] == "auto" else ""
            lines.append(f"| {kind} | {r['choice']} | {r['resolved']} | {r['wall_s']:.1f} | {r['sampling_s']:.1f} "
                         f"| {r['min_ess_bulk']:.0f} | {r['ess_per_s']:.1f} | {r['divergences']} | {ratio} |")
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, help="keep the run folders here (default: a temporary folder)")
    parser.add_argument("--markdown", type=Path, help="also write the table and machine line to this file")
    parser.add_argument("--problems", nargs="+", choices=PROBLEMS, default=list(PROBLEMS),
                        help="problems to run (default: all)")
    parser.add_argument("--repeats", type=int, default=REPEATS, help=f"fits per choice, fastest kept (default {REPEATS})")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = args.out or Path(tmp)
        root.mkdir(parents=True, exist_ok=True)
        results = {}
        for kind in args.problems:
            spec = write_spec(root, kind)
            named = choices(kind)
            order = list(named)
            runs = {choice: [] for choice in order}
            for rep in range(args.repeats):  # alternate the order so no choice always runs first (cold caches)
                for choice in (order if rep % 2 == 0 else order[::-1]):
                    runs[choice].append(measure(spec, choice, named[choice], root / f"{kind}_{choice.replace('/', '-')}"))
            results[kind] = [fastest(runs[choice]) for choice in order]
            for r in results[kind]:
                print(json.dumps({"problem": kind, **r}))
    text = f"{table(results)}\n\nMachine: {machine()}\n"
    print(text)
    if args.markdown:
        args.markdown.write_text(text, encoding="utf-8")


if __name__ == "__main__":
    main()
