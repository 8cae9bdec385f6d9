"""Coverage of post-stratified intervals against a simulated population truth (a statistical study, not a timing).

Usage: python benchmarks/study_poststratify_coverage.py [--replicates N] [--out DIR]

Each replicate simulates a normal outcome in 6 areas of very unequal sample
size (3 to 30 rows) with a two-level predictor, fits a normal model of y on kind with intercepts varying by area,
and post-stratifies to a population table whose mix of the predictor differs
from the sample's. The truth of an area is the count-weighted mean of its
cells' true expected outcomes. Prints the share of areas (and of the whole
population) whose central 90% interval holds the truth, with its binomial
standard error; nominal is 0.90.
"""
from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

SIZES = (3, 5, 8, 12, 20, 30)
SPEC = """format: hierwork/1
name: coverage
data: data.csv
outcome: {column: y}
predictors: [kind]
groups: {area: {column: area}}
estimates: {interval: 0.9}
sampling: {chains: 2, warmup: 500, draws: 1000, seed: SEED}
"""


def replicate(rng, folder: Path, seed: int) -> pd.DataFrame:
    import hierwork

    areas = [f"area_{k}" for k in range(len(SIZES))]
    effect = rng.normal(0.0, 0.6, len(SIZES))
    beta_kind, residual = 1.0, 1.0
    rows = []
    for k, n in enumerate(SIZES):
        kind = rng.choice(["a", "b"], n, p=[0.7, 0.3])
        y = 10.0 + effect[k] + beta_kind * (kind == "b") + rng.normal(0, residual, n)
        rows.append(pd.DataFrame({"area": areas[k], "kind": kind, "y": y}))
    pd.concat(rows).to_csv(folder / "data.csv", index=False)
    (folder / "spec.yaml").write_text(SPEC.replace("SEED", str(seed)), encoding="utf-8")
    population = pd.DataFrame([(a, kind, rng.integers(50, 500)) for a in areas for kind in ("a", "b")],
                              columns=["area", "kind", "count"])
    true_cell = 10.0 + effect[population["area"].str[5:].astype(int)] + beta_kind * (population["kind"] == "b")
    weighted = true_cell * population["count"]
    truth = (weighted.groupby(population["area"]).sum() / population.groupby("area")["count"].sum()).to_dict()
    truth["all"] = weighted.sum() / population["count"].sum()
    run, passed = _fitted(folder / "spec.yaml")
    table = hierwork.poststratify(run, population, by=["area"])
    table["truth"] = table["area"].map(truth)
    table["covered"] = (table["lower"] <= table["truth"]) & (table["truth"] <= table["upper"])
    table["passed"] = passed
    return table


def _fitted(spec_path: Path):
    """Sample and gate as ``fit`` does, and hold the run in memory (no report, no files): a Run and the verdict."""
    import json

    from hierwork.inference.gate import evaluate_gate
    from hierwork.pipeline import _spec_as_run, check, sample_posterior
    from hierwork.runfolder import Run, _jsonable

    report = check(spec_path)
    idata = sample_posterior(report, progress=False)
    spec = report.plan.spec
    gate = evaluate_gate(idata, spec.gate, spec.sampling["max_treedepth"])
    plan = json.loads(json.dumps(report.to_dict(), default=_jsonable))
    return Run(spec_path.parent, {"plan.json": plan, "spec.yaml": _spec_as_run(spec), "posterior.nc": idata}), gate.passed


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=40)
    parser.add_argument("--out", type=Path, default=None, help="folder for the replicates' runs (default: temporary)")
    args = parser.parse_args(argv)
    rng = np.random.default_rng(20261203)
    results = []
    with tempfile.TemporaryDirectory() as tmp:
        base = args.out or Path(tmp)
        for r in range(args.replicates):
            folder = base / f"rep_{r:03d}"
            folder.mkdir(parents=True, exist_ok=True)
            results.append(replicate(rng, folder, seed=1000 + r).assign(replicate=r))
            print(f"replicate {r + 1}/{args.replicates}", flush=True)
    table = pd.concat(results)
    for name, part in (("areas", table[table["by"] != "all"]), ("whole population", table[table["by"] == "all"])):
        share, n = part["covered"].mean(), len(part)
        print(f"{name}: {share:.3f} of {n} intervals hold the truth (se {np.sqrt(share * (1 - share) / n):.3f}; "
              f"nominal 0.90); gate passed in {part['passed'].mean():.0%} of replicates")
    by_size = table[table["by"] != "all"].groupby("area")["covered"].mean()
    print("by area (rows " + ", ".join(map(str, SIZES)) + "): " + ", ".join(f"{v:.2f}" for v in by_size))


if __name__ == "__main__":
    main()
