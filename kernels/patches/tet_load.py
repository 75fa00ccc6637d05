"""The load of a callable source on a never-stored refined tetrahedral mesh, on the fly.

Each fine tetrahedron gets the rule of :func:`hatkernels.quadrature.tetrahedron_rule` (as
:func:`hatkernels.assemble_load` on the stored mesh): its quadrature points are made from
the coarse cell's points and the Kuhn lattice (:mod:`hatkernels._jit.patches3d`), a
block of coarse cells at a time, the callable is evaluated there and the fine cells'
loads are added into the lattice.  Memory: one block's points and values (about 200
bytes per fine tetrahedron of the block).
"""

from __future__ import annotations

import functools

import numpy as np

from hatkernels._jit import patches3d as _t
from hatkernels._jit import patches3d_moves as _m
from hatkernels.quadrature import tetrahedron_rule

__all__ = ["callable_tet_load"]

_BLOCK_CELLS = 2**19  # fine tetrahedra per block of coarse cells


@functools.lru_cache(maxsize=8)
def lattice_cells(n):
    """``(lam (T, 4, 4), corners (T, 4))``: the ``n^3`` fine cells of one coarse cell,
    their points' barycentric coordinates on it (divided by ``n``) and places in its
    lattice."""
    types = _t.kuhn_types()
    g = np.arange(n)
    base = np.stack(np.meshgrid(g, g, g, indexing="ij"), axis=-1).reshape(-1, 3)
    pts = base[:, None, None, :] + types[None]  # (B, 6, 4, 3)
    p1, p2, p3 = pts[..., 0], pts[..., 1], pts[..., 2]
    inside = ((n >= p1) & (p1 >= p2) & (p2 >= p3) & (p3 >= 0)).all(axis=2)
    pts = pts[inside]  # (n^3, 4, 3)
    p1, p2, p3 = pts[..., 0], pts[..., 1], pts[..., 2]
    lam = np.stack([n - p1, p1 - p2, p2 - p3, p3], axis=-1) / n
    corners = p1 * (p1 + 1) * (p1 + 2) // 6 + p2 * (p2 + 1) // 2 + p3
    for a in (lam, corners):
        a.setflags(write=False)
    return lam, np.ascontiguousarray(corners, dtype=np.int64)


def callable_tet_load(layout, coef, quadrature, volumes, out):
    """``out`` = the load of callable ``coef`` (parsed on the coarse mesh) on the finest
    level of ``layout``; ``volumes`` the coarse cells'; errors name the coarse cell of a
    bad value."""
    k = layout.k
    n = 2**k
    lam_t, corners = lattice_cells(n)
    rule, w = tetrahedron_rule(quadrature)  # (Q, 4), (Q,)
    mu = np.einsum("qr,trs->tqs", rule, lam_t)  # (T, Q, 4) on the coarse cell
    weights = rule * w[:, None]  # (Q, 4): w_q lam_q,r
    pts = layout.coarse.points[layout.topo[0]]  # (m, 4, 3) in Bey's order
    buffers = layout.buffers(k)
    m = layout.n_cells
    block = max(1, _BLOCK_CELLS // len(lam_t))
    for lo in range(0, m, block):
        cells = np.arange(lo, min(m, lo + block), dtype=np.int64)
        xyz = np.einsum("tqs,csd->dctq", mu, pts[cells])  # (3, c, T, Q)
        owners = np.broadcast_to(cells[:, None, None], xyz.shape[1:])
        f = coef.evaluate((xyz[0].ravel(), xyz[1].ravel(), xyz[2].ravel()), owners.ravel(),
                          owner="coarse cell")
        values = np.einsum("ctq,qr->ctr", f.reshape(xyz.shape[1:]), weights)
        values *= (volumes[cells] / n**3)[:, None, None]
        _m.add_cell_loads(values, corners, cells, n, layout.topo, out, *buffers,
                          lo + block >= m)
    return out
