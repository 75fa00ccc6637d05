"""One part's piece of the mesh: owned points, the cells touching them, one layer of ghosts.

A :class:`Subdomain` numbers its points locally: the owned points first
(ascending global number), then the ghost points grouped by the part that
owns them (ascending global number within a group).  Grouping makes the
values received from each neighbour one contiguous slice of a local vector,
so halo receives land in place with no unpacking.

The cells of a subdomain (triangles, or tetrahedra in 3-D) are every cell
with at least one owned vertex, in ascending global order.  That makes the
owned rows of anything assembled on the local mesh complete and, because
each point sees its cells in the same order as in the whole mesh, equal to
the rows of the whole mesh's matrix bit for bit.  Ghost rows are partial and
are dropped.

Coefficients are restricted to the subdomain by :func:`local_coefficient`;
for callables, messages about bad values keep naming the global cell.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from hatkernels.checks import integer_option
from hatkernels.coefficients import Coefficient, parse_coefficient
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh, index_dtype
from hatkernels.mesh.tags import restricted_tags

__all__ = ["Subdomain", "subdomain", "local_coefficient"]


@dataclasses.dataclass(frozen=True, repr=False)
class Subdomain:
    """The local mesh of one part and how its points relate to the other parts.

    Attributes
    ----------
    part, parts : int
    points : ndarray, shape (n_local,)
        Global number of each local point: owned ones first, then ghosts.
    n_owned : int
    cells : ndarray, shape (n_local_cells,)
        Global number of each local cell (triangle or tetrahedron), ascending.
        ``triangles`` is its name on triangle meshes.
    mesh : Mesh
        The local mesh, in local numbering.
    ghost_owner : ndarray, shape (n_ghosts,)
        Part owning each ghost point (non-decreasing).
    neighbours : ndarray
        Parts this one exchanges values with, ascending (the relation is
        symmetric: a part owns one of my ghosts iff I own one of its).
    recv_offsets : ndarray, shape (len(neighbours) + 1,)
        Ghosts ``recv_offsets[k]:recv_offsets[k+1]`` (counted from the first
        ghost) are owned by ``neighbours[k]``.
    send : tuple of ndarray
        Local numbers of the owned points that are ghosts of ``neighbours[k]``,
        in the order that neighbour stores them (ascending global number).
    """

    part: int
    parts: int
    points: np.ndarray
    n_owned: int
    cells: np.ndarray
    mesh: Mesh
    ghost_owner: np.ndarray
    neighbours: np.ndarray
    recv_offsets: np.ndarray
    send: tuple

    @property
    def n_ghosts(self):
        return len(self.points) - self.n_owned

    @property
    def triangles(self):
        """The local cells of a triangle mesh (:attr:`cells`); an InputError in 3-D."""
        if self.mesh.dim != 2:
            raise InputError("Subdomain.triangles is not available for tetrahedra: use .cells")
        return self.cells

    @property
    def owned(self):
        """Global numbers of the owned points, ascending."""
        return self.points[: self.n_owned]

    def local_numbers(self, global_points, n_points):
        """Local number of each global point (-1 where the subdomain does not have it)."""
        local = np.full(n_points, -1, dtype=np.int64)
        local[self.points] = np.arange(len(self.points))
        return local[np.asarray(global_points, dtype=np.int64)]

    def __repr__(self):
        return (f"Subdomain(part {self.part} of {self.parts}: {self.n_owned} owned + "
                f"{self.n_ghosts} ghost points, {len(self.cells)} "
                f"{'triangles' if self.mesh.dim == 2 else 'tetrahedra'}, "
                f"neighbours {self.neighbours.tolist()})")


def subdomain(partition, part):
    """The :class:`Subdomain` of ``part`` in a :class:`~hatkernels.distributed.Partition`.

    Costs O(n_points + n_cells) on the whole mesh (the replicated-input
    path; see docs/distributed.md for the scalable one).

    Examples
    --------
    >>> from hatkernels.mesh import rectangle
    >>> from hatkernels.distributed import partition, subdomain
    >>> s = subdomain(partition(rectangle(4, 4), 2), 0)
    >>> s.n_owned, s.n_ghosts, s.neighbours.tolist()
    (12, 6, [1])
    >>> from hatkernels.mesh import cuboid
    >>> subdomain(partition(cuboid(3, 3, 3), 2), 1)
    Subdomain(part 1 of 2: 32 owned + 16 ghost points, 108 tetrahedra, neighbours [0])
    """
    part = integer_option(part, "part", minimum=0, maximum=partition.parts - 1)
    mesh, owner = partition.mesh, partition.owner
    n = mesh.n_points
    cells = mesh.cells
    mine = owner[cells] == part
    tids = np.flatnonzero(mine.any(axis=1))
    lt = cells[tids]
    present = np.zeros(n, dtype=bool)
    present[lt.ravel()] = True
    is_owned = owner == part
    owned = np.flatnonzero(is_owned)
    ghosts = np.flatnonzero(present & ~is_owned)
    ghosts = ghosts[np.argsort(owner[ghosts], kind="stable")]
    points = np.concatenate([owned, ghosts])
    dt = index_dtype(len(points))
    local = np.full(n, -1, dtype=np.int64)
    local[points] = np.arange(len(points))
    lmesh = Mesh._trusted(mesh.points[points], local[lt].astype(dt))
    if mesh.tags is not None:  # regions and boundary tags, in local numbers
        lmesh._tags = restricted_tags(mesh.tags, lmesh, tids, local)

    ghost_owner = owner[ghosts].astype(np.int32)
    neighbours = np.unique(ghost_owner)
    recv_offsets = np.searchsorted(ghost_owner, np.append(neighbours, partition.parts))
    n_owned = len(owned)
    send = _send_lists(lmesh.cells, n_owned, ghost_owner, neighbours, len(points))
    for a in (points, tids, ghost_owner, neighbours, recv_offsets, *send):
        a.setflags(write=False)
    return Subdomain(part=part, parts=partition.parts, points=points, n_owned=n_owned,
                     cells=tids, mesh=lmesh, ghost_owner=ghost_owner,
                     neighbours=neighbours, recv_offsets=recv_offsets, send=send)


def _send_lists(lcells, n_owned, ghost_owner, neighbours, n_local):
    """For each neighbour, the owned local points sharing a cell with one of its points."""
    k = lcells.shape[1]
    i, j = np.nonzero(~np.eye(k, dtype=bool))  # every ordered pair of a cell's vertices
    a = lcells[:, i].ravel()
    b = lcells[:, j].ravel()
    keep = (a < n_owned) & (b >= n_owned)
    q = ghost_owner[b[keep] - n_owned].astype(np.int64)
    key = np.unique(q * n_local + a[keep])
    qs, pts = np.divmod(key, n_local)
    if not np.array_equal(np.unique(qs), neighbours):  # cannot happen on a valid mesh
        raise RuntimeError("subdomain: the parts owning my ghosts and the parts I send to differ")
    cuts = np.searchsorted(qs, neighbours[1:])
    dt = index_dtype(n_local)
    return tuple(p.astype(dt) for p in np.split(pts, cuts)) if len(neighbours) else ()


@dataclasses.dataclass(frozen=True)
class _LocalCallable(Coefficient):
    """A callable coefficient on a subdomain whose messages name global cells or sides.

    ``evaluate`` is called with local owner numbers; they are mapped to the
    global ones before the check (``cell_map`` for triangles and tetrahedra,
    ``side_map`` for edges and faces).  ``__call__`` makes the object pass for
    a plain callable where a function is expected (boundary data).
    """

    cell_map: np.ndarray = None
    side_map: np.ndarray = None

    def evaluate(self, coords, owners, owner="triangle"):
        table = self.side_map if owner in ("edge", "face") else self.cell_map
        if table is not None:
            owners = table[np.asarray(owners, dtype=np.int64)]
        return super().evaluate(coords, owners, owner)

    def __call__(self, *coords):
        return self.value(*coords)


def local_coefficient(coef, sub, *, edge_map=None):
    """Restrict a :class:`~hatkernels.coefficients.Coefficient` of the whole mesh to ``sub``.

    Values per cell follow ``sub.cells``, per point ``sub.points``;
    constants and (d, d) tensors are shared; callables are evaluated where
    the local mesh needs them (same points, same values), and ``edge_map``
    (local side -> global side number: edges, or faces in 3-D) names sides in
    their messages.
    """
    if not isinstance(coef, Coefficient):
        raise InputError(f"expected a parsed Coefficient, got {type(coef).__name__}")
    kind, value = coef.kind, coef.value
    if kind == "callable":
        return _LocalCallable(kind, value, coef.name, coef.sign,
                              cell_map=sub.cells, side_map=edge_map)
    if kind == "cell" or (kind == "tensor" and np.ndim(value) == 3):
        value = value[sub.cells]
    elif kind == "point":
        value = value[sub.points]
    return Coefficient(kind, value, coef.name, coef.sign)


def parse_local(value, mesh, sub, *, name, sign="positive", tensor=False):
    """Parse ``value`` on the whole mesh (checks every value once) and restrict it to ``sub``."""
    return local_coefficient(parse_coefficient(value, mesh, name=name, sign=sign, tensor=tensor),
                             sub)
