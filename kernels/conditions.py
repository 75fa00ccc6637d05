"""Boundary conditions as typed values: parsed once from what a user passes, trusted below.

``Dirichlet``  the held points and their values (``u = g``)
``Flux``       sides with an imposed flux (``kappa du/dn = h``, Neumann)
``Robin``      sides with ``kappa du/dn + r u = s`` (convection and the like)

:func:`parse_conditions` turns the arguments of :func:`hatkernels.solve_poisson`
into these values, checking every index and value and naming the first bad
one; the problem, discretisation and distributed layers take them as they are.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from hatkernels._sets import index_union
from hatkernels.assembly.boundary_terms import check_sides
from hatkernels.checks import point_indices
from hatkernels.coefficients import Coefficient, parse_edge_coefficient
from hatkernels.errors import InputError

__all__ = ["Dirichlet", "Flux", "Robin", "parse_conditions", "free_sides"]


@dataclasses.dataclass(frozen=True)
class Dirichlet:
    """Held values: ``points`` (k,) int64, sorted and unique; ``values`` (k,) float64.

    ``whole_boundary`` is True when every boundary point is held (then every
    connected part of the mesh is held somewhere).
    """

    points: np.ndarray
    values: np.ndarray
    whole_boundary: bool = False


@dataclasses.dataclass(frozen=True)
class Flux:
    """Imposed flux ``h`` on ``sides`` int64, (E, 2) edges or (E, 3) faces (a checked boundary
    coefficient)."""

    sides: np.ndarray
    flux: Coefficient


@dataclasses.dataclass(frozen=True)
class Robin:
    """``kappa du/dn + r u = s`` on ``sides`` ((E, 2) edges or (E, 3) faces); ``r >= 0``."""

    sides: np.ndarray
    r: Coefficient
    s: Coefficient

    @property
    def active(self):
        """True when ``r`` is positive somewhere (the term then fixes the constant)."""
        r = self.r.value
        if len(self.sides) == 0:
            return False
        if self.r.kind == "callable":
            return True  # non-negative by its check; assume it acts
        return bool(np.any(np.asarray(r) > 0))


def _held_points(mesh, where):
    """Points named by ``where``: "boundary", point indices (k,) or sides ((k, 2) edges in
    2-D, (k, 3) faces in 3-D)."""
    if isinstance(where, str):
        if where != "boundary":
            raise InputError(
                f"dirichlet_on must be 'boundary', point indices or sides, got {where!r}"
            )
        return mesh.boundary_points().astype(np.int64)
    w = np.asarray(where)
    if w.ndim == 2:
        return index_union(mesh.n_points, check_sides(mesh, w).ravel())
    return index_union(mesh.n_points, point_indices(w, mesh.n_points, "dirichlet_on"))


def _held_values(mesh, points, g):
    if callable(g):
        coords = mesh.points[points].T
        call = f"dirichlet({', '.join('xyz'[: mesh.dim])})"
        v = np.asarray(g(*coords), dtype=np.float64)
        v = np.broadcast_to(v, points.shape) if v.ndim == 0 else v
        if v.shape != points.shape:
            raise InputError(f"{call} returned shape {v.shape} for {points.size} points")
        bad = ~np.isfinite(v)
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            at = ", ".join(repr(c) for c in mesh.points[points[k]].tolist())
            raise InputError(f"{call} is {float(v[k])!r} at point {points[k]} ({at})")
        return np.array(v, dtype=np.float64)
    v = np.asarray(g)
    if v.ndim == 0:
        value = float(v)
        if not np.isfinite(value):
            raise InputError(f"dirichlet is {value!r}; it must be finite")
        return np.full(points.shape, value)
    if v.shape != (mesh.n_points,):
        raise InputError(
            f"dirichlet must be a number, a callable or one value per point ({mesh.n_points},), "
            f"got shape {v.shape}"
        )
    out = v[points].astype(np.float64)
    bad = ~np.isfinite(out)
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise InputError(f"dirichlet is {out[k]!r} at point {points[k]}; it must be finite")
    return out


def free_sides(mesh, held):
    """Boundary sides (edges, or faces in 3-D) not held: a side is held when all its points are."""
    b = mesh.boundary_faces() if mesh.dim == 3 else mesh.boundary_edges()
    is_held = np.zeros(mesh.n_points, dtype=bool)
    is_held[held] = True
    return b[~is_held[b].all(axis=1)].astype(np.int64)


def parse_conditions(mesh, *, dirichlet=0.0, dirichlet_on=None, neumann=None, robin=None):
    """``(Dirichlet, Flux or None, Robin or None)`` from :func:`hatkernels.solve_poisson`'s arguments.

    ``dirichlet_on`` defaults to the whole boundary unless ``neumann`` or
    ``robin`` is given (then no point is held unless named).  A plain
    ``neumann`` value or a 2-tuple ``robin`` applies on every boundary side
    that is not held; ``(sides, h)`` and ``(sides, r, s)`` name their sides: edges
    (k, 2) on triangles, faces (k, 3) on tetrahedra.
    """
    if dirichlet_on is None:
        dirichlet_on = "boundary" if neumann is None and robin is None else np.empty(0, np.int64)
    held = _held_points(mesh, dirichlet_on)
    whole = isinstance(dirichlet_on, str)  # "boundary", the only string accepted
    fixed = Dirichlet(held, _held_values(mesh, held, dirichlet), whole)
    flux = None
    if neumann is not None:
        if isinstance(neumann, tuple) and len(neumann) != 2:
            raise InputError(f"neumann must be h or (sides, h), got a tuple of {len(neumann)}")
        # only sides the user names are checked: the mesh's own boundary sides are valid, and
        # checking them would build the whole edge or face list of the mesh for nothing
        if isinstance(neumann, tuple):
            e, h = check_sides(mesh, neumann[0]), neumann[1]
        else:
            e, h = free_sides(mesh, held), neumann
        flux = Flux(e, parse_edge_coefficient(h, mesh, len(e), name="boundary load", sign="any"))
    convection = None
    if robin is not None:
        if not isinstance(robin, tuple) or len(robin) not in (2, 3):
            raise InputError("robin must be (r, s) or (sides, r, s)")
        if len(robin) == 3:
            e, r, s = check_sides(mesh, robin[0]), robin[1], robin[2]
        else:
            e, (r, s) = free_sides(mesh, held), robin
        convection = Robin(
            e,
            parse_edge_coefficient(r, mesh, len(e), name="boundary coefficient",
                                   sign="nonnegative"),
            parse_edge_coefficient(s, mesh, len(e), name="boundary load", sign="any"),
        )
    return fixed, flux, convection
