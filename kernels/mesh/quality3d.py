"""Shape measures of tetrahedra: dihedral angles and the radius ratio.

The radius ratio ``3 r / R`` (inradius ``r``, circumradius ``R``) is 1 for the
regular tetrahedron and tends to 0 for every kind of flat or needle-like one
(A. Liu and B. Joe, Relationship between tetrahedron shape measures, BIT 34,
1994).  ``r = 3 V / S`` with ``S`` the total face area; the circumcentre
relative to ``x0`` is ``(|a|^2 (b x c) + |b|^2 (c x a) + |c|^2 (a x b)) /
(2 a . (b x c))`` with ``a, b, c`` the edges from ``x0`` (the solution of
``2 (x_k - x0) . y = |x_k - x0|^2`` by Cramer's rule; common practice, no source).
Dihedral angles come from the outward face normals ``n_k, n_l``: the interior
angle at their common edge is ``pi`` minus the angle between them.
"""

import dataclasses

import numpy as np

from hatkernels.mesh.tetrahedra import OUTWARD

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
    x = p[t]  # (M, 4, 3)
    f = x[:, OUTWARD]  # (M, 4, 3, 3): the outward faces
    normals = np.cross(f[:, :, 1] - f[:, :, 0], f[:, :, 2] - f[:, :, 0])  # twice the area
    norm = np.linalg.norm(normals, axis=2)
    angles = []
    for k in range(4):
        for m in range(k + 1, 4):
            cross = np.linalg.norm(np.cross(normals[:, k], normals[:, m]), axis=1)
            dot = (normals[:, k] * normals[:, m]).sum(axis=1)
            angles.append(np.degrees(np.arctan2(cross, -dot)))
    ang = np.column_stack(angles)
    dmin, dmax = ang.min(axis=1), ang.max(axis=1)
    volume = mesh.measures()
    a, b, c = x[:, 1] - x[:, 0], x[:, 2] - x[:, 0], x[:, 3] - x[:, 0]
    bc, ca, ab = np.cross(b, c), np.cross(c, a), np.cross(a, b)
    det = (a * bc).sum(axis=1)
    sq = [(v * v).sum(axis=1)[:, None] for v in (a, b, c)]
    centre = (sq[0] * bc + sq[1] * ca + sq[2] * ab) / (2 * det[:, None])
    circum = np.linalg.norm(centre, axis=1)
    inradius = 3 * volume / (0.5 * norm.sum(axis=1))
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
