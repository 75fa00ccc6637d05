"""Tetrahedral mesh generators: a cuboid, a ball, and Delaunay of given points in space.

Cubes are cut into six tetrahedra around a main diagonal, one for each order
in which a path along the cube's edges can take the three axes from one end
of the diagonal to the other (H. W. Kuhn, Some combinatorial lemmas in
topology, IBM J. Res. Dev. 4, 1960; H. Freudenthal, Simplizialzerlegungen
von beschraenkter Flachheit, Ann. of Math. 43, 1942).  Each square face of a
cube is then cut along its own diagonal between the corresponding corners,
so neighbouring cubes cut their common face alike: the mesh is conforming.
"""

import itertools
import warnings

import numpy as np
from scipy.spatial import ConvexHull, Delaunay

from hatkernels.checks import integer_option, real_option
from hatkernels.errors import InputError, MeshError, MeshWarning
from hatkernels.mesh.core import Mesh
from hatkernels.mesh.core_index import index_dtype
from hatkernels.mesh.tetrahedra import OUTWARD, longest_edge_sq, six_volumes

__all__ = ["cuboid", "ball", "tetrahedralise"]

#: The six orders of the axes, with the sign of each permutation: the
#: tetrahedron x0, x0 + e_p, x0 + e_p + e_q, x0 + e_p + e_q + e_r has
#: ``det(e_p, e_p + e_q, e_p + e_q + e_r) = det(e_p, e_q, e_r)``, that sign.
_ORDERS = [(p, 1 if (p[1] - p[0]) % 3 == 1 else -1) for p in itertools.permutations(range(3))]


def _bounds3(bounds):
    try:
        x0, x1, y0, y1, z0, z1 = (float(b) for b in bounds)
    except (TypeError, ValueError):
        raise InputError(
            f"bounds must be six numbers (x0, x1, y0, y1, z0, z1), got {bounds!r}") from None
    if not all(np.isfinite([x0, x1, y0, y1, z0, z1])) or not (x0 < x1 and y0 < y1 and z0 < z1):
        raise InputError(
            f"bounds must satisfy x0 < x1, y0 < y1 and z0 < z1 (finite), got {bounds!r}")
    return x0, x1, y0, y1, z0, z1


def _grid_tetrahedra(nx, ny, nz, flip=None):
    """Tetrahedra (6 nx ny nz, 4) of a grid of cubes whose points are numbered x fastest,
    and which of them are stored swapped (6 nx ny nz,).

    Each tetrahedron's points run along a path through its cube, one axis step
    at a time, from the diagonal's start to its end (Kuhn's simplices).  Half
    of them are negatively oriented in that order and are stored with their
    last two points swapped; refinement undoes the swap first
    (:func:`hatkernels.mesh.refine3d.refine_tetrahedra`), so that Bey's rule
    splits every tetrahedron along its path and the refined grid is again
    the finer grid cut the same way.  ``flip`` (3, nx ny nz) of bools turns
    the diagonal of a cube over along the axes where it is True (its start at
    the cube's high side on that axis).
    """
    k, rest = np.divmod(np.arange(nx * ny * nz, dtype=np.int64), nx * ny)
    j, i = np.divmod(rest, nx)
    stride = np.array([1, nx + 1, (nx + 1) * (ny + 1)], dtype=np.int64)
    base = (k * (ny + 1) + j) * (nx + 1) + i
    step = np.broadcast_to(stride[:, None], (3, base.size)).copy()
    sign = np.ones(base.size, dtype=np.int64)
    if flip is not None:
        base = base + (flip * stride[:, None]).sum(axis=0)
        step[flip] *= -1
        sign = np.where(flip.sum(axis=0) % 2 == 1, -1, 1)
    tets = np.empty((base.size, 6, 4), dtype=np.int64)
    swapped = np.empty((base.size, 6), dtype=bool)
    for n, (order, parity) in enumerate(_ORDERS):
        v = base
        tets[:, n, 0] = v
        for a in range(3):
            v = v + step[order[a]]
            tets[:, n, a + 1] = v
        swap = parity * sign < 0
        tets[swap, n, 2], tets[swap, n, 3] = tets[swap, n, 3], tets[swap, n, 2].copy()
        swapped[:, n] = swap
    return tets.reshape(-1, 4), swapped.reshape(-1)


def _grid_points(x, y, z):
    Z, Y, X = np.meshgrid(z, y, x, indexing="ij")
    return np.column_stack([X.ravel(), Y.ravel(), Z.ravel()])


def cuboid(nx, ny=None, nz=None, *, bounds=(0.0, 1.0, 0.0, 1.0, 0.0, 1.0)):
    """Structured tetrahedral mesh of a box with ``nx`` by ``ny`` by ``nz`` cubes.

    Points are numbered x fastest, then y, then z: point
    ``(k (ny + 1) + j) (nx + 1) + i`` sits at column ``i``, row ``j``, layer
    ``k``.  Each cube is cut into six tetrahedra around its main diagonal
    (from its lowest corner to its highest); tetrahedra ``6 c .. 6 c + 5``
    fill cube ``c = (k ny + j) nx + i``.  All positively oriented.

    Parameters
    ----------
    nx, ny, nz : int
        Cubes along x, y and z (``ny`` and ``nz`` default to ``nx``).
    bounds : (x0, x1, y0, y1, z0, z1)

    >>> from hatkernels.mesh import cuboid
    >>> m = cuboid(2, 1, 1)
    >>> m, float(m.measures().sum())
    (Mesh(12 points, 12 tetrahedra), 1.0)
    """
    nx = integer_option(nx, "nx", minimum=1)
    ny = nx if ny is None else integer_option(ny, "ny", minimum=1)
    nz = nx if nz is None else integer_option(nz, "nz", minimum=1)
    x0, x1, y0, y1, z0, z1 = _bounds3(bounds)
    points = _grid_points(np.linspace(x0, x1, nx + 1), np.linspace(y0, y1, ny + 1),
                          np.linspace(z0, z1, nz + 1))
    cells, swapped = _grid_tetrahedra(nx, ny, nz)
    mesh = Mesh._trusted(points, cells.astype(index_dtype(len(points))))
    mesh._stored_swapped = swapped
    return mesh


def ball(n, *, radius=1.0, center=(0.0, 0.0, 0.0)):
    """Ball of ``n`` cubes from the centre to the surface along each axis; the
    boundary points lie on the sphere.

    The cube ``[-1, 1]^3`` with ``2n`` cubes a side is cut as :func:`cuboid`
    does, but with each cube's diagonal pointing away from the centre (the
    cut reflected into each octant, which keeps it conforming: neighbours
    across a coordinate plane are mirror images), and mapped onto the ball by
    ``x -> radius |x|_inf x / |x|_2``, which takes the surface of each cube
    ``|x|_inf = s`` onto the sphere of radius ``radius s``.  ``48 n^3``
    tetrahedra, ``(2n + 1)^3`` points.  Every tetrahedron lies in the ball, so
    the volume approaches ``4/3 pi radius^3`` from below.

    >>> from hatkernels.mesh import ball
    >>> ball(2)
    Mesh(125 points, 384 tetrahedra)
    """
    n = integer_option(n, "n", minimum=1)
    radius = real_option(radius, "radius", positive=True)
    try:
        c = np.array([real_option(v, "center") for v in center])
    except (TypeError, ValueError):
        raise InputError(f"center must be three finite numbers, got {center!r}") from None
    if c.shape != (3,):
        raise InputError(f"center must be three finite numbers, got {center!r}")
    m = 2 * n
    s = np.arange(-n, n + 1) / n
    x = _grid_points(s, s, s)
    # cube (i, j, k) lies on the negative side of an axis when its index is below n
    k, rest = np.divmod(np.arange(m ** 3), m * m)
    j, i = np.divmod(rest, m)
    flip = np.stack([i < n, j < n, k < n])
    cells, swapped = _grid_tetrahedra(m, m, m, flip)
    inf = np.abs(x).max(axis=1)
    two = np.linalg.norm(x, axis=1)
    scale = np.divide(inf, two, out=np.zeros_like(inf), where=two > 0)
    points = c + radius * x * scale[:, None]
    mesh = Mesh._trusted(points, cells.astype(index_dtype(len(points))))
    mesh._stored_swapped = swapped
    return mesh


def tetrahedralise(p, degenerate_tol):
    """Delaunay tetrahedra of checked points (n, 3), positively oriented; see
    :func:`hatkernels.mesh.triangulate`.

    Qhull fills the convex hull; on cospherical points (a grid) it may add
    tetrahedra of (near) zero volume.  Those are dropped with a MeshWarning
    when that leaves a conforming mesh, which is when the faces left alone
    by the drop all lie on the hull: the boundary faces then have the hull's
    area.  A sliver inside the hull leaves two differently cut copies of its
    quadrilateral as boundary faces, their area twice over: refused.
    """
    if len(p) < 4:
        raise InputError(f"need at least 4 points to tetrahedralise, got {len(p)}")
    try:
        cells = Delaunay(p).simplices
        hull_area = ConvexHull(p).area
    except Exception as exc:  # Qhull errors for all-coplanar input and the like
        raise InputError(
            f"the points cannot be tetrahedralised: {str(exc).strip().splitlines()[0]}"
        ) from None
    det = six_volumes(p, cells)
    e2 = longest_edge_sq(p, cells)
    with np.errstate(all="ignore"):
        flat = ~(np.abs(det) > degenerate_tol * e2 * np.sqrt(e2))
    if flat.any():
        kept = cells[~flat]
        faces = kept[:, OUTWARD].reshape(-1, 3)
        keys = np.sort(faces, axis=1)
        _, inverse, counts = np.unique(keys, axis=0, return_inverse=True, return_counts=True)
        b = faces[counts[inverse.ravel()] == 1]
        x = p[b]
        area = 0.5 * np.linalg.norm(np.cross(x[:, 1] - x[:, 0], x[:, 2] - x[:, 0]), axis=1).sum()
        first = int(np.flatnonzero(flat)[0])
        if not abs(area - hull_area) <= 1e-9 * hull_area:
            raise MeshError(
                f"Delaunay made {int(flat.sum())} tetrahedra of (near) zero volume, some inside"
                f" the hull (cospherical points, as on a regular grid; first: points "
                f"{', '.join(map(str, sorted(cells[first].tolist())))}); dropping them would "
                f"leave the mesh non-conforming: move the points slightly, or use cuboid")
        warnings.warn(
            f"dropped {int(flat.sum())} flat tetrahedra that Delaunay made on coplanar hull "
            f"points", MeshWarning, stacklevel=3)
        cells, det = kept, det[~flat]
    cells = cells.copy()
    neg = det < 0
    cells[neg, 2], cells[neg, 3] = cells[neg, 3], cells[neg, 2].copy()
    return cells
