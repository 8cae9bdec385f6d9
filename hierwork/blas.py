"""Point PyTensor at a real BLAS when one is installed.

PyTensor installed from PyPI often cannot find a BLAS to link its compiled
matrix products against and falls back to slower code. If the user has not
configured ``blas__ldflags`` and OpenBLAS's linkable library is present (for
example Debian's ``libopenblas-dev``), use it. Either way OpenBLAS
(also NumPy's bundled copy) runs single-threaded unless the user set
``OPENBLAS_NUM_THREADS``: chains already run in parallel processes, and threads
only add overhead to the small products of these models. Must run before PyTensor is
imported. Check the result with
``python -c "import hierwork, pytensor; print(pytensor.config.blas__ldflags)"``.
"""
from __future__ import annotations

import os
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


def configure() -> str | None:
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
