"""Scattered input: the mesh only on the rank that read it, each other rank sent its part.

On the replicated path every rank is given the whole mesh and cuts its own
:class:`Part` from it (:func:`part_of`).  On the scattered path
(``solve_poisson(mesh)`` on rank 0, ``solve_poisson(None)`` elsewhere) rank 0
parses the problem once, partitions, and for each other rank in turn cuts
that rank's part, sends it (:func:`send_part`) and lets it go, keeping its
own for last; so rank 0 holds the whole mesh and problem plus one part at a
time, and every other rank only its part.  Callables are evaluated on rank 0
only, where they were given; nothing but numpy arrays travels.

A :class:`Part` is what a rank needs to go on exactly as on the replicated
path: its assembled local system (owned rows complete, ghost rows partial),
its prescribed points in local numbers, and its halo plan (global numbers of
its points, neighbours, where their values land, what it sends them).  It has
no mesh: the local matrix is built where the coefficients live.

The transfer is one small pickled header (names, dtypes, shapes and a few
integers) and then one buffer message (``Send``/``Recv``) per array: no copy
into a pickle on either side.  A failure on rank 0 while cutting a part is
sent to every rank still waiting (a None header) and then raised on every
rank (:func:`settle`).  Ranks waiting for rank 0 sleep between looks rather
than spin in MPI, so that with more ranks than cores rank 0 keeps a core.

:func:`input_status` and :func:`input_mode` decide, from what every rank was
given, which path a call takes, and refuse inconsistent input on every rank.
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np
import scipy.sparse as sp

from hatkernels.distributed.assembly import assemble_local, local_boundary_data
from hatkernels.distributed.outcome import _together
from hatkernels.distributed.subdomain import local_coefficient, subdomain
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh, index_dtype

__all__ = ["Part", "part_of", "local_boundary", "send_part", "recv_part", "scatter_parts",
           "part_arrays", "part_from_arrays", "on_root", "settle", "input_status", "input_mode",
           "SCATTER_TAG"]

#: Message tag of the parts' transfer (on the solver's own duplicated communicator).
SCATTER_TAG = 72


@dataclasses.dataclass(frozen=True, repr=False)
class Part:
    """One rank's share of the problem, without the mesh it was cut from.

    Attributes
    ----------
    points : ndarray, shape (n_local,)
        Global number of each local point: owned first (ascending), then the
        ghosts grouped by owner (as :class:`~hatkernels.distributed.Subdomain`).
    n_owned, n_cells : int
        Owned points; cells with at least one owned point.
    neighbours, recv_offsets, send
        The halo plan, as in :class:`~hatkernels.distributed.Subdomain`.
    A : scipy CSR, shape (n_local, n_local), or None
        The local matrix (owned rows complete); None once reduced.
    b : ndarray, shape (n_local,), or None
    fixed, values : ndarray
        Local numbers of the prescribed points this part has, and their values.
    """

    points: np.ndarray
    n_owned: int
    n_cells: int
    neighbours: np.ndarray
    recv_offsets: np.ndarray
    send: tuple
    A: sp.csr_matrix
    b: np.ndarray
    fixed: np.ndarray
    values: np.ndarray

    @property
    def n_ghosts(self):
        return len(self.points) - self.n_owned

    @property
    def owned(self):
        """Global numbers of the owned points, ascending."""
        return self.points[: self.n_owned]

    def reduced(self):
        """The part without its local system (what is left after the Dirichlet reduction)."""
        return dataclasses.replace(self, A=None, b=None)

    def __repr__(self):
        return (f"Part({self.n_owned} owned + {self.n_ghosts} ghost points, {self.n_cells} "
                f"cells, neighbours {self.neighbours.tolist()})")


def local_boundary(sub, problem):
    """This subdomain's part of the problem's flux and Robin sides, with their data."""
    n = problem.mesh.n_points
    neumann = robin = None
    if problem.flux is not None:
        neumann = local_boundary_data(sub, n, problem.flux.sides, problem.flux.flux,
                                      name="boundary load", sign="any")
    if problem.robin is not None:
        rb = problem.robin
        le, lr = local_boundary_data(sub, n, rb.sides, rb.r, name="boundary coefficient",
                                     sign="nonnegative")
        _, ls = local_boundary_data(sub, n, rb.sides, rb.s, name="boundary load", sign="any")
        robin = (le, lr, ls)
    return neumann, robin


def part_of(problem, split, part):
    """The :class:`Part` of ``part`` in ``split`` (a Partition of ``problem.mesh``).

    Cuts the subdomain, restricts the coefficients and boundary data to it and
    assembles its local system (:func:`~hatkernels.distributed.assemble_local`);
    the subdomain's local mesh is dropped.  Costs O(n_points + n_cells) of the
    whole mesh in work arrays, plus the part.

    Examples
    --------
    >>> from hatkernels.mesh import rectangle
    >>> from hatkernels.problem import PoissonProblem
    >>> from hatkernels.distributed import partition
    >>> mesh = rectangle(4, 4)
    >>> part_of(PoissonProblem(mesh, 1.0), partition(mesh, 2), 1)
    Part(13 owned + 6 ghost points, 22 cells, neighbours [0])
    """
    mesh = problem.mesh
    sub = subdomain(split, part)
    nb, rb = local_boundary(sub, problem)
    c = problem.reaction
    A, b, _ = assemble_local(
        sub, kappa=local_coefficient(problem.coefficient, sub),
        f=local_coefficient(problem.source, sub),
        reaction=None if c is None else local_coefficient(c, sub), neumann=nb, robin=rb,
        quadrature=problem.quadrature)
    held = problem.dirichlet
    loc = sub.local_numbers(held.points, mesh.n_points)
    here = loc >= 0
    return Part(points=sub.points, n_owned=sub.n_owned, n_cells=len(sub.cells),
                neighbours=sub.neighbours, recv_offsets=sub.recv_offsets, send=sub.send, A=A,
                b=b, fixed=loc[here], values=held.values[here])


# -- the transfer -------------------------------------------------------------------------


def part_arrays(part):
    """``(meta, arrays)``: the integers of a :class:`Part` and its arrays by name (no copies
    of contiguous arrays), inverted by :func:`part_from_arrays`."""
    n_local = len(part.points)
    A = part.A
    if A is None or A.shape != (n_local, n_local):
        raise InputError(f"a part to send needs its local matrix of shape ({n_local}, "
                         f"{n_local}), got {None if A is None else A.shape}")
    lengths = np.array([len(s) for s in part.send], dtype=np.int64)
    dt = part.send[0].dtype if part.send else index_dtype(n_local)
    sends = np.concatenate(part.send) if part.send else np.zeros(0, dtype=dt)
    arrays = {"points": part.points, "neighbours": part.neighbours,
              "recv_offsets": part.recv_offsets, "send": sends, "send_lengths": lengths,
              "A_data": A.data, "A_indices": A.indices, "A_indptr": A.indptr, "b": part.b,
              "fixed": part.fixed, "values": part.values}
    meta = {"n_owned": int(part.n_owned), "n_cells": int(part.n_cells)}
    return meta, {k: np.ascontiguousarray(v) for k, v in arrays.items()}


def part_from_arrays(meta, arrays):
    """The :class:`Part` of :func:`part_arrays`' output."""
    n_local = len(arrays["points"])
    A = sp.csr_matrix((arrays["A_data"], arrays["A_indices"], arrays["A_indptr"]),
                      shape=(n_local, n_local), copy=False)
    cuts = np.cumsum(arrays["send_lengths"])[:-1]
    send = tuple(np.split(arrays["send"], cuts)) if len(arrays["send_lengths"]) else ()
    return Part(points=arrays["points"], n_owned=int(meta["n_owned"]),
                n_cells=int(meta["n_cells"]), neighbours=arrays["neighbours"],
                recv_offsets=arrays["recv_offsets"], send=send, A=A, b=arrays["b"],
                fixed=arrays["fixed"], values=arrays["values"])


def send_part(comm, part, dest):
    """Send ``part`` (or None: rank 0 failed) to ``dest``: a header, then one buffer per array."""
    if part is None:
        comm.send(None, dest=dest, tag=SCATTER_TAG)
        return
    meta, arrays = part_arrays(part)
    header = {"meta": meta, "arrays": [(k, a.dtype.str, a.shape) for k, a in arrays.items()]}
    comm.send(header, dest=dest, tag=SCATTER_TAG)
    for a in arrays.values():
        if a.size:
            comm.Send(a, dest=dest, tag=SCATTER_TAG)


def recv_part(comm, source=0):
    """The :class:`Part` sent by :func:`send_part`, or None when the sender failed."""
    while not comm.Iprobe(source=source, tag=SCATTER_TAG):
        time.sleep(_NAP)  # not spinning: with more ranks than cores, rank 0 needs the core
    header = comm.recv(source=source, tag=SCATTER_TAG)
    if header is None:
        return None
    arrays = {}
    for name, dtype, shape in header["arrays"]:
        a = np.empty(shape, dtype=np.dtype(dtype))
        if a.size:
            comm.Recv(a, source=source, tag=SCATTER_TAG)
        arrays[name] = a
    return part_from_arrays(header["meta"], arrays)


#: Seconds a rank sleeps between looks while it waits for rank 0.
_NAP = 0.002


def settle(comm, what, value, failure):
    """After work done on rank 0 only: every rank waits for it (sleeping, not spinning), then
    ``failure`` (rank 0's exception or None) is raised on every rank, or ``value`` returned."""
    request = comm.Ibarrier()
    while not request.Test():
        time.sleep(_NAP)
    return _together(comm, what, _raise_or_return, value, failure)


def _raise_or_return(value, failure):
    if failure is not None:
        raise failure
    return value


def on_root(comm, what, fn, *args, **kwargs):
    """``fn(*args, **kwargs)`` on rank 0 (None elsewhere); a failure raises on every rank.

    The counterpart of :func:`~hatkernels.distributed.outcome._together` (same
    arguments) when only rank 0 has the data.
    """
    value = failure = None
    if comm.Get_rank() == 0:
        try:
            value = fn(*args, **kwargs)
        except Exception as exc:  # raised on every rank by settle
            failure = exc
    return settle(comm, what, value, failure)


def scatter_parts(comm, problem, split):
    """On rank 0: cut and send every other rank's part, one at a time; cut its own last.

    Returns ``(own part or None, failure or None)``.  After a failure the
    ranks not yet served get None, so no rank is left waiting here; the caller
    raises the failure on every rank (:func:`settle`).
    """
    failure = None
    for r in range(1, comm.Get_size()):
        part = None
        if failure is None:
            try:
                part = part_of(problem, split, r)
            except Exception as exc:  # raised on every rank by the caller
                failure = exc
        send_part(comm, part, r)
        del part  # rank 0 holds one other part at a time
    if failure is not None:
        return None, failure
    try:
        return part_of(problem, split, 0), None
    except Exception as exc:  # raised on every rank by the caller
        return None, exc


# -- which path a call takes ----------------------------------------------------------------

#: The options every rank must give alike (they decide the collective calls each rank makes).
AGREED = ("refine", "preconditioner", "coarse", "gather", "rtol", "atol", "maxiter")


def input_status(mesh, options):
    """What one rank was given, as plain data for an ``allgather``.

    ``options`` maps the names of :data:`AGREED` to this rank's values.  Returns
    ``(mesh kind, sizes and checksums, the options' repr by name, whether refine
    asks for refinement)``.
    """
    if mesh is None:
        given = ("no mesh",)
    elif isinstance(mesh, Mesh):
        given = ("mesh", int(mesh.n_points), int(mesh.n_cells), int(mesh.dim),
                 float(mesh.points.sum()), int(mesh.cells.sum(dtype=np.int64)))
    else:
        given = ("other", type(mesh).__name__)
    return given, {k: repr(options[k]) for k in AGREED}, _refining(options["refine"])


def _refining(refine):
    try:
        return bool(refine)
    except Exception:  # not a number at all: the refining path reports it
        return True


def _ranks(ranks):
    ranks = list(ranks)
    words = ", ".join(str(r) for r in ranks[:8]) + (", ..." if len(ranks) > 8 else "")
    return f"rank{'s' if len(ranks) > 1 else ''} {words}"


def _were(ranks):
    return f"{_ranks(ranks)} {'was' if len(ranks) == 1 else 'were'}"


def input_mode(seen):
    """``"replicated"`` or ``"scattered"`` from every rank's :func:`input_status` (rank order).

    Replicated: a mesh of the same size on every rank.  Scattered: a mesh on
    rank 0 and None on every other rank (with one rank, a mesh is replicated).
    Anything else is an InputError naming the ranks, raised alike on every
    rank since every rank decides from the same list.

    >>> one = input_status(None, dict.fromkeys(AGREED))
    >>> input_mode([(("mesh", 9, 8, 2, 4.5, 36), *one[1:]), one, one])
    'scattered'
    """
    given = [g for g, _, _ in seen]
    other = [r for r, g in enumerate(given) if g[0] == "other"]
    if other:
        raise InputError(f"expected a hatkernels.Mesh or None, got {given[other[0]][1]} on "
                         f"{_ranks(other)}")
    holders = [r for r, g in enumerate(given) if g[0] == "mesh"]
    size = len(given)
    if len(holders) == size:
        mode = "replicated"
        for r in holders:
            if given[r] != given[0]:
                (_, n, m, d, *_), (_, n0, m0, d0, *_) = given[r], given[0]
                same = " (other coordinates or cells)" if (n, m, d) == (n0, m0, d0) else ""
                raise InputError(f"rank {r} was given another mesh ({n} points, {m} cells in "
                                 f"{d}-D{same}) than rank 0 ({n0}, {m0} in {d0}-D): the "
                                 f"replicated input needs the same mesh on every rank (or "
                                 f"give it on rank 0 only and None elsewhere)")
    elif holders == [0]:
        mode = "scattered"
        refining = [r for r, (_, _, asks) in enumerate(seen) if asks]
        if refining:
            raise InputError(f"refine=k with the mesh on rank 0 only ({_ranks(refining)} asked "
                             f"for refine={seen[refining[0]][1]['refine']}): refining needs "
                             f"the mesh on every rank (each rank refines its part of the "
                             f"coarse mesh); give the coarse mesh on every rank, or refine it "
                             f"on rank 0 before the call")
    else:
        empty = [r for r in range(size) if r not in holders]
        if not holders:
            what = "rank 0 was given no mesh (None)" + (", nor was any other rank"
                                                        if size > 1 else "")
        else:
            what = (f"{_were([0] if 0 in empty else empty)} given no mesh (None) but "
                    f"{_were(holders)} given one")
        raise InputError(f"{what}: give the mesh on every rank (replicated input) or on rank 0 "
                         f"only and None elsewhere (scattered input)")
    for r, (_, opts, _) in enumerate(seen):
        differ = [k for k in AGREED if opts[k] != seen[0][1][k]]
        if differ:
            k = differ[0]
            raise InputError(f"rank {r} was called with {k}={opts[k]} but rank 0 with "
                             f"{k}={seen[0][1][k]}: every rank must pass the same solver "
                             f"options ({', '.join(AGREED)})")
    return mode
