"""How much memory a solve will take, checked before it allocates.

A problem whose mesh fits but whose solve does not used to run for a while
and then die of ``MemoryError`` in the middle of a phase (or be killed by the
operating system with no message at all).  :func:`check_solve_memory`
estimates the peak from per-point figures the benchmark suite measured and
refuses, with the estimate and what is available, before anything large is
allocated.

The figures are whole-solve peaks beyond the mesh, per point, on 2-D meshes
with int32 indices at about 10^6 unknowns (``peak B/point`` in
docs/performance.md); each preconditioner class carries its own as
``solve_bytes_per_point``.  Beyond 2^31 incidences the indices are int64 and
the index part of every array doubles: the estimate then grows by half.
"""

from __future__ import annotations

import os
import resource

from hatkernels.errors import InputError
from hatkernels.precond import PRECONDITIONERS, capabilities

__all__ = ["available_bytes", "solve_bytes", "check_solve_memory"]

#: A registered preconditioner that states no figure (a user's): the plain
#: assembled pipeline's (matrix, CG vectors, right-hand side), as a floor.
UNKNOWN_BYTES_PER_POINT = 400

#: The estimate's margin: measured peaks vary by a few per cent between runs
#: and meshes; refuse only when the estimate clearly does not fit.
MARGIN = 1.1


def _meminfo_available():
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def _address_space_left():
    soft, _ = resource.getrlimit(resource.RLIMIT_AS)
    if soft == resource.RLIM_INFINITY:
        return None
    try:
        with open("/proc/self/statm") as f:
            size = int(f.read().split()[0]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError):
        return None
    return max(soft - size, 0)


def available_bytes():
    """Memory this process can still take: the smaller of the system's available
    memory (``MemAvailable``) and what its address-space limit leaves; None when
    neither can be read (then nothing is refused)."""
    found = [v for v in (_meminfo_available(), _address_space_left()) if v is not None]
    return min(found) if found else None


def solve_bytes(mesh, preconditioner):
    """Estimated peak bytes of a ``solve_poisson`` on ``mesh`` beyond the mesh itself."""
    per_point = UNKNOWN_BYTES_PER_POINT
    if isinstance(preconditioner, str) and preconditioner in PRECONDITIONERS:
        per_point = capabilities(preconditioner).solve_bytes_per_point or per_point
    wide = mesh.cells.size >= 2**31 or mesh.cells.dtype.itemsize > 4
    return int(mesh.n_points * per_point * (1.5 if wide else 1.0))


def check_solve_memory(mesh, preconditioner, *, share=1.0):
    """Refuse (InputError) a solve whose estimated peak does not fit in what is available.

    ``share``: the part of the solve this process holds (over MPI, the ranks on
    this node over all ranks: they share the node's memory).
    """
    need = int(solve_bytes(mesh, preconditioner) * share)
    have = available_bytes()
    if have is not None and need * MARGIN > have:
        name = preconditioner if isinstance(preconditioner, str) else "the given preconditioner"
        raise InputError(
            f"not enough memory: solving on {mesh.n_points:,} points with {name} needs about "
            f"{need / 2**30:.1f} GiB beyond the mesh (measured per point), but "
            f"{have / 2**30:.1f} GiB are available; use a smaller mesh, a preconditioner "
            f"that needs less (see docs/performance.md), or pass memory_check=False "
            f"(--no-memory-check) to try anyway")
