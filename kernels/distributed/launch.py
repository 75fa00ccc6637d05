"""Where a distributed run stands: the MPI import, the launcher's environment, threads per rank.

mpi4py is imported here and only when a function needs it, so that
``import hatkernels`` (and ``import hatkernels.distributed``) works without it.
Importing mpi4py initialises MPI; that is deferred until a communicator is
actually asked for.
"""

from __future__ import annotations

import os

from hatkernels.checks import integer_option
from hatkernels.errors import InputError

__all__ = [
    "ENVIRONMENT_SIZES",
    "MPIUnavailable",
    "mpi",
    "world",
    "as_comm",
    "ranks_from_environment",
    "rank_from_environment",
    "cores_per_node",
    "default_threads",
]

#: Variables in which launchers give the number of ranks of the job, checked in this
#: order: MPICH's hydra and Intel MPI (``PMI_SIZE``), Open MPI
#: (``OMPI_COMM_WORLD_SIZE``), MVAPICH (``MV2_COMM_WORLD_SIZE``).
ENVIRONMENT_SIZES = ("PMI_SIZE", "OMPI_COMM_WORLD_SIZE", "MV2_COMM_WORLD_SIZE")
_ENVIRONMENT_RANKS = ("PMI_RANK", "OMPI_COMM_WORLD_RANK", "MV2_COMM_WORLD_RANK")

_INSTALL = ("pip install 'hatkernels[mpi]' (mpi4py and an MPI wheel), or build mpi4py "
            "against the system MPI (docs/distributed.md)")


class MPIUnavailable(ImportError):
    """mpi4py is not installed (or cannot load its MPI library)."""


def mpi():
    """The ``mpi4py.MPI`` module (imported on first use; initialises MPI)."""
    try:
        from mpi4py import MPI
    except ImportError as exc:
        raise MPIUnavailable(f"hatkernels.distributed needs mpi4py ({exc}); {_INSTALL}") from exc
    return MPI


def world():
    """``MPI.COMM_WORLD``."""
    return mpi().COMM_WORLD


def as_comm(comm):
    """``comm``, or ``MPI.COMM_WORLD`` for None; an InputError for anything else."""
    if comm is None:
        return world()
    MPI = mpi()
    if not isinstance(comm, MPI.Intracomm):
        raise InputError(f"comm must be an mpi4py intracommunicator (or None for "
                         f"COMM_WORLD), got {type(comm).__name__}")
    return comm


def _first_int(names, environ):
    for name in names:
        text = environ.get(name)
        if text is not None:
            try:
                return int(text)
            except ValueError:
                continue
    return None


def ranks_from_environment(environ=None):
    """Ranks in the job as the launcher announced them (1 when not under a launcher).

    Reads only environment variables (:data:`ENVIRONMENT_SIZES`), so it costs
    nothing and does not import mpi4py: the command uses it to decide whether
    to take the distributed path at all.
    """
    size = _first_int(ENVIRONMENT_SIZES, os.environ if environ is None else environ)
    return size if size is not None and size > 0 else 1


def rank_from_environment(environ=None):
    """This process's rank as the launcher announced it (0 when not under a launcher)."""
    rank = _first_int(_ENVIRONMENT_RANKS, os.environ if environ is None else environ)
    return rank if rank is not None and rank >= 0 else 0


def cores_per_node():
    """``(cores on the node, cores this process may run on)``, the second from its CPU affinity."""
    total = os.cpu_count() or 1
    try:
        mine = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        mine = total
    return total, min(mine, total)


def default_threads(comm, threads=None):
    """numba threads for this rank of ``comm``: ``(threads, ranks_on_this_node, how)``.

    ``threads`` given: that number (checked against numba's maximum).
    ``NUMBA_NUM_THREADS`` set: numba's thread count, the user's choice.
    Otherwise, when the launcher bound this rank to some of the cores, those
    cores; when it did not, ``max(1, cores_per_node // ranks_on_this_node)``
    with the ranks on the node counted by ``comm.Split_type(COMM_TYPE_SHARED)``;
    at most numba's maximum.  Either way the node is not oversubscribed by
    threads.  Collective over ``comm``.
    """
    import numba

    top = numba.config.NUMBA_NUM_THREADS
    MPI = mpi()
    node = comm.Split_type(MPI.COMM_TYPE_SHARED)
    try:
        local = node.Get_size()
    finally:
        node.Free()
    if threads is not None:
        try:
            threads = integer_option(threads, "threads", minimum=1, maximum=top)
        except InputError as exc:
            raise InputError(f"{exc} ({top} is numba's maximum here; set NUMBA_NUM_THREADS "
                             f"to allow more)") from None
        return threads, local, "given"
    if "NUMBA_NUM_THREADS" in os.environ:
        return numba.get_num_threads(), local, "NUMBA_NUM_THREADS"
    total, mine = cores_per_node()
    if mine < total:
        return max(1, min(top, mine)), local, f"{mine} cores bound to this rank"
    n = max(1, min(top, total // local))
    return n, local, f"{total} cores / {local} ranks on this node"
