"""Per-rank assembly: each rank builds its owned rows on its local mesh, then reduces Dirichlet points.

:func:`assemble_local` runs the serial ``csr`` assembly
(:class:`~hatkernels.StiffnessAssembler`) and the load, mass and boundary
terms on a :class:`~hatkernels.distributed.Subdomain`'s local mesh, of
triangles or tetrahedra.  Its owned rows are complete (every cell touching an
owned point is local) and
equal, entry for entry and bit for bit, to the rows of the whole mesh's
matrix; the ghost rows are partial and only ever dropped.  Boundary data live on
sides: edges of triangles, faces of tetrahedra (:func:`local_boundary_data`).

:func:`reduce_local` applies :func:`hatkernels.apply_dirichlet` to the local
system: prescribed points leave the unknowns and their values move to the
right-hand side (lifting, ``b_f - A_fd g``); ghosts that are prescribed are
known on every rank that has them, so no communication is needed.  What is
kept is a :class:`LocalSystem`: the owned free rows, with columns numbered
owned free unknowns first, then free ghosts grouped by owner, and the halo
pattern restricted to the free unknowns.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.sparse as sp

from hatkernels.assembly import (
    StiffnessAssembler,
    assemble_boundary_load,
    assemble_boundary_mass,
    assemble_load,
)
from hatkernels.boundary import apply_dirichlet
from hatkernels.coefficients import Coefficient, per_edge, per_point
from hatkernels.distributed.halo import HaloPattern
from hatkernels.distributed.subdomain import _LocalCallable
from hatkernels.errors import InputError

__all__ = ["LocalSystem", "assemble_local", "reduce_local", "owned_rows", "rows_in_global",
           "local_boundary_data"]


def owned_rows(A, n_owned):
    """The first ``n_owned`` rows of a CSR matrix, sharing its arrays (no copy)."""
    nnz = int(A.indptr[n_owned])
    R = sp.csr_matrix((A.data[:nnz], A.indices[:nnz], A.indptr[: n_owned + 1]),
                      shape=(n_owned, A.shape[1]), copy=False)
    R.has_sorted_indices = A.has_sorted_indices
    return R


def rows_in_global(A_rows, columns, n):
    """Rows with local columns renumbered to global ones (``columns[local]``), as canonical CSR.

    For checks: the owned rows of a subdomain against the whole mesh's matrix.
    """
    C = sp.csr_matrix((A_rows.data, np.asarray(columns)[A_rows.indices], A_rows.indptr),
                      shape=(A_rows.shape[0], n))
    C.sort_indices()
    return C


def local_boundary_data(sub, n_points, edges, value, *, name, sign):
    """Boundary sides and data of the whole mesh restricted to the sides touching owned points.

    ``edges`` global sides: (E, 2) edges of triangles or (E, 3) faces of
    tetrahedra; ``value`` a Coefficient from ``parse_edge_coefficient`` on the
    whole mesh with these sides.  Returns ``(local_sides, local_value)`` ready
    for the boundary-term functions on ``sub.mesh`` (the sides keep their
    relative order, so sums keep their order).  A boundary side with an owned
    point belongs to one cell, which has that point, so it is a side of the
    local mesh.
    """
    local = sub.local_numbers(np.arange(n_points), n_points)
    e = np.asarray(edges, dtype=np.int64)
    owned = np.zeros(n_points, dtype=bool)
    owned[sub.owned] = True
    sel = owned[e].any(axis=1) if e.size else np.zeros(0, dtype=bool)
    le = local[e[sel]]
    kind, v = value.kind, value.value
    if kind == "constant":
        lv = v
    elif kind == "point":
        lv = per_point(v[sub.points])
    elif kind == "edge":
        lv = per_edge(np.asarray(v)[sel])
    elif kind == "callable":
        lv = _LocalCallable(kind, v, name, sign, side_map=np.flatnonzero(sel))
    else:
        raise InputError(f"{name}: unexpected kind {kind!r} for boundary data")
    return le, lv


def assemble_local(sub, *, kappa, f, reaction=None, neumann=None, robin=None, quadrature=2):
    """Matrix and right-hand side on the local mesh of ``sub``; owned rows complete.

    Parameters
    ----------
    sub : Subdomain
    kappa, f, reaction : Coefficient
        Restricted to ``sub`` (:func:`~hatkernels.distributed.subdomain.local_coefficient`).
    neumann : ``(local_sides, h)``, optional
    robin : ``(local_sides, r, s)``, optional
        From :func:`local_boundary_data` (edges in 2-D, faces in 3-D).

    Returns
    -------
    A : scipy CSR, shape (n_local, n_local)
    b : ndarray, shape (n_local,)
    has_robin : bool
        A positive Robin coefficient on some local side.

    The terms are added in the order of :func:`hatkernels.poisson.solve_poisson`,
    so the owned entries have the same bits as the serial ones.
    """
    m = sub.mesh
    for c, what in ((kappa, "kappa"), (f, "f")):
        if not isinstance(c, Coefficient):
            raise InputError(f"assemble_local: {what} must be a restricted Coefficient")
    b = np.zeros(m.n_points)
    if neumann is not None:
        edges, h = neumann
        b += assemble_boundary_load(m, h, edges, quadrature=quadrature)
    R = None
    has_robin = False
    if robin is not None:
        edges, r, s = robin
        R = assemble_boundary_mass(m, r, edges, quadrature=quadrature)
        has_robin = bool(R.nnz > 0 and R.max() > 0)
        b += assemble_boundary_load(m, s, edges, quadrature=quadrature)
    b += assemble_load(m, f, quadrature=quadrature)
    # row by row in mesh order: each owned row then has the bits of the serial assembly
    assembler = StiffnessAssembler(m, by_rows=m.dim == 2)
    A = assembler.assemble(kappa, quadrature=quadrature)
    if reaction is not None:
        A = A + assembler.assemble_mass(reaction, quadrature=quadrature)
    if R is not None:
        A = A + R
    return A, b, has_robin


@dataclasses.dataclass(frozen=True, repr=False)
class LocalSystem:
    """One rank's share of the reduced system ``A_ff u_f = b_f``.

    Attributes
    ----------
    A : scipy CSR, shape (n_owned_free, n_owned_free + n_ghost_free)
        The owned free rows; columns: owned free unknowns, then free ghosts.
    b : ndarray, shape (n_owned_free,)
        Right-hand side with the prescribed values lifted.
    pattern : HaloPattern
        The halo of the free unknowns.
    free_points : ndarray
        Global point number of each local unknown (owned first, then ghosts).
    owned_free : ndarray
        Position among the owned points of each owned unknown.
    owned_fixed, owned_values : ndarray
        Positions among the owned points of the prescribed ones, and their values.
    n_owned : int
        Owned points (free, prescribed and isolated).
    """

    A: sp.csr_matrix
    b: np.ndarray
    pattern: HaloPattern
    free_points: np.ndarray
    owned_free: np.ndarray
    owned_fixed: np.ndarray
    owned_values: np.ndarray
    n_owned: int

    @property
    def n_unknowns(self):
        """Owned free unknowns (rows)."""
        return self.A.shape[0]

    def expand(self, x):
        """Values at the owned points: ``x`` on the free ones, the prescribed values, 0 if isolated."""
        x = np.asarray(x)
        if x.shape != (self.n_unknowns,):
            raise InputError(f"expected {self.n_unknowns} owned unknowns, got shape {x.shape}")
        u = np.zeros(self.n_owned)
        u[self.owned_free] = x
        u[self.owned_fixed] = self.owned_values
        return u

    def restrict(self, u_owned):
        """The owned unknowns from values at the owned points (the inverse of :meth:`expand`)."""
        u_owned = np.asarray(u_owned)
        if u_owned.shape != (self.n_owned,):
            raise InputError(f"expected {self.n_owned} owned values, got shape {u_owned.shape}")
        return u_owned[self.owned_free]

    def __repr__(self):
        return (f"LocalSystem({self.n_unknowns} owned unknowns of {self.n_owned} points, "
                f"{self.pattern.n_ghosts} ghost unknowns, nnz {self.A.nnz})")


def reduce_local(sub, A, b, fixed, values):
    """Reduce the local system to the free unknowns and keep the owned rows.

    ``fixed``: local numbers of the prescribed points this subdomain has
    (owned or ghost), ``values`` their values.  Returns a :class:`LocalSystem`.
    """
    system = apply_dirichlet(A, b, fixed, values)
    free = np.asarray(system.free, dtype=np.int64)
    n_of = int(np.searchsorted(free, sub.n_owned))
    keep = np.zeros(len(sub.points), dtype=bool)
    keep[free] = True
    pattern = HaloPattern.from_subdomain(sub).restrict(keep)
    fixed_sorted = np.asarray(system.fixed, dtype=np.int64)
    own = fixed_sorted < sub.n_owned
    rows = owned_rows(system.A, n_of)
    rows.has_canonical_format = True
    return LocalSystem(
        A=rows,
        b=system.b[:n_of],
        pattern=pattern,
        free_points=sub.points[free],
        owned_free=free[:n_of],
        owned_fixed=fixed_sorted[own],
        owned_values=system.values[own],
        n_owned=sub.n_owned,
    )
