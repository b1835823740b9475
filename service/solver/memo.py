"""A small cache for pure functions of a plant's matrices, keyed by the arrays' contents.

A plant is analysed the same way whatever its tuning: its steady-state gain, relative gain
array, open-loop poles and zeros depend on ``(A, B, C)`` alone.  A tuning sweep, a batch
refresh of one plant and a gateway that re-posts a request all design the same plant many
times, and a solver process lives for many requests; :func:`plant_cache` lets such a function
answer a plant it has seen from memory.

The key is each array's dtype, shape and a BLAKE2b digest of its bytes (exact contents:
changing any bit of any entry is another plant), plus the keyword arguments.  Cached results
are shared, so every ``ndarray`` in them is made read-only: a caller that tried to change one
in place would raise instead of corrupting the next answer.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import Any, ParamSpec, TypeVar

import numpy as np

__all__ = ["array_key", "clear_plant_caches", "plant_cache"]

P = ParamSpec("P")
R = TypeVar("R")

#: Plants each cached function keeps (least recently used dropped first).
PLANT_CACHE_SIZE = 16
#: The cache_clear of every cached function, for :func:`clear_plant_caches`.
_CLEARS: list[Callable[[], None]] = []


def clear_plant_caches() -> None:
    """Forget every plant of every cached function (benchmarks of fresh plants, tests)."""
    for clear in _CLEARS:
        clear()


def array_key(value: Any) -> Hashable:
    """A hashable key of ``value``: arrays by dtype, shape and a digest of their bytes."""
    if isinstance(value, np.ndarray):
        data = np.ascontiguousarray(value)
        return ("ndarray", data.dtype.str, data.shape, hashlib.blake2b(data.tobytes(), digest_size=16).digest())
    if isinstance(value, (list, tuple)):
        return (type(value).__name__, tuple(array_key(v) for v in value))
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    raise TypeError(f"no cache key for a {type(value).__name__}")


def _frozen(value: Any) -> Any:
    """Make every ndarray reachable through dataclass fields, tuples and lists read-only."""
    if isinstance(value, np.ndarray):
        value.flags.writeable = False
    elif dataclasses.is_dataclass(value) and not isinstance(value, type):
        for field in dataclasses.fields(value):
            _frozen(getattr(value, field.name))
    elif isinstance(value, (tuple, list)):
        for item in value:
            _frozen(item)
    return value


def plant_cache(function: Callable[P, R]) -> Callable[P, R]:
    """Cache ``function`` (pure, of arrays and plain values) on its arguments' contents.

    The wrapper has ``cache_clear()`` and ``cache_info()`` (hits, misses, size) for tests.
    """
    entries: OrderedDict[Hashable, Any] = OrderedDict()
    lock = threading.Lock()
    counts = {"hits": 0, "misses": 0}

    @functools.wraps(function)
    def cached(*args: P.args, **kwargs: P.kwargs) -> R:
        key = (
            tuple(array_key(np.asarray(a) if isinstance(a, list) else a) for a in args),
            tuple(sorted((k, array_key(v)) for k, v in kwargs.items())),
        )
        with lock:
            if key in entries:
                entries.move_to_end(key)
                counts["hits"] += 1
                result: R = entries[key]
                return result
            counts["misses"] += 1
        result = _frozen(function(*args, **kwargs))
        with lock:
            entries[key] = result
            while len(entries) > PLANT_CACHE_SIZE:
                entries.popitem(last=False)
        return result

    def cache_clear() -> None:
        with lock:
            entries.clear()
            counts.update(hits=0, misses=0)

    def cache_info() -> dict[str, int]:
        with lock:
            return {**counts, "size": len(entries)}

    _CLEARS.append(cache_clear)
    cached.cache_clear = cache_clear  # type: ignore[attr-defined]
    cached.cache_info = cache_info  # type: ignore[attr-defined]
    return cached
