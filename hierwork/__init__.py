"""hierwork: declare, check, fit, gate and report Bayesian multilevel models.

The public API mirrors the command line: ``load_spec`` and ``check`` (``hierwork
check``), ``fit`` (``hierwork fit``), ``predict`` (``hierwork predict``), ``poststratify``
(``hierwork poststratify``), ``Run`` (a run
folder loaded back), ``write_report`` (``hierwork report``), ``compare_runs``
(``hierwork compare``), ``batch_status`` (``hierwork status``),
``run_batch`` (``hierwork batch``), ``run_demo`` (``hierwork demo``) and ``spec_schema``
(``hierwork schema``).

Names are imported on first use (PEP 562), so ``import hierwork`` and the quick
commands load neither PyMC nor ArviZ nor matplotlib.
"""
from __future__ import annotations

import importlib

__version__ = "0.1.0"

#: Public name -> module that defines it.
_API = {
    "CheckReport": "hierwork.pipeline", "check": "hierwork.pipeline", "fit": "hierwork.pipeline",
    "run_demo": "hierwork.pipeline",
    "predict": "hierwork.results.predict",
    "poststratify": "hierwork.results.poststratify",
    "Run": "hierwork.runfolder",
    "compare_runs": "hierwork.report.compare", "write_report": "hierwork.report.publish",
    "batch_status": "hierwork.batch.progress",
    "run_batch": "hierwork.batch.runner",
    "Spec": "hierwork.declare.spec", "load_spec": "hierwork.declare.spec",
    "spec_schema": "hierwork.declare.schema",
    "DataError": "hierwork.errors", "HierworkError": "hierwork.errors",
    "RunFolderError": "hierwork.errors", "SpecError": "hierwork.errors",
}

__all__ = sorted(_API) + ["__version__"]


def __getattr__(name: str):
    if name in _API:
        value = getattr(importlib.import_module(_API[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'hierwork' has no attribute {name!r}")


def __dir__():
    return __all__
