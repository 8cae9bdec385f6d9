"""Start-up of the numeric stack: a real BLAS for PyTensor, and ArviZ's numba ufunc cached.

Imported (for its effect) at the top of every module that imports PyMC,
PyTensor or ArviZ, so that whichever of them comes first is configured:

* **BLAS.** PyTensor installed from PyPI often cannot find a BLAS to link its
  compiled matrix products against and falls back to slower code. If the user
  has not configured ``blas__ldflags`` and OpenBLAS's linkable library is
  present (for example Debian's ``libopenblas-dev``), use it. OpenBLAS (also
  NumPy's bundled copy) runs single-threaded unless ``OPENBLAS_NUM_THREADS`` is
  set: chains already run in parallel processes, and threads only add overhead
  to the small products of these models. Check the result with
  ``python -c "import hierwork.runtime, pytensor; print(pytensor.config.blas__ldflags)"``.
* **ArviZ's ufunc.** ArviZ compiles a numba ufunc with an explicit signature
  while being imported (``arviz.stats.ecdf_utils``), about half a second in
  every process. Importing ArviZ once with numba's ``vectorize`` caching to disk
  turns that into a cache read after the first run; where no cache folder is
  writable, the ufunc is compiled as before.
"""
from __future__ import annotations

import os
import sys
import sysconfig
from pathlib import Path

_SEARCH = ("/usr/lib/x86_64-linux-gnu", "/usr/lib/aarch64-linux-gnu", "/usr/lib64", "/usr/lib", "/usr/local/lib")


def find_openblas() -> Path | None:
    """The folder holding a linkable ``libopenblas.so``, if any."""
    folders = [sysconfig.get_config_var("LIBDIR") or "", *_SEARCH]
    for folder in folders:
        if folder and (Path(folder) / "libopenblas.so").exists():
            return Path(folder)
    return None


def configure_blas() -> str | None:
    """Add ``blas__ldflags`` to ``PYTENSOR_FLAGS`` when OpenBLAS is found; returns the flags set."""
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # small products: threads only add overhead
    flags = os.environ.get("PYTENSOR_FLAGS", "")
    if "blas__ldflags" in flags or "blas.ldflags" in flags:
        return None
    folder = find_openblas()
    if folder is None:
        return None
    added = f"blas__ldflags=-L{folder} -lopenblas"
    os.environ["PYTENSOR_FLAGS"] = f"{flags},{added}" if flags else added
    return added


def import_arviz_cached() -> None:
    """Import ArviZ (if not yet imported) with numba's ``vectorize`` caching compiled ufuncs."""
    if "arviz" in sys.modules:
        return
    try:
        import numba
    except ImportError:
        return
    original = numba.vectorize
    numba.vectorize = caching(original)
    try:
        import arviz  # noqa: F401
    finally:
        numba.vectorize = original


def caching(vectorize):
    """``vectorize`` with ``cache=True`` for the ``@vectorize(signatures)`` form, uncached if that fails."""
    def wrapper(*args, **kwargs):
        if args and callable(args[0]) or "cache" in kwargs:
            return vectorize(*args, **kwargs)
        cached = vectorize(*args, cache=True, **kwargs)

        def decorate(function):
            try:
                return cached(function)
            except RuntimeError:  # no writable cache location
                return vectorize(*args, **kwargs)(function)
        return decorate
    return wrapper


def _quiet() -> None:
    """Keep library chatter (import notices, sampler start-up lines) off the user's screen."""
    import logging
    import warnings

    warnings.filterwarnings("ignore", message=".*ArviZ is undergoing a major refactor.*")
    warnings.filterwarnings("ignore", message=".*could not link to a BLAS.*")
    for name in ("pymc", "pytensor", "arviz"):
        logging.getLogger(name).setLevel(logging.ERROR)


if "pytensor" not in sys.modules:
    configure_blas()
_quiet()
import_arviz_cached()
