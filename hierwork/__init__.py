"""hierwork: declare, check, fit, gate and report Bayesian multilevel models.

The public API mirrors the command line: ``load_spec`` and ``check`` (``hierwork
check``), ``fit`` (``hierwork fit``), ``predict`` (``hierwork predict``), ``Run`` (a run
folder loaded back), ``run_demo`` (``hierwork demo``), and
``spec_schema`` (``hierwork schema``).
"""
__version__ = "0.1.0"

from . import blas as _blas  # noqa: E402  (before PyTensor is imported)
from . import jitcache as _jitcache  # noqa: E402

_blas.configure()
_jitcache.import_arviz_cached()

from .api import CheckReport, check, fit, run_demo  # noqa: E402
from .errors import DataError, HierworkError, RunFolderError, SpecError  # noqa: E402
from .predict import predict  # noqa: E402
from .runs import Run  # noqa: E402
from .spec import Spec, load_spec, spec_schema  # noqa: E402

__all__ = [
    "CheckReport", "DataError", "HierworkError", "Run", "RunFolderError", "Spec", "SpecError",
    "check", "fit", "load_spec", "predict", "run_demo", "spec_schema", "__version__",
]
