"""``hatkernels info``: versions, threads and the numba cache, as text or JSON."""

from __future__ import annotations

import json
import os
import platform
import sys

import numba

from hatkernels.cli.cache import cache_info
from hatkernels.cli.common import OPTIONAL, PROG, one_line, versions

__all__ = ["run"]


def _threading_layer():
    try:
        return numba.threading_layer()
    except ValueError:
        pass
    try:  # start numba's thread pool without compiling anything
        from numba.np.ufunc import parallel

        parallel._launch_threads()
        return numba.threading_layer()
    except Exception as exc:
        return f"unknown ({one_line(exc)})"


def run(args, progress):
    """Run ``hatkernels info``; return the exit code."""
    found = versions()
    cache = cache_info()
    info = {
        "versions": found,
        "python_executable": sys.executable,
        "platform": platform.platform(),
        "cpu_count": os.cpu_count(),
        "numba_threads": numba.get_num_threads(),
        "numba_max_threads": numba.config.NUMBA_NUM_THREADS,
        "threading_layer": _threading_layer(),
        "numba_cache": cache,
    }
    if args.json:
        print(json.dumps(info, indent=2))
        return 0
    print(f"{PROG} {found['hatkernels']}")
    print(f"{'python':<18}{found['python']} ({sys.executable})")
    for name in ("numpy", "scipy", "numba", "pyamg", *OPTIONAL):
        v = found[name]
        if v is None:
            v = f"not installed (optional: pip install '{PROG}[{OPTIONAL[name]}]')"
        print(f"{name:<18}{v}")
    print(f"{'platform':<18}{info['platform']}, {info['cpu_count']} CPUs")
    print(f"{'numba threads':<18}{info['numba_threads']} of {info['numba_max_threads']} "
          f"(set NUMBA_NUM_THREADS or --threads), threading layer {info['threading_layer']}")
    if cache["path"]:
        state = "writable" if cache["writable"] else "NOT writable (kernels recompile every run)"
        counts = (f", {cache['kernels_cached']} of {cache['kernels_total']} kernels cached"
                  if cache["kernels_total"] is not None else "")
        print(f"{'numba cache':<18}{cache['path']} ({state}{counts})")
    else:
        print(f"{'numba cache':<18}unknown location")
    return 0
