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
from hatkernels.coefficients import Coefficient, combine, parse_edge_coefficient
from hatkernels.errors import InputError

__all__ = ["BoundaryPiece", "Dirichlet", "Flux", "Robin", "Tagged", "free_sides",
           "parse_conditions", "tagged"]


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
    if v.dtype.kind not in "fiu":
        raise InputError(f"dirichlet must be a number, a callable or one value per point, got "
                         f"{type(g).__name__} {str(g)[:40]!r}")
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


@dataclasses.dataclass(frozen=True)
class Tagged:
    """Boundary tags named by their integer numbers (:func:`tagged`); names can be given as
    plain strings."""

    keys: tuple


def tagged(*keys):
    """Mark integer boundary tags (or names) as the place of a condition.

    A string already names a tag (``dirichlet_on="inlet"``, ``neumann=(["top",
    "bottom"], 0.5)``); integers alone would be point indices, so integer tags
    are wrapped: ``dirichlet_on=tagged(3, 4)``.

    >>> tagged(3, "inlet")
    Tagged(keys=(3, 'inlet'))
    """
    if not keys:
        raise InputError("tagged() needs at least one boundary tag")
    return Tagged(tuple(keys))


@dataclasses.dataclass(frozen=True)
class BoundaryPiece:
    """One condition on one part of the boundary, as the user gave it (for results by tag).

    ``kind`` is "held", "flux" or "convection"; ``tag`` the boundary tag, or None for
    sides given directly or by default; ``sides`` its sides; ``data`` () for held
    pieces, ``(h,)`` for a flux, ``(r, s)`` for convection (Coefficients on ``sides``).
    """

    kind: str
    tag: object
    sides: np.ndarray
    data: tuple = ()


def _tag_keys(where):
    """The keys when ``where`` names boundary tags (a string other than "boundary", a list
    of strings, or :func:`tagged`), else None."""
    if isinstance(where, Tagged):
        return list(where.keys)
    if isinstance(where, str):
        return None if where == "boundary" else [where]
    if isinstance(where, (list, tuple)) and where and all(isinstance(k, str) for k in where):
        return list(where)
    return None


def _tags_of(mesh, keys, what):
    tags = mesh.tags
    if tags is None or len(tags.sides) == 0:
        raise InputError(f"{what} names boundary tags {keys}, but the mesh has no boundary "
                         f"tags")
    return tags.side_tag_list(keys, what=what)


class _Claims:
    """Which condition each boundary tag has been given; a second one is refused."""

    def __init__(self, mesh):
        self.mesh = mesh
        self.by_tag = {}

    def claim(self, tag, what):
        if tag in self.by_tag:
            label = self.mesh.tags.side_label(tag)
            raise InputError(f"boundary tag {label} is given two conditions: "
                             f"{self.by_tag[tag]} and {what}; a side takes one")
        self.by_tag[tag] = what


def _held_by_tag(mesh, values, claims):
    """Held points and values from ``{tag: g}``: the union of the tags' side points; where
    tags meet, the tag listed first gives the value."""
    tags = mesh.tags
    if tags is None or len(tags.sides) == 0:
        raise InputError(f"dirichlet is given by boundary tag ({list(values)[:3]}), but the "
                         f"mesh has no boundary tags")
    if not values:
        raise InputError("dirichlet is an empty dict; give a value per boundary tag")
    points, vals, pieces = [], [], []
    for key, g in values.items():
        t = tags.side_tag(key, what="dirichlet: boundary tag")
        claims.claim(t, "a held value (dirichlet)")
        sides = tags.sides_of([t]).astype(np.int64)
        pts = index_union(mesh.n_points, sides.ravel())
        points.append(pts)
        vals.append(_held_values(mesh, pts, g))
        pieces.append(BoundaryPiece("held", t, sides))
    p = np.concatenate(points)
    v = np.concatenate(vals)
    uniq, first = np.unique(p, return_index=True)  # the first occurrence: the first tag
    return uniq, v[first], pieces


def _merged(mesh, pieces, data_index, *, name, sign):
    """One Coefficient over the concatenated sides of ``pieces`` from each piece's own."""
    sides = np.concatenate([p.sides for p in pieces]) if pieces else np.empty((0, mesh.dim),
                                                                               np.int64)
    if len(pieces) == 1:
        return sides, pieces[0].data[data_index]
    index = np.concatenate([np.full(len(p.sides), k) for k, p in enumerate(pieces)])
    rank = np.concatenate([np.arange(len(p.sides)) for p in pieces])
    parts = [p.data[data_index] for p in pieces]
    return sides, combine(parts, index, rank, mesh, sides, name=name, sign=sign, on="edge")


def _rows(coef, mask):
    """A side coefficient restricted to the sides ``mask`` selects (per-side values sliced)."""
    if coef.kind != "edge":
        return coef  # constants, per-point values and callables hold on any sides
    return Coefficient("edge", np.asarray(coef.value)[mask], coef.name, coef.sign)


def _no_shared_sides(mesh, pieces):
    """Refuse a side that two flux or convection pieces both cover (when tags are involved)."""
    if len(pieces) < 2 or all(p.tag is None for p in pieces):
        return
    rows = np.sort(np.concatenate([p.sides for p in pieces]), axis=1)
    owner = np.concatenate([np.full(len(p.sides), k) for k, p in enumerate(pieces)])
    _, first, counts = np.unique(rows, axis=0, return_index=True, return_counts=True)
    if (counts > 1).any():
        k = int(first[np.flatnonzero(counts > 1)[0]])
        again = np.flatnonzero((rows == rows[k]).all(axis=1))
        a, b = (pieces[owner[j]] for j in again[:2])
        where = [mesh.tags.side_label(p.tag) if p.tag is not None else "sides given directly"
                 for p in (a, b)]
        raise InputError(f"side {rows[k].tolist()} is given two conditions: a {a.kind} "
                         f"({where[0]}) and a {b.kind} ({where[1]}); a side takes one")


def parse_conditions(mesh, *, dirichlet=0.0, dirichlet_on=None, neumann=None, robin=None):
    """``(Dirichlet, Flux or None, Robin or None, pieces)`` from
    :func:`hatkernels.solve_poisson`'s arguments.

    ``dirichlet_on`` defaults to the whole boundary unless ``neumann`` or
    ``robin`` is given (then no point is held unless named).  A plain
    ``neumann`` value or a 2-tuple ``robin`` applies on every boundary side
    that is not held; ``(sides, h)`` and ``(sides, r, s)`` name their sides: edges
    (k, 2) on triangles, faces (k, 3) on tetrahedra.

    On a mesh with boundary tags, every place may be tags instead: a tag name or
    a list of names, or :func:`tagged` for integer tags (``dirichlet_on="inlet"``,
    ``neumann=(["top"], h)``, ``robin=(tagged(4), r, s)``), and the data may be
    given per tag: ``dirichlet={tag: g}`` (then ``dirichlet_on`` is left out; where
    two held tags meet, the tag listed first gives the value), ``neumann={tag: h}``,
    ``robin={tag: (r, s)}``.  A tag the mesh does not have, or a tag (or side)
    given two conditions, is an InputError naming it.  ``pieces`` lists each
    condition with its tag (:class:`BoundaryPiece`), for results by tag.
    """
    claims = _Claims(mesh)
    pieces = []
    if isinstance(dirichlet, dict):
        if dirichlet_on is not None:
            raise InputError("dirichlet is given per boundary tag, so the held sides are its "
                             "tags; leave dirichlet_on out")
        held, values, held_pieces = _held_by_tag(mesh, dirichlet, claims)
        fixed = Dirichlet(held, values, False)
        pieces += held_pieces
    else:
        if dirichlet_on is None:
            dirichlet_on = ("boundary" if neumann is None and robin is None
                            else np.empty(0, np.int64))
        keys = _tag_keys(dirichlet_on)
        if keys is not None:
            tags = _tags_of(mesh, keys, "dirichlet_on")
            for t in tags:
                claims.claim(t, "a held value (dirichlet_on)")
                pieces.append(BoundaryPiece("held", t, mesh.tags.sides_of([t]).astype(np.int64)))
            held = index_union(mesh.n_points,
                               np.concatenate([p.sides.ravel() for p in pieces]))
            whole = False
        else:
            held = _held_points(mesh, dirichlet_on)
            whole = isinstance(dirichlet_on, str)  # "boundary", the only string left
        fixed = Dirichlet(held, _held_values(mesh, held, dirichlet), whole)

    def side_pieces(value, kind, width, what):
        """The pieces of a neumann (width 1) or robin (width 2) argument."""
        if isinstance(value, dict):
            if not value:
                raise InputError(f"{what} is an empty dict; give a value per boundary tag")
            if mesh.tags is None or len(mesh.tags.sides) == 0:
                raise InputError(f"{what} is given by boundary tag ({list(value)[:3]}), but "
                                 f"the mesh has no boundary tags")
            out = []
            for key, data in value.items():
                t = mesh.tags.side_tag(key, what=f"{what}: boundary tag")
                if width == 2 and (not isinstance(data, tuple) or len(data) != 2):
                    raise InputError(f"{what} on boundary tag {mesh.tags.side_label(t)} must "
                                     f"be a pair (r, s), got {data!r}")
                claims.claim(t, f"a {kind} ({what})")
                out.append((t, mesh.tags.sides_of([t]).astype(np.int64),
                            data if width == 2 else (data,)))
            return out
        if width == 1:
            if isinstance(value, tuple) and len(value) != 2:
                raise InputError(f"neumann must be h, (sides, h) or {{tag: h}}, got a tuple "
                                 f"of {len(value)}")
            where, data = (value[0], value[1:]) if isinstance(value, tuple) else (None, (value,))
        else:
            if not isinstance(value, tuple) or len(value) not in (2, 3):
                raise InputError("robin must be (r, s), (sides, r, s) or {tag: (r, s)}")
            where, data = (value[0], value[1:]) if len(value) == 3 else (None, value)
        if where is None:
            return [(None, free_sides(mesh, held), data)]
        keys = _tag_keys(where)
        if keys is None:
            # only sides the user names are checked: the mesh's own boundary sides are valid,
            # and checking them would build the whole edge or face list of the mesh for nothing
            return [(None, check_sides(mesh, where), data)]
        tags = _tags_of(mesh, keys, what)
        for t in tags:
            claims.claim(t, f"a {kind} ({what})")
        return [(tuple(tags), mesh.tags.sides_of(tags).astype(np.int64), data)]

    def label(tag):
        if tag is None:
            return ""
        tags = tag if isinstance(tag, tuple) else (tag,)
        return " on boundary tag " + ", ".join(mesh.tags.side_label(t) for t in tags)

    def parsed(kind, tag, e, data, names, signs):
        """The pieces of one argument, one per tag (data on several tags are split)."""
        coefs = tuple(parse_edge_coefficient(v, mesh, len(e), name=n + label(tag), sign=g)
                      for v, n, g in zip(data, names, signs, strict=True))
        if not isinstance(tag, tuple):
            return [BoundaryPiece(kind, tag, e, coefs)]
        row_tags = mesh.tags.side_tags[np.isin(mesh.tags.side_tags, tag)]
        return [BoundaryPiece(kind, t, e[row_tags == t],
                              tuple(_rows(c, row_tags == t) for c in coefs)) for t in tag]

    flux = None
    flux_pieces = []
    if neumann is not None:
        for tag, e, data in side_pieces(neumann, "flux", 1, "neumann"):
            flux_pieces += parsed("flux", tag, e, data, ("boundary load",), ("any",))
        e, h = _merged(mesh, flux_pieces, 0, name="boundary load", sign="any")
        flux = Flux(e, h)
    convection = None
    robin_pieces = []
    if robin is not None:
        for tag, e, data in side_pieces(robin, "convection", 2, "robin"):
            robin_pieces += parsed("convection", tag, e, data,
                                   ("boundary coefficient", "boundary load"),
                                   ("nonnegative", "any"))
        e, r = _merged(mesh, robin_pieces, 0, name="boundary coefficient", sign="nonnegative")
        _, s_ = _merged(mesh, robin_pieces, 1, name="boundary load", sign="any")
        convection = Robin(e, r, s_)
    _no_shared_sides(mesh, flux_pieces + robin_pieces)
    return fixed, flux, convection, tuple(pieces + flux_pieces + robin_pieces)
