"""Mesh quality summary: angles, areas, aspect ratios."""

import dataclasses

import numpy as np

__all__ = ["MeshQuality", "quality"]


@dataclasses.dataclass(frozen=True)
class MeshQuality:
    """Worst-case shape measures of a mesh (angles in degrees).

    ``aspect`` is the circumradius over twice the inradius: 1 for an
    equilateral triangle, large for slivers and needles.  Each extreme comes
    with the triangle where it occurs.
    """

    n_triangles: int
    min_angle: float
    min_angle_triangle: int
    max_angle: float
    max_angle_triangle: int
    min_area: float
    min_area_triangle: int
    max_area: float
    max_area_triangle: int
    max_aspect: float
    max_aspect_triangle: int

    def __str__(self):
        return (
            f"{self.n_triangles} triangles: angles {self.min_angle:.2f}..{self.max_angle:.2f} deg "
            f"(triangles {self.min_angle_triangle}, {self.max_angle_triangle}), "
            f"areas {self.min_area:.3g}..{self.max_area:.3g}, "
            f"max aspect {self.max_aspect:.3g} (triangle {self.max_aspect_triangle})"
        )


def quality(mesh):
    """Compute :class:`MeshQuality` for a mesh (vectorised, O(n_triangles)).

    >>> from hatkernels.mesh import rectangle
    >>> q = rectangle(4, 4).quality()
    >>> round(q.min_angle, 6), round(q.max_angle, 6)
    (45.0, 90.0)
    """
    p, t = mesh.points, mesh.triangles
    x = p[t]  # (M, 3, 2)
    # side a is opposite vertex a
    sides = np.linalg.norm(np.roll(x, -1, axis=1) - np.roll(x, 1, axis=1), axis=2)
    area = mesh.areas()
    # the angle at each vertex from its two sides; arctan2 is accurate for all angles
    e1 = np.roll(x, -1, axis=1) - x
    e2 = np.roll(x, 1, axis=1) - x
    cross = e1[..., 0] * e2[..., 1] - e1[..., 1] * e2[..., 0]
    dot = (e1 * e2).sum(axis=2)
    ang = np.degrees(np.arctan2(np.abs(cross), dot))
    amin, amax = ang.min(axis=1), ang.max(axis=1)
    s = sides.sum(axis=1) / 2
    aspect = sides.prod(axis=1) * s / (8 * area**2)
    i_amin, i_amax = int(amin.argmin()), int(amax.argmax())
    i_min, i_max, i_asp = int(area.argmin()), int(area.argmax()), int(aspect.argmax())
    return MeshQuality(
        n_triangles=int(len(t)),
        min_angle=float(amin[i_amin]),
        min_angle_triangle=i_amin,
        max_angle=float(amax[i_amax]),
        max_angle_triangle=i_amax,
        min_area=float(area[i_min]),
        min_area_triangle=i_min,
        max_area=float(area[i_max]),
        max_area_triangle=i_max,
        max_aspect=float(aspect[i_asp]),
        max_aspect_triangle=i_asp,
    )
