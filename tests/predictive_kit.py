"""Shared helpers of the predictive, LOO and predict tests: small fits of spec texts."""
from __future__ import annotations

import functools
from pathlib import Path


import numpy as np
import pandas as pd

import hierwork
from hierwork.results import loo, predictive
from hierwork.pipeline import check, sample_posterior

DATA = Path(__file__).parent / "data"
DEMO = Path(__file__).parent.parent / "demo" / "data"
SMALL = {"sampling.chains": 2, "sampling.draws": 300, "sampling.warmup": 300}


def write(folder: Path, text: str) -> Path:
    """Write a spec text (``DATA``/``DEMO`` replaced by the data folders) and return its path."""
    path = folder / "spec.yaml"
    path.write_text(text.replace("DATA", str(DATA)).replace("DEMO", str(DEMO)), encoding="utf-8")
    return path


def simulate_sites(path: Path, *, seed: int, n_sites: int, per_site: int, mu: float, site_sd: float,
                   resid_sd: float, label: str) -> None:
    """Write ``site, y`` simulated from a one-way normal model (``label`` formats site numbers)."""
    rng = np.random.default_rng(seed)
    site = np.repeat(np.arange(n_sites), per_site)
    y = mu + rng.normal(0, site_sd, n_sites)[site] + rng.normal(0, resid_sd, site.size)
    pd.DataFrame({"site": [label.format(j) for j in site], "y": y}).to_csv(path, index=False)


def sample(spec_path, overrides=None):
    """Plan and posterior of a spec by the path ``check`` chooses (no run folder)."""
    report = check(spec_path, {**SMALL, **(overrides or {})})
    return report.plan, sample_posterior(report, progress=False)


def augment(idata, plan, seed):
    """What ``fit`` adds after sampling: predictive groups, calibration and the LOO files."""
    files = predictive.augment(idata, plan, seed, plan.spec.interval)
    return {**files, **loo.pooling_comparison(idata, plan, plan.spec, seed)}


def fit_run(folder: Path, spec_path, overrides=None):
    """A run folder through the public API."""
    return hierwork.fit(spec_path, out=folder / "run", overrides={**SMALL, **(overrides or {})}, progress=False)


#: rail (Devore 2000, Example 10.10; tests/data/SOURCES.md): 18 rows, 6 rails, normal outcome.
RAIL = """format: hierwork/1
name: rail
data: DATA/rail.csv
outcome: {column: travel_ns}
groups: {rail: {column: rail}}
"""

def write_machines(folder: Path, name: str = "spec", sampling: str = "") -> tuple[Path, pd.DataFrame]:
    """Machines (Milliken and Johnson 1992; tests/data/SOURCES.md) with a worker:machine cell column, and a
    spec of worker, machine and cell crossed, in ``folder``: ``(spec path, data)``. ``sampling`` is an
    extra line such as ``sampling: {chains: 2}``."""
    data = pd.read_csv(DATA / "machines.csv")
    data["cell"] = data["worker"].astype(str) + ":" + data["machine"]
    data.to_csv(folder / "machines.csv", index=False)
    spec = folder / f"{name}.yaml"
    spec.write_text(f"""format: hierwork/1
name: machines
data: machines.csv
outcome: {{column: score, family: normal}}
groups:
  worker: {{column: worker}}
  machine: {{column: machine}}
  cell: {{column: cell}}
{sampling}
""", encoding="utf-8")
    return spec, data


CBPP = """format: hierwork/1
name: cbpp
data: DATA/cbpp.csv
outcome: {column: incidence, family: binomial, trials: size}
groups: {herd: {column: herd}}
sampling: {seed: 11}
estimates: {compare_pooling: true}
"""


@functools.lru_cache(maxsize=None)
def cbpp(folder: str):
    """cbpp (Lesnoff et al. 2004; tests/data/SOURCES.md), binomial by herd, plain path, augmented with
    the pooling comparison: (plan, idata, files). Cached for the whole test session."""
    plan, idata = sample(write(Path(folder), CBPP))
    return plan, idata, augment(idata, plan, plan.spec.sampling["seed"])
