"""Splitting a mesh's points into parts with good locality and balance.

Two partitioners of our own, both geometric and both deterministic (every
rank computes the same split from the same mesh):

``hilbert``
    Points sorted along a Hilbert space-filling curve
    (:func:`hatkernels.mesh.hilbert_keys`, in the plane or in space), cut into
    contiguous runs of equal weight.  Neighbours are close on the curve, so
    each run is a compact region; one sort, O(N log N).
``rcb``
    Recursive coordinate bisection: split the point set across the longest
    side of its bounding box at the weighted median, in proportion to the
    parts on each side, and recurse.  Straight cuts: often a little less
    interface than the curve's staircase on rectangles, more on curved
    domains.  O(N log N log P).

The weight is ``"points"`` (each point 1: balances owned rows, hence SpMV
and vector work) or ``"cells"`` (each point its number of cells, triangles
or tetrahedra: balances assembly work; ``"triangles"`` is its older name,
for triangle meshes).  Any other partitioner (a graph partitioner, say)
can be used through :func:`partition_from_owner`.

A part owns its points; the cells touching them and one layer of ghost
points (the other vertices of those cells) make its subdomain, see
:mod:`hatkernels.distributed.subdomain`.  :meth:`Partition.quality` reports
balance and interface size.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from hatkernels.checks import integer_option
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh
from hatkernels.mesh.refine3d import unique_edges
from hatkernels.mesh.reorder import hilbert_keys

__all__ = ["METHODS", "WEIGHTS", "Partition", "PartitionQuality", "partition",
           "partition_from_owner"]

#: Values of ``method`` of :func:`partition`: ``"hilbert"`` (cuts along a Hilbert curve) and
#: ``"rcb"`` (recursive coordinate bisection).
METHODS = ("hilbert", "rcb")
#: Values of ``weight``; ``"triangles"`` is the older name of ``"cells"``, for triangle meshes.
WEIGHTS = ("points", "cells", "triangles")

_CELL_WORDS = {2: "triangles", 3: "tetrahedra"}


def mesh_edges(mesh):
    """The unique edges ``(i, j)``, ``i < j``, sorted, of a triangle or tetrahedron mesh."""
    if mesh.dim == 2:
        return mesh.edges()
    return unique_edges(mesh.cells, mesh.n_points)[0]


@dataclasses.dataclass(frozen=True, repr=False)
class PartitionQuality:
    """Balance and interface of a partition (all arrays have one entry per part).

    Attributes
    ----------
    owned_points : ndarray
        Points owned by each part.
    owned_entries : ndarray
        Stored matrix entries in the owned rows (the SpMV work of the part).
    cells : ndarray
        Cells (triangles or tetrahedra) in each subdomain (those touching an
        owned point; a cell on an interface counts in every part it touches).
        ``triangles`` is its older name.
    ghosts : ndarray
        Ghost points of each subdomain (the halo it receives per product).
    neighbours : ndarray
        Parts each part exchanges values with.
    interface_points : int
        Points with a neighbour (a point sharing a cell) in another part.
    cut_edges : int
        Mesh edges whose two ends lie in different parts.
    dim : int
        The mesh's dimension (2: triangles, 3: tetrahedra).
    """

    owned_points: np.ndarray
    owned_entries: np.ndarray
    cells: np.ndarray
    ghosts: np.ndarray
    neighbours: np.ndarray
    interface_points: int
    cut_edges: int
    dim: int = 2

    @staticmethod
    def _imbalance(values):
        mean = float(np.mean(values))
        return float(np.max(values)) / mean - 1.0 if mean > 0 else 0.0

    @property
    def parts(self):
        return len(self.owned_points)

    @property
    def imbalance(self):
        """``max / mean - 1`` of the owned points."""
        return self._imbalance(self.owned_points)

    @property
    def entry_imbalance(self):
        """``max / mean - 1`` of the owned rows' stored entries."""
        return self._imbalance(self.owned_entries)

    @property
    def cell_imbalance(self):
        """``max / mean - 1`` of the subdomain cells."""
        return self._imbalance(self.cells)

    @property
    def triangles(self):
        """The subdomain cells of a triangle mesh (the older name of :attr:`cells`)."""
        return self.cells

    @property
    def triangle_imbalance(self):
        """:attr:`cell_imbalance` under its older name."""
        return self.cell_imbalance

    def as_dict(self):
        """Plain numbers and lists, for JSON and printing.

        Cell counts are under ``"cells"`` and ``"cell_imbalance"``; on triangle
        meshes also under their older names ``"triangles"`` and ``"triangle_imbalance"``.
        """
        out = {
            "parts": self.parts,
            "dim": int(self.dim),
            "imbalance": self.imbalance,
            "entry_imbalance": self.entry_imbalance,
            "cell_imbalance": self.cell_imbalance,
            "interface_points": int(self.interface_points),
            "cut_edges": int(self.cut_edges),
            "owned_points": self.owned_points.tolist(),
            "owned_entries": self.owned_entries.tolist(),
            "cells": self.cells.tolist(),
            "ghosts": self.ghosts.tolist(),
            "neighbours": self.neighbours.tolist(),
        }
        if self.dim == 2:
            out["triangle_imbalance"] = out["cell_imbalance"]
            out["triangles"] = out["cells"]
        return out

    def __repr__(self):
        return (f"PartitionQuality({self.parts} parts, imbalance {self.imbalance:.2%} points / "
                f"{self.entry_imbalance:.2%} entries / {self.cell_imbalance:.2%} "
                f"{_CELL_WORDS[self.dim]}, {self.interface_points} interface points, "
                f"ghosts {self.ghosts.tolist()})")


@dataclasses.dataclass(frozen=True, repr=False)
class Partition:
    """Which part owns each point of a mesh.

    Attributes
    ----------
    mesh : Mesh
    owner : ndarray, shape (n_points,), int32
        The part owning each point (read-only).
    parts : int
    method, weight : str
        How it was made (``"given"`` for :func:`partition_from_owner`).
    """

    mesh: Mesh
    owner: np.ndarray
    parts: int
    method: str
    weight: str

    def owned(self, part):
        """Points owned by ``part``, ascending."""
        return np.flatnonzero(self.owner == part)

    def order(self):
        """All points, part by part, each part's ascending: the gather order of a solution."""
        return np.argsort(self.owner, kind="stable")

    def counts(self):
        """Points owned by each part, shape (parts,)."""
        return np.bincount(self.owner, minlength=self.parts)

    def quality(self):
        """Balance and interface size, see :class:`PartitionQuality`."""
        mesh, owner, P = self.mesh, self.owner, self.parts
        n = mesh.n_points
        e = mesh_edges(mesh)
        a, b = owner[e[:, 0]], owner[e[:, 1]]
        cut = a != b
        degree = np.bincount(e.ravel(), minlength=n)
        used = np.ones(n, dtype=bool)
        used[mesh.unused_points()] = False
        entries = np.bincount(owner, weights=(degree + used).astype(np.float64), minlength=P)
        interface = np.zeros(n, dtype=bool)
        interface[e[cut].ravel()] = True
        # ghost j of part q: j not owned by q, sharing an edge with a point of q
        ec = e[cut]
        pairs = np.concatenate([a[cut].astype(np.int64) * n + ec[:, 1],
                                b[cut].astype(np.int64) * n + ec[:, 0]])
        ghost_pairs = np.unique(pairs)
        ghosts = np.bincount(ghost_pairs // n, minlength=P)
        part_pairs = np.unique(np.concatenate([a[cut].astype(np.int64) * P + b[cut],
                                               b[cut].astype(np.int64) * P + a[cut]]))
        neighbours = np.bincount(part_pairs // P, minlength=P)
        # a cell counts once in each part owning one of its vertices: its j-th vertex's part
        # counts unless an earlier vertex has the same part
        t = owner[mesh.cells]
        touched = np.zeros(P, dtype=np.int64)
        for j in range(t.shape[1]):
            first = np.ones(len(t), dtype=bool)
            for i in range(j):
                first &= t[:, j] != t[:, i]
            touched += np.bincount(t[first, j], minlength=P)
        return PartitionQuality(
            owned_points=self.counts(),
            owned_entries=entries.astype(np.int64),
            cells=touched,
            ghosts=ghosts.astype(np.int64),
            neighbours=neighbours.astype(np.int64),
            interface_points=int(interface.sum()),
            cut_edges=int(cut.sum()),
            dim=mesh.dim,
        )

    def __repr__(self):
        return (f"Partition({self.mesh.n_points} points into {self.parts} parts, "
                f"{self.method} by {self.weight})")


def _check(mesh, parts):
    if not isinstance(mesh, Mesh):
        raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
    parts = integer_option(parts, "parts", minimum=1)
    if parts > mesh.n_points:
        raise InputError(f"cannot split {mesh.n_points} points into {parts} parts: "
                         f"every part needs at least one point")
    return int(parts)


def _weights(mesh, weight):
    if weight == "points":
        return np.ones(mesh.n_points)
    if weight == "triangles" and mesh.dim != 2:
        raise InputError("partition weight 'triangles' is for triangle meshes; this mesh has "
                         "tetrahedra: use weight='cells'")
    return np.bincount(mesh.cells.ravel(), minlength=mesh.n_points).astype(np.float64)


def _cut_runs(weights, parts):
    """Part of each item of a sequence cut into ``parts`` contiguous runs of equal weight.

    An item goes to the run that contains the middle of its weight.  With
    unit weights the runs differ by at most one item.  Every run gets at
    least one item (items with zero weight may be moved to achieve that).
    """
    n = len(weights)
    total = float(weights.sum())
    if total <= 0:
        weights = np.ones(n)
        total = float(n)
    middle = np.cumsum(weights) - 0.5 * weights
    part = np.minimum((middle * (parts / total)).astype(np.int64), parts - 1)
    # first item of runs 1..parts-1, then moved so that every run has an item
    k = np.arange(1, parts)
    start = np.searchsorted(part, k, side="left")
    shift = np.minimum(np.maximum.accumulate(np.maximum(start - k, 0)), n - parts)
    out = np.zeros(n, dtype=np.int64)
    out[shift + k] = 1
    return np.cumsum(out)


def _hilbert(mesh, parts, w):
    order = np.argsort(hilbert_keys(mesh.points), kind="stable")
    owner = np.empty(mesh.n_points, dtype=np.int64)
    owner[order] = _cut_runs(w[order], parts)
    return owner


def _rcb(mesh, parts, w):
    xy = mesh.points
    owner = np.empty(mesh.n_points, dtype=np.int64)
    stack = [(np.arange(mesh.n_points), 0, parts)]
    while stack:
        idx, first, p = stack.pop()
        if p == 1:
            owner[idx] = first
            continue
        sub = xy[idx]
        ext = sub.max(axis=0) - sub.min(axis=0)
        axis = int(np.argmax(ext))  # the longest side; the first of equal ones
        # sorted along that axis, ties broken by the other axes in their order
        others = [a for a in range(xy.shape[1]) if a != axis]
        order = idx[np.lexsort(tuple(sub[:, a] for a in reversed(others)) + (sub[:, axis],))]
        left = p // 2
        side = _proportional(w[order], left, p)
        stack.append((order[side == 0], first, left))
        stack.append((order[side == 1], first + left, p - left))
    return owner


def _proportional(weights, left, parts):
    """0 for the first ``left / parts`` of the weight, 1 after; both sides non-empty."""
    n = len(weights)
    total = float(weights.sum())
    if total <= 0:
        weights, total = np.ones(n), float(n)
    middle = np.cumsum(weights) - 0.5 * weights
    k = int(np.searchsorted(middle, total * left / parts))
    k = min(max(k, left), n - (parts - left))
    side = np.zeros(n, dtype=np.int64)
    side[k:] = 1
    return side


def partition(mesh, parts, *, method="rcb", weight="points"):
    """Split ``mesh``'s points into ``parts`` parts; return a :class:`Partition`.

    Parameters
    ----------
    mesh : Mesh
    parts : int
        Number of parts (ranks), at most the number of points.
    method : {"rcb", "hilbert"}
        Recursive coordinate bisection (the default: the smaller interface
        on the built-in meshes, docs/distributed.md) or space-filling-curve
        runs (see the module docstring).
    weight : {"points", "cells", "triangles"}
        What to balance: owned points, or the cells (triangles or
        tetrahedra) around them; ``"triangles"`` is the older name of
        ``"cells"``, for triangle meshes.

    Examples
    --------
    >>> from hatkernels.mesh import rectangle
    >>> from hatkernels.distributed import partition
    >>> p = partition(rectangle(16, 16), 3)
    >>> p.counts().tolist()
    [96, 96, 97]
    >>> q = p.quality()
    >>> bool(q.imbalance < 0.05), q.interface_points > 0
    (True, True)
    >>> from hatkernels.mesh import cuboid
    >>> partition(cuboid(4, 4, 4), 2).counts().tolist()
    [62, 63]
    """
    parts = _check(mesh, parts)
    if method not in METHODS:
        raise InputError(f"unknown partition method {method!r}; choose one of {METHODS}")
    if weight not in WEIGHTS:
        raise InputError(f"unknown partition weight {weight!r}; choose one of {WEIGHTS}")
    w = _weights(mesh, weight)
    owner = _hilbert(mesh, parts, w) if method == "hilbert" else _rcb(mesh, parts, w)
    return _make(mesh, owner, parts, method, weight)


def _make(mesh, owner, parts, method, weight):
    owner = np.ascontiguousarray(owner, dtype=np.int32)
    owner.setflags(write=False)
    return Partition(mesh=mesh, owner=owner, parts=parts, method=method, weight=weight)


def partition_from_owner(mesh, owner, parts=None):
    """A :class:`Partition` from a given owner per point (from any partitioner).

    ``parts`` defaults to ``owner.max() + 1``; every part must own a point.
    The array is copied.
    """
    if not isinstance(mesh, Mesh):
        raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
    o = np.asarray(owner)
    if o.shape != (mesh.n_points,) or (o.size and o.dtype.kind not in "iu"):
        raise InputError(f"owner must be one integer part per point, shape ({mesh.n_points},), "
                         f"got {o.dtype} {o.shape}")
    parts = int(o.max()) + 1 if parts is None else _check(mesh, parts)
    bad = (o < 0) | (o >= parts)
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise InputError(f"owner[{k}] = {int(o[k])} is outside 0..{parts - 1}")
    counts = np.bincount(o, minlength=parts)
    if (counts == 0).any():
        raise InputError(f"part {int(np.argmin(counts))} owns no point; every part (rank) "
                         f"needs at least one")
    return _make(mesh, o, parts, "given", "given")
