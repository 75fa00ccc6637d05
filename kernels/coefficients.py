"""Coefficients and source terms: what a user may pass, checked once, in one place.

A coefficient (or load) is one of

- ``None`` (the constant 1) or a number;
- an array of one value per triangle (piecewise constant) or one per point
  (continuous, piecewise linear between the points);
- for diffusion, a symmetric positive definite ``d x d`` tensor (``d`` the
  mesh's dimension), one for all ``(d, d)`` or one per cell ``(n_cells, d, d)``;
- a callable ``c(x, y)`` (``c(x, y, z)`` in 3-D) taking and returning
  arrays, evaluated at quadrature points.

When a mesh has as many points as triangles a plain array is ambiguous;
wrap it with :func:`per_point` or :func:`per_triangle`.
"""

from __future__ import annotations

import dataclasses
import numbers

import numpy as np

from hatkernels._jit import assembly as _jit_assembly
from hatkernels.errors import InputError
from hatkernels.quadrature import triangle_rule

__all__ = [
    "Coefficient",
    "Field",
    "parse_coefficient",
    "parse_edge_coefficient",
    "per_edge",
    "per_point",
    "per_cell",
    "per_triangle",
]

# Callables are evaluated on this many triangles at a time, to bound the
# temporaries at (chunk * points per triangle) values.
_CHUNK = 1 << 18


@dataclasses.dataclass(frozen=True)
class Field:
    """An array tagged with where its values live: ``on`` is "point", "cell" or "edge"."""

    values: object
    on: str

    def __post_init__(self):
        if self.on not in ("point", "cell", "edge"):
            raise InputError(f"a field lives on 'point', 'cell' or 'edge', not {self.on!r}")


def per_point(values):
    """Mark ``values`` as one per point (piecewise linear)."""
    return Field(values, "point")


def per_cell(values):
    """Mark ``values`` as one per cell, triangle or tetrahedron (piecewise constant)."""
    return Field(values, "cell")


def per_triangle(values):
    """Mark ``values`` as one per triangle (piecewise constant); :func:`per_cell` in 2-D."""
    return Field(values, "cell")


def per_edge(values):
    """Mark ``values`` as one per boundary edge (for boundary terms)."""
    return Field(values, "edge")


@dataclasses.dataclass(frozen=True)
class Coefficient:
    """A checked coefficient.

    ``kind`` is ``"constant"`` (value a float), ``"cell"`` (M,),
    ``"point"`` (N,), ``"tensor"`` ((d, d) or (M, d, d)) or ``"callable"``.
    """

    kind: str
    value: object
    name: str
    sign: str

    def evaluate(self, coords, owners, owner="triangle"):
        """Values of a callable at points ``coords = (x, y)`` (``(x, y, z)`` in 3-D), checked;
        ``owners[k]`` is the cell (or side, per ``owner``) that point ``k`` belongs to, for
        messages."""
        args = ", ".join("xyz"[: len(coords)])
        call = f"{self.name}({args})"
        if isinstance(self.value, Pieces):  # data given by region or by boundary tag
            v = self.value.at(coords, np.asarray(owners, dtype=np.int64), owner)
        else:
            try:
                v = self.value(*coords)
            except Exception as exc:
                raise InputError(f"{call} raised {type(exc).__name__}: {exc}") from exc
        v = np.asarray(v)
        if v.dtype.kind not in "fiub" or v.dtype.kind == "b":
            raise InputError(f"{call} must return real numbers, got dtype {v.dtype}")
        shape = coords[0].shape
        if v.ndim == 0:
            v = np.full(shape, float(v))
        if v.shape != shape:
            raise InputError(
                f"{call} returned shape {v.shape} for {coords[0].size} points; it must "
                f"return one value per point (use numpy operations on {args})"
            )
        v = v.astype(np.float64, copy=False)
        bad = _bad_mask(v, self.sign)
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            at = ", ".join(repr(float(c[k])) for c in coords)
            raise InputError(
                f"{call} is {float(v[k])!r} at ({at}), a quadrature point of "
                f"{owner} {int(owners[k])}; {_REQUIREMENT[self.sign]}"
            )
        return v


_REQUIREMENT = {
    "positive": "it must be positive and finite",
    "nonnegative": "it must be non-negative and finite",
    "any": "it must be finite",
}


def _bad_mask(v, sign):
    bad = ~np.isfinite(v)
    if sign == "positive":
        bad |= ~(v > 0)
    elif sign == "nonnegative":
        bad |= ~(v >= 0)
    return bad


def _as_real_array(value, name):
    try:
        a = np.asarray(value)
    except Exception as exc:
        raise InputError(f"{name} cannot be read as an array: {exc}") from None
    if a.dtype.kind not in "fiu":
        raise InputError(f"{name} must be real numbers, got dtype {a.dtype}")
    return np.array(a, dtype=np.float64, copy=True)


def _check_values(a, name, sign, where):
    bad = _bad_mask(a, sign)
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"{name} is {float(a[k])!r} at {where} {k}; {_REQUIREMENT[sign]}"
            + (f" ({int(bad.sum())} bad values in all)" if bad.sum() > 1 else "")
        )


def _check_tensors(K, name, where):
    d = K.shape[-1]
    K = K.reshape(-1, d, d)
    if not np.isfinite(K).all():
        k = int(np.flatnonzero(~np.isfinite(K).all(axis=(1, 2)))[0])
        raise InputError(f"{name} tensor of {where} {k} is not finite: {K[k].tolist()}")
    scale = np.abs(K).max(axis=(1, 2))
    asym = (np.abs(K - K.transpose(0, 2, 1)) > 1e-12 * scale[:, None, None]).any(axis=(1, 2))
    if asym.any():
        k = int(np.flatnonzero(asym)[0])
        raise InputError(f"{name} tensor of {where} {k} is not symmetric: {K[k].tolist()}")
    if d == 2:  # the leading minors: no eigenvalue solve for the common case
        det = K[:, 0, 0] * K[:, 1, 1] - K[:, 0, 1] * K[:, 1, 0]
        notpd = ~((K[:, 0, 0] > 0) & (det > 0))
    else:
        notpd = ~(np.linalg.eigvalsh(0.5 * (K + K.transpose(0, 2, 1)))[:, 0] > 0)
    if notpd.any():
        k = int(np.flatnonzero(notpd)[0])
        raise InputError(f"{name} tensor of {where} {k} is not positive definite: {K[k].tolist()}")


def parse_coefficient(value, mesh, *, name="coefficient", sign="positive", tensor=False):
    """Check a coefficient against a mesh and return a :class:`Coefficient`.

    ``sign`` is ``"positive"`` (diffusion), ``"nonnegative"`` or ``"any"``
    (loads).  ``tensor`` allows 2x2 tensors.  Raises :class:`InputError`
    naming the triangle or point of the first bad value.

    A dict ``{region: value}`` gives a value per region of a mesh with region
    tags (:attr:`hatkernels.Mesh.regions`); keys are tags or their names, values
    any of the kinds above.  With ``tensor`` (a diffusion coefficient) every
    region needs one; for loads and reactions a region left out gets 0.
    """
    if isinstance(value, Coefficient):
        return value
    if isinstance(value, dict):
        return parse_by_region(value, mesh, name=name, sign=sign, tensor=tensor)
    if value is None:
        return Coefficient("constant", 1.0, name, sign)
    if isinstance(value, bool):
        raise InputError(f"{name} must be a number, array or callable, got {value!r}")
    if callable(value) and not isinstance(value, Field):
        return Coefficient("callable", value, name, sign)
    on = None
    if isinstance(value, Field):
        on, value = value.on, value.values
        if on == "edge":
            raise InputError(f"{name} lives on points or triangles here, not on edges")
    if isinstance(value, numbers.Real) and on is None:
        v = float(value)
        if _bad_mask(np.array([v]), sign)[0]:
            raise InputError(f"{name} is {v!r}; {_REQUIREMENT[sign]}")
        return Coefficient("constant", v, name, sign)
    a = _as_real_array(value, name)
    n, m = mesh.n_points, mesh.n_cells
    items = _items(mesh)
    cell, cells = items["cell"][0], items["cell"][1]
    if a.ndim == 0 and on is None:
        return parse_coefficient(float(a), mesh, name=name, sign=sign, tensor=tensor)
    d = mesh.dim
    if a.ndim in (2, 3) and a.shape[-2:] == (d, d) and on in (None, "cell"):
        if not tensor:
            raise InputError(f"{name} must be scalar here, got a tensor of shape {a.shape}")
        if a.ndim == 3 and a.shape[0] != m:
            raise InputError(f"{name} has {a.shape[0]} tensors, but the mesh has {m} {cells}")
        _check_tensors(a, name, cell if a.ndim == 3 else "constant")
        return Coefficient("tensor", a, name, sign)
    if a.ndim != 1:
        raise InputError(
            f"{name} has shape {a.shape}; expected a number, one value per point ({n},), "
            f"one per {cell} ({m},)" + (f", or {d}x{d} tensors" if tensor else "")
        )
    return _per_item(a, on, name, sign, n, "cell", m, items)


# how each kind of item is named in messages, and the helper that tags it
_ITEM = {
    "point": ("point", "points", "per_point"),
    "cell": ("triangle", "triangles", "per_triangle"),
    "edge": ("edge", "edges", "per_edge"),
}
_ITEM_3D = {**_ITEM, "cell": ("tetrahedron", "tetrahedra", "per_cell")}


def _items(mesh):
    return _ITEM_3D if mesh.dim == 3 else _ITEM


def _per_item(a, on, name, sign, n_points, other, n_other, items=_ITEM):
    """A 1-D array of values per point or per ``other`` item (cell or edge), checked."""
    plural = items[other][1]
    if on is None:
        if len(a) == n_points == n_other:
            raise InputError(
                f"{name} has {len(a)} values and there are {n_points} points and {n_other} "
                f"{plural}: wrap it with hatkernels.per_point(...) or hatkernels.{items[other][2]}(...)"
            )
        on = "point" if len(a) == n_points else other if len(a) == n_other else None
    expected = n_points if on == "point" else n_other
    if on is None or len(a) != expected:
        raise InputError(
            f"{name} has {len(a)} values, but there are {n_points} points and {n_other} {plural}"
        )
    _check_values(a, name, sign, items[on][0])
    return Coefficient(on, a, name, sign)


def quadrature_points(mesh, degree, start=0, stop=None):
    """Physical quadrature points of triangles ``start:stop``: x, y of shape (m, Q)."""
    lam, _ = triangle_rule(degree)
    stop = mesh.n_triangles if stop is None else stop
    x = np.empty((stop - start, len(lam)))
    y = np.empty_like(x)
    _jit_assembly.quadrature_coordinates(mesh.points, mesh.triangles, lam, start, x, y)
    return x, y


def at_quadrature(coef, mesh, degree):
    """Values (M, Q) of a coefficient at the quadrature points of ``triangle_rule(degree)``.

    Callables are evaluated in chunks of triangles; other kinds are
    interpolated exactly (constant, per triangle, linear per point).
    """
    lam, _ = triangle_rule(degree)
    m = mesh.n_triangles
    if coef.kind == "constant":
        return np.full((m, len(lam)), coef.value)
    if coef.kind == "cell":
        return np.repeat(coef.value[:, None], len(lam), axis=1)
    if coef.kind == "point":
        return coef.value[mesh.triangles] @ lam.T
    if coef.kind != "callable":
        raise InputError(f"{coef.name} of kind {coef.kind} has no pointwise values here")
    out = np.empty((m, len(lam)))
    for start in range(0, m, _CHUNK):
        stop = min(m, start + _CHUNK)
        x, y = quadrature_points(mesh, degree, start, stop)
        owner = np.repeat(np.arange(start, stop), len(lam))
        out[start:stop] = coef.evaluate((x.ravel(), y.ravel()), owner).reshape(x.shape)
    return out


def triangle_means(coef, mesh, degree):
    """Mean of a scalar coefficient over each triangle: a float or an (M,) array.

    Exact for constants, per-triangle values and per-point (linear) values;
    by the quadrature rule of ``degree`` for callables.
    """
    if coef.kind == "constant":
        return coef.value
    if coef.kind == "cell":
        return coef.value
    if coef.kind == "point":
        return coef.value[mesh.triangles].mean(axis=1)
    if coef.kind == "callable":
        _, w = triangle_rule(degree)
        return at_quadrature(coef, mesh, degree) @ w
    raise InputError(f"{coef.name} is a tensor; a scalar was expected")


def parse_edge_coefficient(value, mesh, n_edges, *, name, sign):
    """Check a boundary coefficient: a number, per point (N,), per side (n_edges,) or callable.

    A side is an edge in 2-D and a triangular face in 3-D (``per_edge`` data on a
    tetrahedral mesh hold one value per face, and messages say "face").
    Returns a :class:`Coefficient` whose kind is "constant", "point", "edge" (per side)
    or "callable".
    """
    items = _SIDE_ITEM_3D if mesh.dim == 3 else _ITEM
    side, sides = items["edge"][0], items["edge"][1]
    if (
        value is None
        or isinstance(value, numbers.Real)
        or callable(value)
        and not isinstance(value, Field)
    ):
        return parse_coefficient(value, mesh, name=name, sign=sign)
    on = None
    if isinstance(value, Field):
        on, value = value.on, value.values
        if on == "cell":
            cells = _items(mesh)["cell"][1]
            raise InputError(f"{name} lives on points or {sides}, not on {cells}")
    a = _as_real_array(value, name)
    n = mesh.n_points
    if a.ndim == 0 and on is None:
        return parse_coefficient(float(a), mesh, name=name, sign=sign)
    if a.ndim != 1:
        raise InputError(
            f"{name} has shape {a.shape}; expected a number, one value per point ({n},) "
            f"or one per {side} ({n_edges},)"
        )
    return _per_item(a, on, name, sign, n, "edge", n_edges, items)


# boundary data on a tetrahedral mesh: its sides are faces, given with per_edge(...)
_SIDE_ITEM_3D = {**_ITEM, "edge": ("face", "faces", "per_edge")}


# -- data given piece by piece: by region, or by boundary tag -------------------------------


class Pieces:
    """Pointwise values of data given piece by piece over items (cells, or sides).

    Item ``k`` takes piece ``index[k]`` (-1: the value 0) and is item ``rank[k]`` of
    that piece's own arrays (per-cell or per-side values).  ``items`` (n_items, k)
    are the items' points, for per-point pieces, which are interpolated linearly
    inside the item.  :meth:`Coefficient.evaluate` calls :meth:`at` with the owners
    of the points (item numbers), so the pieces work wherever callables do.
    """

    def __init__(self, parts, index, rank, points, items):
        self.parts = tuple(parts)
        self.index = index
        self.rank = rank
        self.points = points
        self.items = items

    def __repr__(self):
        return f"Pieces({', '.join(p.name for p in self.parts)})"

    def at(self, coords, owners, owner):
        out = np.zeros(len(owners))
        which = self.index[owners]
        for p, part in enumerate(self.parts):
            sel = np.flatnonzero(which == p)
            if not sel.size:
                continue
            own = owners[sel]
            sub = tuple(np.asarray(c)[sel] for c in coords)
            if part.kind == "constant":
                v = part.value
            elif part.kind in ("cell", "edge"):
                v = np.asarray(part.value)[self.rank[own]]
            elif part.kind == "point":
                v = _interpolate(part.value, self.points, self.items[own], np.column_stack(sub))
            else:  # "callable" (tensors are refused when the pieces are made)
                v = part.evaluate(sub, own, owner)
            out[sel] = v
        return out


def _interpolate(values, points, items, x):
    """Linear interpolation of per-point ``values`` at ``x`` (m, d), each inside the simplex
    ``items[k]`` (a cell, or a side: the barycentric coordinates in its own plane)."""
    v = points[items]  # (m, k, d)
    edges = v[:, 1:, :] - v[:, :1, :]  # (m, k-1, d)
    gram = edges @ edges.transpose(0, 2, 1)
    rhs = edges @ (x - v[:, 0, :])[:, :, None]
    mu = np.linalg.solve(gram, rhs)[:, :, 0]
    lam = np.column_stack([1.0 - mu.sum(axis=1), mu])
    return (values[items] * lam).sum(axis=1)


def combine(parts, index, rank, mesh, items, *, name, sign, on):
    """One :class:`Coefficient` over ``items`` from ``parts`` given piece by piece.

    ``on`` is "cell" (items are the mesh's cells, pieces parsed on the whole mesh) or
    "edge" (items are sides, each piece parsed on its own sides).  All constants and
    per-item values give an array of one value per item (kind ``on``; per-cell
    tensors when a piece is a tensor); anything else a callable kind whose value
    is :class:`Pieces`.
    """
    n = len(index)
    d = mesh.dim
    if any(p.kind == "tensor" for p in parts):
        other = [p for p in parts if p.kind not in ("tensor", "constant", "cell")]
        if other:
            raise InputError(f"{name}: {other[0].name} is {other[0].kind}, and another region "
                             f"has a tensor; mix tensors with numbers or per-cell values only")
        out = np.zeros((n, d, d))
        for k, p in enumerate(parts):
            sel = index == k
            v = np.asarray(p.value, dtype=np.float64)
            if p.kind == "tensor":
                out[sel] = v if v.ndim == 2 else v[rank[sel]]
            else:
                s = v if v.ndim == 0 else v[rank[sel]]
                out[sel] = np.asarray(s)[..., None, None] * np.eye(d)
        return Coefficient("tensor", _checked_tensor_pieces(out, index, name), name, sign)
    if all(p.kind in ("constant", on) for p in parts):
        out = np.zeros(n)
        for k, p in enumerate(parts):
            sel = index == k
            out[sel] = p.value if p.kind == "constant" else np.asarray(p.value)[rank[sel]]
        if sign == "positive" and (index < 0).any():  # cannot happen: diffusion needs them all
            raise InputError(f"{name} has no value on some items")
        return Coefficient(on, out, name, sign)
    return Coefficient("callable", Pieces(parts, index, rank, mesh.points, items), name, sign)


def _checked_tensor_pieces(out, index, name):
    if (index < 0).any():
        raise InputError(f"{name}: a region has no tensor")
    return out


def parse_by_region(value, mesh, *, name, sign, tensor=False):
    """:func:`parse_coefficient` for a dict ``{region tag or name: value}``."""
    tags = mesh.tags
    if tags is None or tags.regions is None:
        keys = ", ".join(repr(k) for k in list(value)[:3])
        raise InputError(f"{name} is given by region ({keys}), but the mesh has no region "
                         f"tags (Mesh.regions is None)")
    if not value:
        raise InputError(f"{name} is an empty dict; give a value per region")
    chosen = {}
    for key, v in value.items():
        t = tags.region_tag(key, what=f"{name}: region")
        if t in chosen:
            raise InputError(f"{name}: region {tags.region_label(t)} is given twice "
                             f"(as {chosen[t][0]!r} and {key!r})")
        if isinstance(v, dict):
            raise InputError(f"{name} in region {tags.region_label(t)} is a dict; a region "
                             f"takes a number, an array, a tensor or a callable")
        chosen[t] = (key, v)
    if tensor or sign == "positive":  # a diffusion, a density or a capacity: everywhere
        missing = [t for t in tags.region_tags().tolist() if t not in chosen]
        if missing:
            raise InputError(f"{name}: region {tags.region_label(missing[0])} has none "
                             f"({len(missing)} of {len(tags.region_tags())} regions lack one); "
                             f"every region needs a {name}")
    index = np.full(mesh.n_cells, -1, dtype=np.int64)
    parts = []
    for k, t in enumerate(sorted(chosen)):
        label = f"{name} in region {tags.region_label(t)}"
        parts.append(parse_coefficient(chosen[t][1], mesh, name=label, sign=sign, tensor=tensor))
        index[tags.regions == t] = k
    rank = np.arange(mesh.n_cells)
    return combine(parts, index, rank, mesh, mesh.cells, name=name, sign=sign, on="cell")
