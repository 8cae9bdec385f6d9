"""Let numba cache the ufunc ArviZ compiles when it is imported.

ArviZ compiles a numba ufunc with an explicit signature while being imported
(``arviz.stats.ecdf_utils``), which costs about half a second in every process
that imports PyMC. Importing ArviZ once with numba's ``vectorize`` caching to
disk turns that into a cache read after the first run. Where no cache folder
is writable, the ufunc is compiled as before.
"""
from __future__ import annotations

import sys


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
