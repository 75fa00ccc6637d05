"""Partitioned assembly and solve over MPI ranks (mpi4py, imported only when needed).

``import hatkernels.distributed`` works without mpi4py: partitioning,
subdomains, local assembly and the halo patterns are plain NumPy; only the
exchange, the distributed CG and :func:`solve_poisson` need MPI.

>>> from hatkernels.mesh import rectangle
>>> from hatkernels.distributed import partition
>>> partition(rectangle(8, 8), 2).counts().tolist()
[40, 41]

Run a distributed solve with ``mpiexec -n P python script.py`` where the
script calls :func:`solve_poisson` (the serial arguments plus ``comm``,
``coarse``, ``partition``, ``gather``, ``threads``), or with
``mpiexec -n P hatkernels solve``.  Three paths (``stats.distribution.path``):

- ``"partitioned"``: ``refine=k`` with the default preconditioner (or
  ``"gmg"``): each rank refines only its part of the coarse mesh and the
  multigrid runs across the ranks, with the serial iteration counts;
  :func:`write_pvtu` writes each rank's piece;
- ``"scattered"``: the mesh on rank 0 only (None elsewhere): rank 0 sends
  each rank its part;
- ``"replicated"``: the same mesh on every rank.

See docs/distributed.md.
"""

from hatkernels.distributed.assembly import LocalSystem, assemble_local, reduce_local
from hatkernels.distributed.halo import CommStats, HaloPattern
from hatkernels.distributed.launch import MPIUnavailable, ranks_from_environment
from hatkernels.distributed.partition import (
    METHODS,
    WEIGHTS,
    Partition,
    PartitionQuality,
    partition,
    partition_from_owner,
)
from hatkernels.distributed.precond import COARSE_SPACES
from hatkernels.distributed.pvtu import write_pvtu
from hatkernels.distributed.solve import GATHER, DistributedPoissonSolution, solve_poisson
from hatkernels.distributed.subdomain import Subdomain, local_coefficient, subdomain

__all__ = [
    "COARSE_SPACES",
    "GATHER",
    "METHODS",
    "WEIGHTS",
    "CommStats",
    "DistributedPoissonSolution",
    "HaloPattern",
    "LocalSystem",
    "MPIUnavailable",
    "Partition",
    "PartitionQuality",
    "Subdomain",
    "assemble_local",
    "local_coefficient",
    "partition",
    "partition_from_owner",
    "ranks_from_environment",
    "reduce_local",
    "solve_poisson",
    "subdomain",
    "write_pvtu",
]
