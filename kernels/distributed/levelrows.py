"""The operator of one refined level on one rank: its owned rows, matrix-free or assembled.

A rank's part of a level (:class:`~hatkernels.distributed.refined.LevelPart`)
holds every cell touching a point it owns, so a product over its local mesh
is exact on the owned rows; the ghost rows miss the other ranks' cells and
are dropped.  Both classes give the owned rows of the stiffness matrix with
identity rows and zero columns at the held points (what :func:`_masked_rows`
builds), the smoother's inverse diagonal and Gershgorin's bound of ``D^-1 A``
over the free owned rows, and the protocol of the CG loop
(:mod:`hatkernels._cg`: ``matvec_dot``, ``residual``, ``n_local``) and of the
multigrid levels (``matvec_into(p, out)`` with ``p`` local, its ghosts
refreshed by the halo exchange, ``out`` owned):

:class:`MatrixFreeRows`
    the serial matrix-free operator (:class:`~hatkernels.StiffnessOperator`:
    its variants and kernels) on the local mesh, into a local vector of
    which the owned part is kept.  The diagonal and the bound come from the
    edge weights (each edge's element entries summed: the assembled
    off-diagonal ``K_ij``, so the bound is the assembled rows' to round-off,
    not the larger one of the element entries' absolute values), computed
    once at setup.  Stores the variant's data (on triangles, by default,
    the colouring only), one local vector and the inverse diagonal.
:class:`AssembledRows`
    the owned rows assembled and split at the owned/ghost columns, for
    comparison and for a local mesh whose cells the matrix-free kernels
    cannot colour (more than 64 colours).

:func:`level_operator` picks one; the halo (a
:class:`~hatkernels.distributed.halo.Halo`, preallocated buffers) is given,
so the classes need no communicator of their own; :func:`agree_bounds` takes
the global maximum of the ranks' bounds (one ``Allreduce`` for all levels).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from hatkernels._jit import operators as _jit_ops
from hatkernels._jit import operators3d as _jit3
from hatkernels._jit import sparse as _k
from hatkernels.assembly import assemble_stiffness
from hatkernels.distributed.launch import mpi
from hatkernels.distributed.matrix import DistributedMatrix, _arrays, split_columns
from hatkernels.errors import InputError
from hatkernels.mesh.colouring import triangle_colouring
from hatkernels.operators import DEFAULT_BLOCK, VARIANTS, StiffnessOperator
from hatkernels.operators.blocks import EdgeRows

__all__ = ["MatrixFreeRows", "AssembledRows", "level_operator", "agree_bounds",
           "check_variant", "describe_kinds"]

#: Why a level is assembled although matrix-free levels were asked for.
TOO_MANY_COLOURS = "its cells need more than 64 colours"


def _masked_rows(A, n_owned, fixed):
    """Owned rows of ``A`` (local CSR) with identity rows and zero columns at ``fixed``
    (a local bool mask); and Gershgorin's bound of ``D^-1 A`` over the free owned rows,
    from the unmasked rows (as the serial operator's bound)."""
    rows = sp.csr_matrix(A[:n_owned])
    rows.sort_indices()
    diag = rows.diagonal().copy()
    absum = np.asarray(abs(rows).sum(axis=1)).ravel()
    free = ~fixed[:n_owned]
    ratio = absum[free] / diag[free]
    local_bound = float(ratio.max(initial=1.0))
    coo = rows.tocoo()
    keep = ~fixed[coo.col] & ~fixed[coo.row]
    r, c, v = coo.row[keep], coo.col[keep], coo.data[keep]
    held = np.flatnonzero(fixed[:n_owned])
    r = np.concatenate([r, held])
    c = np.concatenate([c, held])
    v = np.concatenate([v, np.ones(len(held))])
    out = sp.csr_matrix((v, (r, c)), shape=rows.shape)
    out.sort_indices()
    diag[held] = 1.0
    return out, diag, local_bound


def check_variant(variant):
    """``variant`` if it names a matrix-free variant (or is None), else an InputError."""
    if variant is not None and variant not in VARIANTS:
        raise InputError(f"unknown matrix-free variant {variant!r}; choose one of {VARIANTS}")
    return variant


def _edge_weights(op):
    """``(first, ends, weights)`` of the unique edges of ``op``'s mesh, ``first < ends``;
    each weight the sum of the edge's element entries, i.e. ``K_ij``.

    The ``edges`` variants store them; for the others they are computed here by the
    variants' own kernels (a transient: the mesh's edge arrays are forgotten again).
    """
    impl, mesh = op._impl, op.mesh
    n = mesh.n_points
    if isinstance(impl, EdgeRows):
        starts, ends, w = impl.starts, impl.ends, impl.weights
    elif mesh.dim == 3:
        starts = np.empty(n + 1, dtype=np.int64)
        ends = _jit3.edge_rows(mesh.cells, n, starts)
        w = np.empty(len(ends))
        _jit3.edge_weights(mesh.points, mesh.cells, *impl.coefficient, *impl.colouring, starts,
                           ends, w)
    else:
        had = mesh.cached()
        edges = mesh.edges()
        w = np.empty(len(edges))
        _jit_ops.edge_weights(mesh.points, mesh.triangles, *impl.coefficient,
                              *impl.colouring, mesh.triangle_edges(), w)
        mesh.forget(*(mesh.cached() - had))
        return edges[:, 0], edges[:, 1], w
    first = np.repeat(np.arange(n, dtype=ends.dtype), np.diff(starts))
    return first, ends, w


def _rows_from_edges(first, ends, w, n_owned, fixed):
    """``(diagonal, local bound)`` of the masked owned rows from the edge weights.

    Zero row sums give ``K_ii = -sum_j K_ij``; ``sum_j |K_ij|`` over the unmasked row
    gives Gershgorin's bound over the free rows; held rows get 1 on the diagonal.
    """
    n = len(fixed)
    s = np.bincount(first, w, n)[:n_owned]
    s += np.bincount(ends, w, n)[:n_owned]
    diag = np.negative(s, out=s)
    a = np.abs(w)
    off = np.bincount(first, a, n)[:n_owned]
    off += np.bincount(ends, a, n)[:n_owned]
    del a
    held = fixed[:n_owned]
    free = ~held
    ratio = (diag[free] + off[free]) / diag[free]
    bound = float(ratio.max(initial=1.0))
    diag[held] = 1.0
    return diag, bound


class _OwnedRows:
    """What both kinds share: sizes, the halo, and the CG loop's products over
    ``matvec_into``."""

    #: ``"matrix-free (<variant>)"`` or ``"assembled"`` with the reason, if any.
    kind = None
    #: Stored matrix entries (as :attr:`hatkernels.SolveStats.nnz`).
    nnz = 0

    def __init__(self, n_owned, n_local, halo):
        self.n_owned, self.n_local = int(n_owned), int(n_local)
        self.halo = halo
        self.comm, self.stats = halo.comm, halo.stats
        #: Gershgorin's bound over this rank's free owned rows; ``bound`` is the
        #: maximum over the ranks (:func:`agree_bounds`).
        self.local_bound = 1.0
        self.bound = None
        self._work = None

    def matvec_dot(self, p, out):
        """``out = A p`` (``p`` local, ghosts refreshed here); this rank's part of
        ``p . A p``."""
        self.matvec_into(p, out)
        return _k.dot(p[: self.n_owned], out)

    #: ``out = b - A x`` for owned ``x``: the distributed matrix's, over ``matvec_into``
    residual = DistributedMatrix.residual


class MatrixFreeRows(_OwnedRows):
    """The owned rows of a level's masked stiffness matrix, never assembled (``nnz``, the
    stored entries, is 0).

    Parameters
    ----------
    mesh : Mesh
        The rank's local mesh of the level (owned points first, then the ghosts).
    n_owned : int
    fixed : ndarray of bool, shape (mesh.n_points,)
        Held points, owned and ghost.
    coefficient : Coefficient or None
        On the local mesh's cells (any kind the serial operator takes).
    halo : Halo
        Refreshes a local vector's ghosts (start/finish/exchange, comm, stats).
    quadrature, variant, block_size
        As :class:`~hatkernels.StiffnessOperator` (default variant: its default).

    The cells must need at most 64 colours (the serial operator would warn and run on
    one thread; :func:`level_operator` assembles the rows instead).
    """

    def __init__(self, mesh, n_owned, fixed, coefficient, halo, *, quadrature=2, variant=None,
                 block_size=DEFAULT_BLOCK):
        super().__init__(n_owned, mesh.n_points, halo)
        self.operator = StiffnessOperator(mesh, coefficient, variant=variant,
                                          dirichlet=np.flatnonzero(fixed),
                                          quadrature=quadrature, block_size=block_size)
        self.kind = f"matrix-free ({self.operator.variant})"
        diag, self.local_bound = _rows_from_edges(*_edge_weights(self.operator),
                                                  self.n_owned, fixed)
        self.inverse_diagonal = np.reciprocal(diag, out=diag)
        self._out = np.empty(self.n_local)

    @property
    def nbytes(self):
        """Bytes held beyond the local mesh: the variant's data, the masks, the
        inverse diagonal and the local output vector."""
        return int(self.operator.nbytes + self.inverse_diagonal.nbytes + self._out.nbytes)

    def matvec_into(self, p, out):
        """``out = A p`` on the owned rows; ``p`` is local, its ghosts refreshed here."""
        self.halo.exchange(p)
        self.operator.matvec_into(p, self._out)
        out[:] = self._out[: self.n_owned]

    def unmasked_product(self, x):
        """``K x`` with the plain local stiffness matrix (no identity rows), a new local
        vector: exact on the owned rows, and, ``K`` being symmetric, the column sums
        ``sum_i K_ij x_i`` over owned rows ``i`` when ``x`` is zero on the ghosts.
        No halo exchange: ``x``'s ghosts are used as given."""
        return self.operator.unmasked_matvec(x)


class AssembledRows(_OwnedRows):
    """The owned rows of a level's masked stiffness matrix, assembled (parameters as
    :class:`MatrixFreeRows`; ``reason`` says why, if matrix-free levels were asked for)."""

    def __init__(self, mesh, n_owned, fixed, coefficient, halo, *, quadrature=2, reason=""):
        super().__init__(n_owned, mesh.n_points, halo)
        self.kind = "assembled" + (f" ({reason})" if reason else "")
        self._mesh, self._coefficient, self._quadrature = mesh, coefficient, quadrature
        A = assemble_stiffness(mesh, coefficient, quadrature=quadrature)
        rows, diag, self.local_bound = _masked_rows(A, self.n_owned, fixed)
        del A
        self.nnz = int(rows.nnz)
        self.A_oo, self.A_og = split_columns(rows, self.n_owned)
        del rows
        self._oo = _arrays(self.A_oo)
        self._og = _arrays(self.A_og) if self.n_local > self.n_owned else None
        self.inverse_diagonal = np.reciprocal(diag, out=diag)

    @property
    def nbytes(self):
        """Bytes of the stored rows and the inverse diagonal."""
        own = sum(a.nbytes for a in self._oo) + self.inverse_diagonal.nbytes
        return int(own + (sum(a.nbytes for a in self._og) if self._og else 0))

    #: ``out = A p``: the distributed matrix's product of the same split rows (the owned
    #: columns' part while the ghosts travel)
    matvec_into = DistributedMatrix.matvec_into

    def unmasked_product(self, x):
        """As :meth:`MatrixFreeRows.unmasked_product`, from a transient assembly."""
        return assemble_stiffness(self._mesh, self._coefficient, quadrature=self._quadrature) @ x


def level_operator(part, coefficient, fixed, halo, *, quadrature=2, matrix_free=True,
                   variant=None, block_size=DEFAULT_BLOCK):
    """The owned rows of a level: :class:`MatrixFreeRows` when ``matrix_free`` and the
    local cells can be coloured for the kernels, else :class:`AssembledRows` (its
    ``kind`` says why).  Local: no communication (see :func:`agree_bounds`)."""
    args = (part.mesh, part.n_owned, fixed, coefficient, halo)
    if not matrix_free:
        return AssembledRows(*args, quadrature=quadrature)
    variant = check_variant(variant)
    # the serial operator would warn and run on one thread: here the level is
    # assembled instead (the same rows, in parallel)
    if triangle_colouring(part.mesh.cells, part.mesh.n_points, block_size) is not None:
        try:
            return MatrixFreeRows(*args, quadrature=quadrature, variant=variant,
                                  block_size=block_size)
        except InputError as exc:  # the edges variant's rows need > 64 colours
            if "colour" not in str(exc):
                raise
    return AssembledRows(*args, quadrature=quadrature, reason=TOO_MANY_COLOURS)


def describe_kinds(kinds):
    """The level operators' kinds (``kinds[rank][level]``) in a few words."""
    found = {}
    for per_rank in kinds:
        for j, kind in enumerate(per_rank):
            found.setdefault(kind, set()).add(j + 1)
    if len(found) == 1:
        return f"level operators {next(iter(found))}"
    return "level operators " + ", ".join(
        f"{kind} on level{'s' if len(js) > 1 else ''} {', '.join(map(str, sorted(js)))}"
        + ("" if all(k[j - 1] == kind for k in kinds for j in js) else " (some ranks)")
        for kind, js in found.items())


def agree_bounds(operators, comm):
    """Set each operator's ``bound`` to the maximum of its ``local_bound`` over the ranks
    (one ``Allreduce`` for all; collective, the same number of operators on every rank)."""
    MPI = mpi()
    buf = np.array([op.local_bound for op in operators], dtype=np.float64)
    if buf.size:
        comm.Allreduce(MPI.IN_PLACE, [buf, MPI.DOUBLE], op=MPI.MAX)
    for op, b in zip(operators, buf, strict=True):
        op.bound = float(b)
