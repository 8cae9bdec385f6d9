"""The import-time numba cache for ArviZ's ufunc (hierwork/jitcache.py)."""
from __future__ import annotations

import numba
import numpy as np

import hierwork  # noqa: F401  (imports ArviZ through the cache)
from hierwork.runtime import caching


def test_numba_vectorize_is_restored_after_import():
    from numba.np.ufunc import decorators

    assert numba.vectorize is decorators.vectorize


def test_cached_ufunc_computes_and_falls_back_without_a_cache_location():
    seen = []

    def fake_vectorize(*args, cache=False, **kwargs):
        seen.append(cache)

        def decorate(function):
            if cache:
                raise RuntimeError("cannot cache function: no locator available")
            return numba.vectorize(*args, **kwargs)(function)
        return decorate

    square = caching(fake_vectorize)(["float64(float64)"])(lambda x: x * x)
    np.testing.assert_array_equal(square(np.array([1.0, 3.0])), [1.0, 9.0])
    assert seen == [True, False]
