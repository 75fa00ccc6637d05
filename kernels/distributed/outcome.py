"""What a distributed solve returns, the gathers of its solution, and the rule that makes a
failing step fail on every rank: shared by the replicated path
(:mod:`hatkernels.distributed.solve`) and the partitioned one
(:mod:`hatkernels.distributed.refined_solve`)."""

from __future__ import annotations

import dataclasses

import numpy as np

from hatkernels.distributed.launch import mpi
from hatkernels.errors import InputError
from hatkernels.poisson import PoissonSolution

__all__ = ["GATHER", "Distribution", "DistributedPoissonSolution"]

#: Values of ``gather``: the full solution on every rank, on rank 0 only, or nowhere.
GATHER = (True, "root", False)


@dataclasses.dataclass
class Distribution:
    """How a distributed solve was spread over the ranks (``SolveStats.distribution``).

    Attributes
    ----------
    partition : dict
        Method, weight and quality of the split (imbalance, cut sides...).
    balance : list of dict
        One per rank: owned points and unknowns, cells (``"cells"``; on
        triangle meshes also ``"triangles"``), ghosts, neighbours, stored
        entries and bytes, halo bytes and messages per product,
        communication counters and seconds, timings, peak memory.
    communication : dict
        Volumes per iteration of the busiest rank, seconds.
    threads_per_rank : dict
        ``threads``, ``ranks_on_node`` and ``chosen_by`` (how the count was chosen).
    path : str
        ``"partitioned"`` (each rank refined its part of the coarse mesh: refine=k with
        multigrid), ``"replicated"`` (every rank held the whole mesh) or ``"scattered"``
        (the mesh on rank 0 only, which sent each other rank its part).
    why : str
        Why the replicated path was taken when the partitioned one was the default
        (empty otherwise).
    """

    partition: dict
    balance: list
    communication: dict
    threads_per_rank: dict = None
    path: str = "replicated"
    why: str = ""


@dataclasses.dataclass(repr=False)
class DistributedPoissonSolution(PoissonSolution):
    """What the distributed :func:`solve_poisson` found, on one rank.

    Attributes
    ----------
    u : ndarray, shape (n_points,), or None
        Values at the points, where gathered (see ``gather``); None elsewhere.
    stats : SolveStats
        As serial (``timings`` are the maximum over ranks, ``unknowns``,
        ``nnz`` and ``stored_bytes`` global, ``peak_rss_bytes`` the largest
        rank's), with ``ranks`` and ``distribution`` (a :class:`Distribution`).
        The same on every rank.
    mesh : Mesh
        The whole mesh; None on ranks other than 0 with scattered input (and
        ``problem`` likewise).
    u_owned : ndarray
        Values at this rank's owned points.
    owned : ndarray
        Global numbers of those points (ascending).
    rank, size : int
    """

    u_owned: np.ndarray = None
    owned: np.ndarray = None
    rank: int = 0
    size: int = 1
    #: the partitioned path: ``(local mesh, point data, cell data)`` of this rank's own
    #: cells, for :func:`hatkernels.distributed.write_pvtu`; None on the replicated path
    piece: tuple = dataclasses.field(default=None, repr=False)
    #: the partitioned path: the balance of the whole body, summed over the ranks (the same
    #: on every rank): ``sources`` (``int f``), ``absorbed`` (``int c u``), the outflow
    #: (positive leaving the body) through the held sides, the flux sides and the
    #: convection sides, and the ``imbalance`` the solver left (``sources - absorbed -
    #: outflows``; about ``rtol`` times the load).  Defined as in
    #: :func:`hatkernels.results.balance`, totals only.  None on the replicated path.
    flows: dict = dataclasses.field(default=None, repr=False)

    def __repr__(self):
        s = self.stats
        return (f"DistributedPoissonSolution(rank {self.rank} of {self.size}, "
                f"{s.unknowns} unknowns, {s.iterations} iterations, "
                f"converged={s.converged}, {s.timings['total']:.3g} s)")


def _together(comm, what, fn, *args, **kwargs):
    """Run a local step on every rank; if it fails anywhere, raise on every rank.

    The failing rank re-raises its own exception; the others raise the same
    type (InputError for bad input, RuntimeError otherwise) naming the rank.
    Costs one small ``allgather`` (setup only).
    """
    try:
        value, failure = fn(*args, **kwargs), None
    except Exception as exc:  # re-raised below, on every rank
        value, failure = None, exc
    note = None if failure is None else (isinstance(failure, InputError),
                                         f"{type(failure).__name__}: {failure}")
    notes = comm.allgather(note)
    bad = [(r, n) for r, n in enumerate(notes) if n is not None]
    if bad:
        if failure is not None:
            raise failure
        r, (is_input, text) = bad[0]
        cls = InputError if is_input else RuntimeError
        raise cls(f"{what} failed on rank {r}: {text}")
    return value


def _per(balance, counter, iterations):
    """A solve-phase counter of the busiest rank, per iteration (setup excluded)."""
    return max(b["communication"][counter] for b in balance) / iterations


def gather_in_order(comm, counts, order, n, u_owned, gather, scattered):
    """The whole solution in the mesh's numbering, where ``gather`` asks for it.

    ``order`` (the partition's gather order) is None on the ranks without the
    mesh (scattered input): there rank 0 puts the values in place and, for
    ``gather=True``, broadcasts them.
    """
    if gather is False:
        return None
    MPI = mpi()
    counts = np.asarray(counts, dtype=np.int64)
    displs = np.concatenate([[0], np.cumsum(counts)[:-1]])
    if gather is True and not scattered:
        buf = np.empty(n)
        comm.Allgatherv([u_owned, MPI.DOUBLE], [buf, (counts, displs), MPI.DOUBLE])
        u = np.empty(n)
        u[order] = buf
        return u
    root = comm.Get_rank() == 0
    buf = np.empty(n) if root else None
    comm.Gatherv([u_owned, MPI.DOUBLE],
                 [buf, (counts, displs), MPI.DOUBLE] if root else None, root=0)
    u = None
    if root:
        u = np.empty(n)
        u[order] = buf
        del buf
    if gather is True:
        u = np.empty(n) if u is None else u
        comm.Bcast([u, MPI.DOUBLE], root=0)
    return u


def gather_by_ids(comm, owned, u_owned, n, gather):
    """The whole solution in the serial numbering on every rank (True), rank 0 ("root")
    or none (False)."""
    if gather is False:
        return None
    MPI = mpi()
    counts = np.array(comm.allgather(len(owned)), dtype=np.int64)
    displs = np.concatenate([[0], np.cumsum(counts)[:-1]])
    root_only = gather != True  # noqa: E712  ("root")
    ids = np.empty(n, dtype=np.int64) if not root_only or comm.Get_rank() == 0 else None
    vals = np.empty(n) if ids is not None else None
    if root_only:
        comm.Gatherv([owned.astype(np.int64), MPI.INT64_T],
                     [ids, (counts, displs), MPI.INT64_T] if ids is not None else None, root=0)
        comm.Gatherv([u_owned, MPI.DOUBLE],
                     [vals, (counts, displs), MPI.DOUBLE] if vals is not None else None, root=0)
    else:
        comm.Allgatherv([owned.astype(np.int64), MPI.INT64_T],
                        [ids, (counts, displs), MPI.INT64_T])
        comm.Allgatherv([u_owned, MPI.DOUBLE], [vals, (counts, displs), MPI.DOUBLE])
    if ids is None:
        return None
    u = np.empty(n)
    u[ids] = vals
    return u
