"""The pipeline the CLI calls: ``check``, ``fit`` and ``run_demo`` (orchestration only).

spec -> :func:`~hierwork.data.reading.load_dataset` -> :func:`~hierwork.plan.plan.make_plan`
-> path and engine (:mod:`hierwork.model.paths`) -> PyMC model -> sampling ->
gate -> estimates, baselines, predictive checks and LOO -> run folder -> report.
"""
from __future__ import annotations

import datetime as _dt
import platform
import shlex
import sys
import time
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path

from hierwork import __version__
from hierwork.declare.spec import Spec, load_spec
from hierwork.model.paths import choose_engine, engine_load, resolve_path

_PACKAGES = ("pymc", "pytensor", "arviz", "numpy", "scipy", "pandas", "xarray", "nutpie")


@dataclass(frozen=True)
class CheckReport:
    """What ``check`` found: the plan, and the choices made for fitting."""

    plan: object
    path: str
    path_reason: str
    engine: str
    engine_reason: str

    def text(self) -> str:
        from hierwork.declare.variants import describe_variants
        from hierwork.plan.describe import describe

        text = describe(self.plan, [("path", self.path, self.path_reason),
                                    ("engine", self.engine, self.engine_reason)])
        return "\n".join([text, *describe_variants(self.plan.spec)])

    def prior_predictive_text(self, draws: int = 500) -> str:
        """What outcomes the priors imply (``hierwork check --prior-predictive``)."""
        from hierwork.results.prior_predictive import prior_predictive_text

        return prior_predictive_text(self.plan, self.plan.spec.sampling["seed"], draws)

    def to_dict(self) -> dict:
        from hierwork.plan.describe import plan_as_dict

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
    from hierwork.data.reading import load_dataset
    from hierwork.plan.plan import make_plan

    plan = make_plan(spec, load_dataset(spec))
    path, path_reason = resolve_path(spec, plan)
    engine, reason = choose_engine(spec.sampling["engine"], **engine_load(plan, path))
    return CheckReport(plan, path, path_reason, engine, reason)


def path_model(plan, path: str):
    """The PyMC model NUTS samples on a path, and the step that completes its posterior.

    Returns ``(model, complete)``; ``complete(idata, seed)`` draws the effects a
    path integrates out (collapsed, semi-collapsed) or refreshes the sampled
    ones (:mod:`hierwork.model.refresh`) and returns the idata.
    """
    if path == "collapsed":
        from hierwork.model.collapsed import add_group_effects, build_collapsed_model, collapsed_problem

        problem = collapsed_problem(plan)
        return build_collapsed_model(plan, problem), lambda idata, seed: add_group_effects(idata, plan, seed, problem)
    if path == "semi_collapsed":
        from hierwork.model.semi_collapsed import add_group_effects, build_semi_collapsed_model, semi_collapsed_problem

        problem = semi_collapsed_problem(plan)
        return (build_semi_collapsed_model(plan, problem),
                lambda idata, seed: add_group_effects(idata, plan, seed, problem))
    from hierwork.model.rowwise import build_model

    model = build_model(plan, reduced=path == "reduced")
    if plan.family.exact_normal:
        return model, lambda idata, seed: idata
    from hierwork.model.refresh import refresh_effects

    return model, lambda idata, seed: refresh_effects(idata, plan, seed)


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
    from hierwork.inference.sampling import run_sampler

    settings = report.plan.spec.sampling
    model, complete = path_model(report.plan, report.path)
    return complete(run_sampler(model, settings, report.engine, progress), settings["seed"])


def fit(spec, out, force: bool = False, overrides: dict | None = None, progress: bool | None = None,
        command: str | None = None):
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
    from hierwork import runfolder
    from hierwork.interrupts import stop_on_signals

    started = _dt.datetime.now(_dt.timezone.utc)
    t0 = time.perf_counter()
    out = Path(out)
    spec = _as_spec(spec, overrides)
    runfolder.refuse_existing(out, force)
    with stop_on_signals():
        report = check(spec)
        with runfolder.Staging(out, force) as stage:  # reserved before sampling: a clash fails now
            stage.write(_run_contents(spec, report, out, overrides, command, started, t0, progress))
    return runfolder.Run.load(out)


def _run_contents(spec, report, out, overrides, command, started, t0, progress) -> dict:
    """Sample, gate and estimate: every file of the run folder, in memory."""
    from hierwork import runfolder
    from hierwork.inference.gate import evaluate_gate
    from hierwork.report.publish import write_report
    from hierwork.results import loo, predictive
    from hierwork.results.baselines import baselines
    from hierwork.results.estimates import contrasts, group_estimates, population_summary
    from hierwork.results.pooling import pooling_factors
    from hierwork.results.sensitivity import sensitivity_table

    plan, settings = report.plan, spec.sampling
    idata = sample_posterior(report, progress)
    gate = evaluate_gate(idata, spec.gate, settings["max_treedepth"])
    contents = {
        "group_estimates.csv": group_estimates(idata, plan, baselines(plan), spec.interval),
        "summary.csv": population_summary(idata, plan, spec.interval),
        "pooling.csv": pooling_factors(idata, plan),
        "sensitivity.csv": sensitivity_table(idata, plan),
    }
    if plan.estimands.contrasts:
        contents["contrasts.csv"] = contrasts(idata, plan, spec.interval)
    contents.update(predictive.augment(idata, plan, settings["seed"], spec.interval))
    contents.update(loo.pooling_comparison(idata, plan, spec, settings["seed"]))
    finished = _dt.datetime.now(_dt.timezone.utc)
    contents.update({
        "posterior.nc": idata,
        "diagnostics.json": gate.to_dict(),
        "spec.yaml": _spec_as_run(spec),
        "plan.json": report.to_dict(),
        "provenance.json": {
            "format": runfolder.RUN_FORMAT, "hierwork": __version__, "python": platform.python_version(),
            "packages": {p: _version(p) for p in _PACKAGES}, "spec_path": str(spec.path),
            "spec_sha256": spec.sha256, "data_path": str(spec.data_path), "data_sha256": plan.data_sha256,
            "seed": settings["seed"], "overrides": dict(overrides or {}), "engine": report.engine,
            "engine_reason": report.engine_reason, "path": report.path, "path_reason": report.path_reason,
            "started": started.isoformat(timespec="seconds"), "finished": finished.isoformat(timespec="seconds"),
            "wall_seconds": round(time.perf_counter() - t0, 3),
            "sampling_seconds": round(float(idata.sample_stats.attrs.get("sampling_seconds", 0.0)), 3),
            "command": command or " ".join(shlex.quote(a) for a in sys.argv),
            "reproduce": f"hierwork fit {shlex.quote(str(out / 'spec.yaml'))} --out NEW_FOLDER",
            "passed": gate.passed,
        },
        "report": write_report,
    })
    return contents


def _spec_as_run(spec: Spec) -> str:
    """The effective spec (overrides are already in its content), data path absolute, original noted."""
    import yaml

    content = dict(spec.document.content)
    content["data"] = str(spec.data_path)
    original = str(spec.path).replace("\r", "\\r").replace("\n", "\\n")  # a comment stays one line
    header = (f"# spec as run by hierwork {__version__}\n# original: {original} (sha256 {spec.sha256})\n")
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
        Spec name -> :class:`~hierwork.runfolder.Run`.
    """
    from hierwork.demo import DEMO_DATASETS, make_demo_data

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
