"""The public pipeline: ``check`` and ``fit`` (the CLI calls these and nothing deeper)."""
from __future__ import annotations

import datetime as _dt
import platform
import shlex
import sys
import time
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

from . import __version__, predictive, runs
from .baselines import baselines
from .data import load_dataset
from .describe import describe, plan_as_dict
from .diagnostics import evaluate_gate
from .estimates import group_estimates, pooling_factors, population_summary
from .errors import SpecError
from .gaussian import add_group_effects, build_collapsed_model, choose_path, collapsed_problem
from .model import build_model
from .plan import ModelPlan, make_plan
from .report import write_report
from .sampling import choose_engine, run_sampler
from .spec import Spec, load_spec

_PACKAGES = ("pymc", "pytensor", "arviz", "numpy", "scipy", "pandas", "xarray", "nutpie")


@dataclass(frozen=True)
class CheckReport:
    """What ``check`` found: the plan, and the choices made for fitting."""

    plan: ModelPlan
    path: str
    path_reason: str
    engine: str
    engine_reason: str

    def text(self) -> str:
        from .batch.variants import describe_variants

        text = describe(self.plan, {"path": f"{self.path} ({self.path_reason})",
                                    "engine": f"{self.engine} ({self.engine_reason})"},
                        collapsed=self.path == "collapsed")
        return "\n".join([text, *describe_variants(self.plan.spec)])

    def to_dict(self) -> dict:
        return plan_as_dict(self.plan, {"path": self.path, "path_reason": self.path_reason,
                                        "engine": self.engine, "engine_reason": self.engine_reason})


def _as_spec(spec, overrides) -> Spec:
    if isinstance(spec, Spec):
        return load_spec(spec.path, overrides) if overrides else spec
    return load_spec(spec, overrides)


def check(spec, overrides: dict | None = None) -> CheckReport:
    """Validate a spec and its data and make the model plan, without sampling.

    Parameters
    ----------
    spec : str, Path or Spec
    overrides : dict, optional
        Dotted spec keys and values (``{"sampling.draws": 200}``).

    Returns
    -------
    CheckReport

    Raises
    ------
    HierworkError
        On any problem with the spec or the data.
    """
    spec = _as_spec(spec, overrides)
    plan = make_plan(spec, load_dataset(spec))
    path, path_reason = _resolve_path(spec, plan)
    engine, reason = choose_engine(spec.sampling["engine"], _likelihood_size(plan, path) * plan.X.shape[1])
    return CheckReport(plan, path, path_reason, engine, reason)


def _likelihood_size(plan: ModelPlan, path: str) -> int:
    """Terms the likelihood sums per gradient: rows, cells of crossed groups, or groups."""
    if path == "plain" or not plan.factors:
        return plan.n
    if path == "reduced":
        return len(np.unique(np.column_stack([f.index for f in plan.factors]), axis=0))
    return max(f.n_groups for f in plan.factors)


def _resolve_path(spec: Spec, plan: ModelPlan) -> tuple[str, str]:
    """The model form: the spec's ``sampling.path``, or the fastest exact one that applies."""
    best, reason = choose_path(plan)
    requested = spec.sampling["path"]
    if requested in ("auto", best):
        return best, reason
    order = ("collapsed", "reduced", "plain")
    if order.index(requested) < order.index(best):
        raise SpecError(f"path {requested!r} does not apply to this model: {reason}",
                        where=spec.where("sampling.path"), hint=f"use 'auto' or {best!r}")
    return requested, "set in the spec"


def sample_posterior(report: CheckReport, progress: bool | None = None):
    """Sample the posterior of a checked plan by its path; every ``F__effect`` included.

    Parameters
    ----------
    report : CheckReport
        From :func:`check` (plan, path, engine).
    progress : bool, optional
        Show the sampler's progress bar (default: when on a terminal).

    Returns
    -------
    arviz.InferenceData
    """
    plan, settings = report.plan, report.plan.spec.sampling
    if report.path == "collapsed":
        problem = collapsed_problem(plan)
        idata = run_sampler(build_collapsed_model(plan, problem), settings, report.engine, progress)
        return add_group_effects(idata, plan, settings["seed"], problem)
    return run_sampler(build_model(plan, reduced=report.path == "reduced"), settings, report.engine, progress)


def fit(spec, out, force: bool = False, overrides: dict | None = None, progress: bool | None = None,
        command: str | None = None) -> runs.Run:
    """Check, sample, gate, estimate and write a run folder.

    Parameters
    ----------
    spec : str, Path or Spec
    out : str or Path
        Run folder to create (refused if it exists, unless ``force``).
    force : bool
        Replace an existing ``out`` once the new run is complete.
    overrides : dict, optional
        Dotted spec keys and values, validated as if written in the spec.
    progress : bool, optional
        Show the sampler's progress bar (default: when on a terminal).
    command : str, optional
        The command line to record in provenance (default: this process's).

    Returns
    -------
    Run
        The written run folder; ``run.passed`` tells whether the gate passed.
    """
    started = _dt.datetime.now(_dt.timezone.utc)
    t0 = time.perf_counter()
    out = Path(out)
    spec = _as_spec(spec, overrides)
    runs.refuse_existing(out, force)
    report = check(spec)
    plan = report.plan
    settings = spec.sampling
    idata = sample_posterior(report, progress)
    gate = evaluate_gate(idata, spec.gate, settings["max_treedepth"])
    table = group_estimates(idata, plan, baselines(plan), spec.interval)
    summary = population_summary(idata, plan, spec.interval)
    pooling = pooling_factors(idata, plan)
    extra_files = predictive.augment(idata, plan, spec, settings["seed"])
    finished = _dt.datetime.now(_dt.timezone.utc)
    provenance = {
        "format": runs.RUN_FORMAT, "hierwork": __version__, "python": platform.python_version(),
        "packages": {p: _version(p) for p in _PACKAGES}, "spec_path": str(spec.path), "spec_sha256": spec.sha256,
        "data_path": str(spec.data_path), "data_sha256": plan.data_sha256, "seed": settings["seed"],
        "overrides": dict(overrides or {}), "engine": report.engine, "engine_reason": report.engine_reason,
        "path": report.path, "path_reason": report.path_reason,
        "started": started.isoformat(timespec="seconds"), "finished": finished.isoformat(timespec="seconds"),
        "wall_seconds": round(time.perf_counter() - t0, 3),
        "sampling_seconds": round(float(idata.sample_stats.attrs.get("sampling_seconds", 0.0)), 3),
        "command": command or " ".join(shlex.quote(a) for a in sys.argv),
        "reproduce": f"hierwork fit {shlex.quote(str(out / 'spec.yaml'))} --out NEW_FOLDER",
        "passed": gate.passed,
    }
    with runs.staged_folder(out, force) as tmp:
        # Uncompressed: zlib saves about 5% on posterior draws and costs ten times the write time.
        idata.to_netcdf(str(tmp / "posterior.nc"), engine="h5netcdf", compress=False)
        runs.write_json(tmp / "diagnostics.json", gate.to_dict())
        table.to_csv(tmp / "group_estimates.csv", index=False)
        summary.to_csv(tmp / "summary.csv", index=False)
        pooling.to_csv(tmp / "pooling.csv", index=False)
        (tmp / "spec.yaml").write_text(_spec_as_run(spec), encoding="utf-8")
        runs.write_json(tmp / "provenance.json", provenance)
        runs.write_json(tmp / "plan.json", report.to_dict())
        for name, content in extra_files.items():
            if isinstance(content, pd.DataFrame):
                runs.write_csv(tmp / name, content)
            else:
                (tmp / name).write_text(content, encoding="utf-8")
        write_report(tmp)
    return runs.Run.load(out)


def _spec_as_run(spec: Spec) -> str:
    """The effective spec (overrides are already in its content), data path absolute, original noted."""
    content = dict(spec.document.content)
    content["data"] = str(spec.data_path)
    header = (f"# spec as run by hierwork {__version__}\n# original: {spec.path} (sha256 {spec.sha256})\n")
    return header + yaml.safe_dump(content, sort_keys=False, allow_unicode=True)


def _version(package: str) -> str | None:
    try:
        return metadata.version(package)
    except metadata.PackageNotFoundError:
        return None


def demo_specs_folder() -> Path:
    """The repository's ``model_specs/`` folder (the demo specs)."""
    return Path(__file__).resolve().parent.parent / "model_specs"


def run_demo(out, force: bool = False, only=None, overrides: dict | None = None, echo=None) -> dict:
    """Regenerate the demo data if missing and fit every demo spec into ``out/<name>``.

    Parameters
    ----------
    out : str or Path
        Folder that receives one run folder per demo spec.
    force : bool
        Replace existing run folders.
    only : list of str, optional
        Names of the demo specs to fit (file stems); default all.
    overrides : dict, optional
        Applied to every spec (e.g. fewer draws for a quick look).
    echo : callable, optional
        Receives one progress line per spec.

    Returns
    -------
    dict
        Spec name -> :class:`Run`.
    """
    from .demo import DEMO_DATASETS, make_demo_data

    folder = demo_specs_folder()
    data_dir = folder.parent / "demo" / "data"
    if not all((data_dir / f"{name}.csv").is_file() for name in DEMO_DATASETS):
        make_demo_data(data_dir)
    specs = sorted(folder.glob("*.yaml"))
    if only:
        specs = [p for p in specs if p.stem in only]
    results = {}
    for path in specs:
        if echo:
            echo(f"fitting {path.name} ...")
        run = fit(path, Path(out) / path.stem, force=force, overrides=overrides)
        results[path.stem] = run
        if echo:
            echo(f"  {'passed' if run.passed else 'FAILED'}: {run.path}")
    return results
