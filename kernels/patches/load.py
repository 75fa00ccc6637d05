"""The load of a callable source on a never-stored refined mesh, evaluated on the fly.

Each fine triangle gets the rule of :func:`hatkernels.quadrature.triangle_rule` (as
:func:`hatkernels.assemble_load` on the stored mesh): its quadrature points are made
from the coarse cell's corners and the lattice, a block of coarse cells at a time, the
callable is evaluated there, and the triangle's loads are added into the patch.  Memory:
one block's points and values (about 50 bytes per fine triangle of the block).
"""

from __future__ import annotations

import functools

import numpy as np

from hatkernels._jit import patch_load as _pl
from hatkernels.quadrature import triangle_rule

__all__ = ["callable_load"]

_BLOCK_TRIANGLES = 2**20  # fine triangles per block of coarse cells


@functools.lru_cache(maxsize=16)
def _lattice_triangles(n):
    """``(lam (T, 3, 3), corners (T, 3))``: the fine triangles of one patch, their corners'
    barycentric coordinates on the coarse cell (rows of A, B, C roles) and places in the
    packed patch.  Up triangles ``(a, b), (a+1, b), (a, b+1)``, then down triangles
    ``(a+1, b+1), (a, b+1), (a+1, b)``: each the coarse cell's corners in the same roles."""
    up = [(a, b) for b in range(n) for a in range(n - b)]
    down = [(a, b) for b in range(n - 1) for a in range(n - 1 - b)]
    ij = np.array([[(a, b), (a + 1, b), (a, b + 1)] for a, b in up]
                  + [[(a + 1, b + 1), (a, b + 1), (a + 1, b)] for a, b in down],
                  dtype=np.int64).reshape(-1, 3, 2)
    i, j = ij[..., 0], ij[..., 1]
    lam = np.stack([n - i - j, i, j], axis=-1) / n
    corners = j * (n + 1) - (j * (j - 1)) // 2 + i
    for a in (lam, corners):
        a.setflags(write=False)
    return lam, np.ascontiguousarray(corners)


def callable_load(layout, coef, quadrature, out):
    """``out`` = the load of callable ``coef`` (parsed on the coarse mesh) on the finest
    level of ``layout``; errors name the coarse cell of a bad value."""
    coarse, k = layout.coarse, layout.k
    n = 2**k
    lam_t, corners = _lattice_triangles(n)
    rule, w = triangle_rule(quadrature)  # (Q, 3), (Q,)
    # quadrature points of every fine triangle in coarse barycentric coordinates
    mu = np.einsum("qr,trs->tqs", rule, lam_t)  # (T, Q, 3)
    weights = rule * w[:, None]  # (Q, 3): w_q lam_q,r
    p = coarse.points[coarse.triangles]  # (m, 3, 2)
    d1, d2 = p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]
    fine_area = 0.5 * np.abs(d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0]) / (n * n)
    pe, pv = layout.buffers(k)
    m = coarse.n_triangles
    block = max(1, _BLOCK_TRIANGLES // len(lam_t))
    for lo in range(0, m, block):
        cells = np.arange(lo, min(m, lo + block), dtype=np.int64)
        xy = np.einsum("tqs,csd->dctq", mu, p[cells])  # (2, c, T, Q)
        owners = np.broadcast_to(cells[:, None, None], xy.shape[1:])
        f = coef.evaluate((xy[0].ravel(), xy[1].ravel()), owners.ravel(), owner="coarse cell")
        values = np.einsum("ctq,qr->ctr", f.reshape(xy.shape[1:]), weights)
        values *= fine_area[cells, None, None]
        _pl.add_triangle_loads(values, corners, cells, n, layout.topo, out, pe, pv,
                               lo + block >= m)
    return out
