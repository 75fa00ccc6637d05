"""Element geometry: areas and gradients of the P1 (barycentric) basis functions."""

import numpy as np

from hatkernels._jit import geometry as _jit_geometry
from hatkernels.errors import InputError, MeshError

__all__ = ["element_gradients"]


def _arrays(points, triangles):
    p = np.asarray(points)
    t = np.asarray(triangles)
    if p.ndim != 2 or p.shape[1] != 2 or p.dtype.kind != "f":
        raise InputError(f"points must be a float array of shape (n, 2), got {p.dtype} {p.shape}")
    if t.ndim != 2 or t.shape[1] != 3 or t.dtype.kind not in "iu":
        raise InputError(
            f"triangles must be an integer array of shape (m, 3), got {t.dtype} {t.shape}"
        )
    if t.size and (t.min() < 0 or t.max() >= len(p)):
        k = int(np.flatnonzero((t < 0).any(axis=1) | (t >= len(p)).any(axis=1))[0])
        raise InputError(
            f"triangle {k} refers to a point outside 0..{len(p) - 1}: {t[k].tolist()}"
        )
    return np.ascontiguousarray(p, dtype=np.float64), np.ascontiguousarray(t)


def _check_areas(areas, p, t):
    """Refuse what would give infinite or NaN gradients, naming the triangle.

    Checked on the result (one pass over ``areas``) rather than before the
    kernel: a zero or non-finite area is exactly what spoils the gradients,
    and the kernel itself is harmless on any float input.
    """
    if np.isfinite(areas).all() and areas.all():
        return
    bad = ~np.isfinite(areas) | (areas == 0)
    k = int(np.flatnonzero(bad)[0])
    tri = t[k].tolist()
    more = f"; {int(bad.sum())} triangles in all" if bad.sum() > 1 else ""
    nonfinite = [i for i in tri if not np.isfinite(p[i]).all()]
    if nonfinite:
        i = nonfinite[0]
        raise MeshError(
            f"triangle {k} has point {i} with a non-finite coordinate "
            f"({float(p[i, 0])!r}, {float(p[i, 1])!r}){more}"
        )
    if not np.isfinite(areas[k]):
        raise MeshError(f"triangle {k} (points {tri}) has an area that overflows{more}")
    raise MeshError(
        f"triangle {k} has zero area (points {tri[0]}, {tri[1]}, {tri[2]} are collinear){more}"
    )


def element_gradients(points, triangles, *, plain=False):
    """Areas and gradients of the barycentric coordinates of each triangle.

    Parameters
    ----------
    points : array_like, shape (n_points, 2)
    triangles : array_like, shape (n_triangles, 3)
        Counterclockwise triangles (as stored by :class:`hatkernels.Mesh`);
        for clockwise ones the area comes out negative.
    plain : bool
        Use the vectorised NumPy version instead of the numba kernel (they
        agree to round-off; the kernel avoids the (M, 3, 2) temporaries).

    Returns
    -------
    areas : ndarray, shape (n_triangles,)
    gradients : ndarray, shape (n_triangles, 3, 2)
        ``gradients[t, a]`` is the (constant) gradient of the hat function of
        vertex ``a`` on triangle ``t``; the three sum to zero.

    Raises
    ------
    InputError
        Wrong shapes or dtypes, a point index out of range (naming the triangle).
    MeshError
        A triangle with zero area or a non-finite coordinate (naming it): its
        gradients would be infinite or NaN.  (:class:`hatkernels.Mesh` refuses
        near-zero areas too; this check on raw arrays refuses exact zeros.)

    Examples
    --------
    >>> from hatkernels import element_gradients
    >>> area, g = element_gradients([[0., 0.], [1., 0.], [0., 1.]], [[0, 1, 2]])
    >>> area
    array([0.5])
    >>> g[0]
    array([[-1., -1.],
           [ 1.,  0.],
           [ 0.,  1.]])
    """
    p, t = _arrays(points, triangles)
    if not plain:
        areas, grads = _jit_geometry.element_gradients(p, t)
        _check_areas(areas, p, t)
        return areas, grads
    x = p[t]  # (M, 3, 2)
    e = np.roll(x, 1, axis=1) - np.roll(x, -1, axis=1)  # e[:, a] = x[a-1] - x[a+1]
    d = (x[:, 1, 0] - x[:, 0, 0]) * (x[:, 2, 1] - x[:, 0, 1]) - (x[:, 2, 0] - x[:, 0, 0]) * (
        x[:, 1, 1] - x[:, 0, 1]
    )
    areas = 0.5 * d
    _check_areas(areas, p, t)  # before dividing by d
    grads = np.empty_like(e)
    # the opposite edge x[a+2] - x[a+1] turned a quarter counterclockwise: (ex, ey) -> (-ey, ex)
    grads[..., 0] = -e[..., 1] / d[:, None]
    grads[..., 1] = e[..., 0] / d[:, None]
    return areas, grads
