"""Shape measures of tetrahedra: dihedral angles and the radius ratio.

The radius ratio ``3 r / R`` (inradius ``r``, circumradius ``R``) is 1 for the
regular tetrahedron and tends to 0 for every kind of flat or needle-like one
(A. Liu and B. Joe, Relationship between tetrahedron shape measures, BIT 34,
1994).  ``r = 3 V / S`` with ``S`` the total face area; the circumcentre
relative to ``x0`` is ``(|a|^2 (b x c) + |b|^2 (c x a) + |c|^2 (a x b)) /
(2 a . (b x c))`` with ``a, b, c`` the edges from ``x0`` (the solution of
``2 (x_k - x0) . y = |x_k - x0|^2`` by Cramer's rule; common practice, no source).
Dihedral angles come from the outward face normals ``n_k, n_l``: the interior
angle at their common edge is ``pi`` minus the angle between them; the
gradients of the barycentric coordinates point along ``-n_k``.
"""

import dataclasses

import numpy as np

from hatkernels._jit import geometry as _jit_geometry

__all__ = ["TetrahedronQuality", "tetrahedron_quality"]


@dataclasses.dataclass(frozen=True)
class TetrahedronQuality:
    """Worst-case shape measures of a tetrahedral mesh (angles in degrees).

    Dihedral angles are 70.53 degrees (``arccos(1/3)``) for the regular
    tetrahedron; small and large ones both hurt the stiffness matrix.  Each
    extreme comes with the tetrahedron where it occurs.
    """

    n_cells: int
    min_dihedral: float
    min_dihedral_cell: int
    max_dihedral: float
    max_dihedral_cell: int
    min_volume: float
    min_volume_cell: int
    max_volume: float
    max_volume_cell: int
    min_radius_ratio: float
    min_radius_ratio_cell: int

    def __str__(self):
        return (
            f"{self.n_cells} tetrahedra: dihedral angles {self.min_dihedral:.2f}.."
            f"{self.max_dihedral:.2f} deg (tetrahedra {self.min_dihedral_cell}, "
            f"{self.max_dihedral_cell}), volumes {self.min_volume:.3g}..{self.max_volume:.3g}, "
            f"min radius ratio {self.min_radius_ratio:.3g} (tetrahedron "
            f"{self.min_radius_ratio_cell})"
        )


def tetrahedron_quality(mesh):
    """Compute :class:`TetrahedronQuality` for a tetrahedral mesh (vectorised).

    >>> from hatkernels.mesh import cuboid
    >>> q = cuboid(2, 2, 2).quality()
    >>> round(q.min_dihedral, 6), round(q.max_dihedral, 6)
    (45.0, 90.0)
    """
    p, t = mesh.points, mesh.cells
    # The gradient of the coordinate of vertex k is -n_k |F_k| / (3 V), n_k the unit
    # outward normal of the face opposite k: its direction gives the dihedral angles
    # and its length the face areas, so r = 3 V / sum |F_k| = 1 / sum |grad_k|.
    volume, g, _ = _jit_geometry.tetrahedron_gradients(p, t)
    length = np.sqrt((g * g).sum(axis=2))
    angles = np.empty((len(t), 6))
    for n, (k, m) in enumerate(((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3))):
        cross = np.sqrt((np.cross(g[:, k], g[:, m]) ** 2).sum(axis=1))
        dot = (g[:, k] * g[:, m]).sum(axis=1)
        angles[:, n] = np.arctan2(cross, -dot)
    del g
    dmin, dmax = np.degrees(angles.min(axis=1)), np.degrees(angles.max(axis=1))
    del angles
    inradius = 1.0 / length.sum(axis=1)
    x0 = p[t[:, 0]]
    a, b, c = p[t[:, 1]] - x0, p[t[:, 2]] - x0, p[t[:, 3]] - x0
    bc, ca, ab = np.cross(b, c), np.cross(c, a), np.cross(a, b)
    det = (a * bc).sum(axis=1)
    sq = [(v * v).sum(axis=1)[:, None] for v in (a, b, c)]
    centre = (sq[0] * bc + sq[1] * ca + sq[2] * ab) / (2 * det[:, None])
    circum = np.sqrt((centre * centre).sum(axis=1))
    ratio = 3 * inradius / circum
    i_dmin, i_dmax = int(dmin.argmin()), int(dmax.argmax())
    i_vmin, i_vmax, i_r = int(volume.argmin()), int(volume.argmax()), int(ratio.argmin())
    return TetrahedronQuality(
        n_cells=int(len(t)),
        min_dihedral=float(dmin[i_dmin]),
        min_dihedral_cell=i_dmin,
        max_dihedral=float(dmax[i_dmax]),
        max_dihedral_cell=i_dmax,
        min_volume=float(volume[i_vmin]),
        min_volume_cell=i_vmin,
        max_volume=float(volume[i_vmax]),
        max_volume_cell=i_vmax,
        min_radius_ratio=float(ratio[i_r]),
        min_radius_ratio_cell=i_r,
    )
