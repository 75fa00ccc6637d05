"""The numba cache of the library's kernels: how many are compiled on disk, and where.

The counts read numba's cache index, which is not a public API: every
function here answers None (unknown) rather than fail when numba changes.
"""

from __future__ import annotations

import importlib
import os
import pkgutil

__all__ = ["kernel_cache_state", "cache_info"]


def _dispatchers():
    """The numba dispatchers of the library's kernel modules (imported, not compiled)."""
    import numba.core.registry

    import hatkernels._jit as jit

    found = []
    for info in pkgutil.iter_modules(jit.__path__):
        module = importlib.import_module(f"hatkernels._jit.{info.name}")
        for obj in vars(module).values():
            if isinstance(obj, numba.core.registry.CPUDispatcher) and obj not in found:
                found.append(obj)
    return found


def kernel_cache_state():
    """How many of the library's kernels have a fresh on-disk cache entry.

    Returns ``{"cached": k, "total": n, "path": dir}``, or None when this
    numba's cache cannot be inspected (callers fall back to timing the first
    call).
    """
    try:
        found = _dispatchers()
        cached = sum(1 for d in found if d._cache._cache_file._load_index())
        path = found[0]._cache.cache_path if found else None
        return {"cached": cached, "total": len(found), "path": path}
    except Exception:  # any change in numba's internals: say "unknown"
        return None


def cache_info():
    """Where the kernels are cached, whether that place is writable, and how many are there."""
    import numba

    from hatkernels._jit import caching_enabled

    state = kernel_cache_state()
    path = state["path"] if state else (numba.config.CACHE_DIR or None)
    if path:
        probe = path
        while not os.path.exists(probe) and os.path.dirname(probe) != probe:
            probe = os.path.dirname(probe)
        writable = os.access(probe, os.W_OK)
    else:
        writable = None
    return {
        "path": path,
        "writable": writable,
        "NUMBA_CACHE_DIR": os.environ.get("NUMBA_CACHE_DIR"),
        "kernels_cached": state["cached"] if state else None,
        "kernels_total": state["total"] if state else None,
        "caching_enabled": caching_enabled(),
    }
