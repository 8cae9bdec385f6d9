"""Shared helpers of the predictive, LOO and predict tests: small fits of spec texts."""
from __future__ import annotations

import functools
from pathlib import Path

import arviz as az

import hierwork
from hierwork import predictive
from hierwork.api import check
from hierwork.gaussian import add_group_effects, build_collapsed_model, collapsed_problem
from hierwork.model import build_model
from hierwork.sampling import run_sampler

DATA = Path(__file__).parent / "data"
DEMO = Path(__file__).parent.parent / "demo" / "data"
SMALL = {"sampling.chains": 2, "sampling.draws": 300, "sampling.warmup": 300}


def write(folder: Path, text: str) -> Path:
    """Write a spec text (``DATA``/``DEMO`` replaced by the data folders) and return its path."""
    path = folder / "spec.yaml"
    path.write_text(text.replace("DATA", str(DATA)).replace("DEMO", str(DEMO)), encoding="utf-8")
    return path


def sample(spec_path, overrides=None):
    """Plan and posterior of a spec by the path ``check`` chooses (no run folder)."""
    report = check(spec_path, {**SMALL, **(overrides or {})})
    plan, settings = report.plan, report.plan.spec.sampling
    if report.path == "collapsed":
        problem = collapsed_problem(plan)
        idata = run_sampler(build_collapsed_model(plan, problem), settings, "pymc", False)
        add_group_effects(idata, plan, settings["seed"], problem)
    else:
        idata = run_sampler(build_model(plan, reduced=report.path == "reduced"), settings, "pymc", False)
    return plan, idata


def fit_run(folder: Path, spec_path, overrides=None):
    """A run folder through the public API, with the predictive groups added to posterior.nc."""
    run = hierwork.fit(spec_path, out=folder / "run", overrides={**SMALL, **(overrides or {})}, progress=False)
    idata = az.from_netcdf(run.path / "posterior.nc")
    idata.load()
    spec = hierwork.load_spec(run.path / "spec.yaml")
    plan = check(spec).plan
    predictive.augment(idata, plan, spec, spec.sampling["seed"])
    idata.to_netcdf(str(run.path / "posterior.new.nc"), engine="h5netcdf")
    (run.path / "posterior.new.nc").replace(run.path / "posterior.nc")
    return hierwork.Run.load(run.path)


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
    files = predictive.augment(idata, plan, plan.spec, plan.spec.sampling["seed"])
    return plan, idata, files
