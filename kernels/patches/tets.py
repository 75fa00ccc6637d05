"""A never-stored refined tetrahedral mesh: its layout and its stiffness operator, cell by
cell on the Kuhn lattices of :mod:`hatkernels._jit.patches3d` (the multigrid:
:mod:`hatkernels.patches.tet_multigrid`).

The same idea as the triangle patches (:mod:`hatkernels.patches.layout` and
:mod:`hatkernels.patches.multigrid`; B. Bergen, T. Gradl, F. Hulsemann and U. Rude,
Computing in Science & Engineering 8(6), 2006; B. Gmeiner, U. Rude, H. Stengel,
C. Waluga and B. Wohlmuth, Numer. Math. Theory Methods Appl. 8, 2015): on each coarse
tetrahedron refined by Bey's rule the fine mesh is a lattice, so the stiffness matrix
is a stencil per coarse cell and only vectors of the fine size are stored.  In 3-D the
fine cells are not congruent to the coarse one (six Kuhn types under one affine map),
so each coarse cell keeps 15 classes of 15 weights instead of one element matrix.
"""

from __future__ import annotations

import numpy as np
from scipy.sparse.linalg import LinearOperator

from hatkernels._jit import patches3d as _t
from hatkernels._jit import patches3d_moves as _m
from hatkernels.checks import integer_option, into_vectors
from hatkernels.errors import InputError
from hatkernels.mesh.refine3d import bey_order, unique_edges
from hatkernels.mesh.tetrahedra import face_topology

__all__ = ["TetLayout", "TetOperator", "PiecewiseDiagonal", "block_values", "class_weights",
           "CLASS_CELLS"]

_INCIDENCE = _t.class_incidence()
#: Per class: the fine cells at a point of that class inside its coarse cell.
CLASS_CELLS = np.array([len(rows) // 4 for rows in _INCIDENCE], dtype=np.int64)


def _slots():
    slots = np.zeros((15, 15), dtype=np.int64)
    count = np.zeros(15, dtype=np.int64)
    for z, rows in enumerate(_INCIDENCE):
        used = np.unique(rows[:, 3])
        slots[z, :used.size] = used
        count[z] = used.size
    return slots, count


_SLOTS, _N_SLOTS = _slots()


def _incidence_csr(owner_of, n_owners):
    """``(ptr, cell, local)`` listing, for each owner (edge, vertex), the cells holding it
    (increasing) and its local number there; ``owner_of`` is (m, j)."""
    m, j = owner_of.shape
    flat = owner_of.reshape(-1)
    order = np.lexsort((np.repeat(np.arange(m), j), flat))
    ptr = np.zeros(n_owners + 1, dtype=np.int64)
    np.cumsum(np.bincount(flat, minlength=n_owners), out=ptr[1:])
    return ptr, np.ascontiguousarray(order // j), np.ascontiguousarray(order % j)


def class_weights(cells_points, kappa):
    """``W[c, Z, slot]``: the stiffness stencil of each class ``Z`` of coarse cell ``c``
    at ``n = 1`` (level ``n`` has ``W / n``), from the element matrices of the six Kuhn
    types under the cell's map; ``cells_points`` (m, 4, 3) in Bey's order."""
    x = cells_points
    J = np.stack([x[:, 1] - x[:, 0], x[:, 2] - x[:, 1], x[:, 3] - x[:, 2]], axis=2)  # columns
    vol = np.abs(np.linalg.det(J)) / 6.0
    Jinv = np.linalg.inv(J)
    types = _t.kuhn_types()
    K = np.empty((x.shape[0], 6, 4, 4))
    for t in range(6):
        Q = types[t, 1:].T.astype(np.float64)  # E = J Q: edges from the type's first point
        G = np.linalg.inv(Q) @ Jinv  # rows: gradients of lam1..lam3
        G = np.concatenate([-G.sum(axis=1, keepdims=True), G], axis=1)
        K[:, t] = (kappa * vol)[:, None, None] * np.einsum("cai,cbi->cab", G, G)
    W = np.zeros((x.shape[0], 15, 15))
    for z, rows in enumerate(_INCIDENCE):
        for t, a, b, s in rows:
            W[:, z, s] += K[:, t, a, b]
    return W, vol


class TetLayout:
    """The coarse tetrahedral mesh ``coarse`` seen as lattices refined ``k`` times.

    Parameters
    ----------
    coarse : Mesh
        A tetrahedral mesh (3-D).
    k : int
        Refinements (``n = 2**k`` fine edges per coarse edge).
    held_faces : ndarray (h, 3), optional
        Coarse faces (point triples, any order; on the boundary, or inside as a held
        interface) whose fine points are held.
    """

    def __init__(self, coarse, k, held_faces=None):
        k = integer_option(k, "k (refinements)", minimum=0, maximum=20)
        if coarse.dim != 3:
            raise InputError("TetLayout takes tetrahedral meshes (3-D)")
        self.coarse, self.k = coarse, int(k)
        V = np.ascontiguousarray(bey_order(coarse), dtype=np.int64)
        m, nv = V.shape[0], coarse.n_points
        faces, cell_faces, _ = face_topology(V)
        faces = np.ascontiguousarray(faces, dtype=np.int64)
        cell_faces = np.ascontiguousarray(cell_faces, dtype=np.int64)
        nf = faces.shape[0]
        fptr, fcell, flocal = _incidence_csr(cell_faces, nf)
        FC = np.full((nf, 2), -1, dtype=np.int64)
        FL = np.zeros((nf, 2), dtype=np.int64)
        two = np.diff(fptr) == 2
        FC[:, 0], FL[:, 0] = fcell[fptr[:-1]], flocal[fptr[:-1]]
        FC[two, 1], FL[two, 1] = fcell[fptr[:-1][two] + 1], flocal[fptr[:-1][two] + 1]
        edges, cell_edges = unique_edges(V, nv)
        EV = np.ascontiguousarray(edges, dtype=np.int64)
        CE = np.ascontiguousarray(cell_edges, dtype=np.int64)
        eptr, ecell, ele = _incidence_csr(CE, EV.shape[0])
        vptr, vcell, vlv = _incidence_csr(V, nv)
        self.held_f = np.zeros(nf, dtype=bool)
        self.held_e = np.zeros(EV.shape[0], dtype=bool)
        self.held_v = np.zeros(nv, dtype=bool)
        self._faces = faces
        if held_faces is not None and len(held_faces):
            f = self.face_index(held_faces, "held face")
            self.held_f[f] = True
            self.held_v[faces[f].reshape(-1)] = True
            tri = faces[f]
            pairs = np.concatenate([tri[:, [0, 1]], tri[:, [0, 2]], tri[:, [1, 2]]])
            self.held_e[self._edge_index(EV, nv, pairs)] = True
        # the order of each cell face's points by global number (a row of PERMS)
        others = np.array([[a for a in range(4) if a != v] for v in range(4)])
        order = np.argsort(V[:, others], axis=2)  # (m, 4, 3)
        codes = {tuple(p): i for i, p in enumerate(_t.PERMS.tolist())}
        key = order[..., 0] * 9 + order[..., 1] * 3 + order[..., 2]
        lookup = np.zeros(27, dtype=np.int64)
        for p, i in codes.items():
            lookup[p[0] * 9 + p[1] * 3 + p[2]] = i
        FP = np.ascontiguousarray(lookup[key])
        self.topo = (V, cell_faces, CE, faces, FC, EV, eptr, ecell, vptr, vcell,
                     self.held_f, self.held_e, self.held_v, FL, ele, vlv, FP)
        self.n_cells, self.n_faces, self.n_edges, self.n_vertices = m, nf, EV.shape[0], nv
        self._buffers = None
        self._maps = {}

    def face_index(self, triples, what="face"):
        """The face number of each point triple (any order); names a triple that is not a
        face of the coarse mesh."""
        try:
            t = np.asarray(triples)
        except Exception as exc:  # ragged lists and the like
            raise InputError(f"{what}s cannot be read as point triples: {exc}") from None
        if t.ndim != 2 or t.shape[1] != 3 or (t.size and t.dtype.kind not in "iu"):
            raise InputError(f"{what}s must be an (h, 3) array of point indices, got "
                             f"{t.dtype} {t.shape}")
        n = self.coarse.n_points
        t = t.astype(np.int64)  # a copy: the caller's array is never kept or changed
        out = np.flatnonzero(((t < 0) | (t >= n)).any(axis=1))
        if out.size:
            a, b, c = t[out[0]]
            raise InputError(f"{what} ({a}, {b}, {c}) is not a face of the coarse mesh (its "
                             f"points must be in 0..{n - 1})")
        t = np.sort(t, axis=1)
        # the faces are sorted rows: merge the triples into them (no packed key, which
        # would overflow int64 beyond about 2e6 points)
        faces = self._faces
        rows = np.concatenate([faces, t])
        order = np.lexsort((np.r_[np.zeros(len(faces)), np.ones(len(t))],
                            rows[:, 2], rows[:, 1], rows[:, 0]))
        place = np.where(order < len(faces), np.arange(order.size), -1)
        last = np.maximum.accumulate(place)  # the last face at or before each place
        where = np.empty(len(t), dtype=np.int64)
        where[order[order >= len(faces)] - len(faces)] = last[order >= len(faces)]
        pos = np.where(where >= 0, order[np.maximum(where, 0)], 0)
        bad = np.flatnonzero((where < 0) | (faces[pos] != t).any(axis=1))
        if bad.size:
            a, b, c = np.asarray(triples)[bad[0]]
            raise InputError(f"{what} ({a}, {b}, {c}) is not a face of the coarse mesh")
        return pos

    @staticmethod
    def _edge_index(EV, n, pairs):
        pairs = np.sort(pairs, axis=1)
        keys = EV[:, 0] * n + EV[:, 1]
        return np.searchsorted(keys, pairs[:, 0] * n + pairs[:, 1])

    def size(self, level):
        """Values on ``level`` (``n = 2**level``): every fine point once."""
        level = integer_option(level, "level", minimum=0)
        return _t.level_size(2**level, self.n_cells, self.n_faces, self.n_edges,
                             self.n_vertices)

    def buffers(self, level):
        """Per-cell buffers of the shared points' parts for ``level`` (views into arrays
        sized for the finest level, shared by every level: no two kernels run at once) and
        the level's face tables."""
        if self._buffers is None:
            n = 2**max(self.k, 1)
            self._buffers = (np.empty(self.n_cells * 4 * (n - 1) * (n - 2) // 2),
                             np.empty(self.n_cells * 6 * (n - 1)),
                             np.empty((self.n_cells, 4)))
        n = 2**level
        bf, be, bv = self._buffers
        face = max((n - 1) * (n - 2) // 2, 0)
        return (bf[: self.n_cells * 4 * face].reshape(self.n_cells, 4, face),
                be[: self.n_cells * 6 * (n - 1)].reshape(self.n_cells, 6, n - 1), bv,
                *self.face_maps(level))

    def face_maps(self, level):
        """The level's ``face_tables`` (:mod:`hatkernels._jit.patches3d`), made once."""
        if level not in self._maps:
            self._maps[level] = _t.face_tables(2**level)
        return self._maps[level]

    def class_sum(self, C, inner, level, masked=True, out=None):
        """The level vector whose value at each point is the sum, over the coarse cells
        holding it, of ``C[c, Z]`` (``Z`` its class there); ``inner[c]`` inside cell ``c``
        (into ``out`` when given)."""
        C, inner = np.asarray(C, dtype=np.float64), np.asarray(inner, dtype=np.float64)
        if C.shape != (self.n_cells, 15) or inner.shape != (self.n_cells,):
            raise InputError(f"class_sum needs C of shape ({self.n_cells}, 15) and inner of "
                             f"shape ({self.n_cells},), got {C.shape} and {inner.shape}")
        y = np.empty(self.size(level)) if out is None else self._vector(out, level, "out",
                                                                         "class_sum")
        _t.class_fill(np.ascontiguousarray(C, dtype=np.float64),
                      np.ascontiguousarray(inner, dtype=np.float64), y, 2**level, self.topo,
                      masked, *self.buffers(level))
        return y

    def _vector(self, x, level, name, method):
        """``x`` checked: a writable C-contiguous float64 vector of ``level``'s size
        (``hatkernels.checks.into_vectors``)."""
        into_vectors(f"TetLayout.{method}", self.size(level), None, {name: x},
                     size=f"level {level} of this layout has {{:,}} points")
        return x

    def _held_blocks(self, level):
        """``(flags, lens, firsts, bases)``: which blocks of ``level`` are held (cell insides
        never; the insides of held faces and edges; held vertices) and where they lie."""
        flags = np.concatenate([np.zeros(self.n_cells, dtype=np.bool_), self.held_f,
                                self.held_e, self.held_v])
        return (flags, *_blocks(self, level))

    def zero_held(self, x, level=None):
        """``x = 0`` at the held points of ``level`` (default the finest), in place."""
        level = self.k if level is None else level
        self._vector(x, level, "x", "zero_held")
        _m.set_blocks(*self._held_blocks(level), x, 0.0)
        return x

    def held_mask(self, level=None):
        """Boolean vector of the held points of ``level`` (default the finest)."""
        level = self.k if level is None else level
        mask = np.zeros(self.size(level), dtype=np.bool_)
        _m.set_blocks(*self._held_blocks(level), mask, True)
        return mask

    def held_count(self, level=None):
        """The number of held points of ``level`` (default the finest)."""
        flags, lens, firsts, _ = self._held_blocks(self.k if level is None else level)
        return int(sum(int(flags[firsts[g]:firsts[g + 1]].sum()) * int(lens[g])
                       for g in range(4)))

    # -- the numbering of mesh.refine() repeated k times ---------------------------------

    def refined_mesh(self, level=None):
        """``coarse.refine()`` repeated ``level`` times (default the finest), built."""
        level = self.k if level is None else integer_option(level, "level", minimum=0)
        mesh = self.coarse
        for _ in range(level):
            mesh = mesh.refine()
        return mesh

    def places(self, mesh, level=None):
        """For each point of ``mesh`` (``coarse`` refined ``level`` times, default the
        finest): its place in this layout's vector.  Found from the fine cells' points:
        fine cell ``j`` lies in coarse cell ``j // 8**level``, and the point's integer
        barycentric coordinates there give its place."""
        level = self.k if level is None else level
        n = 2**level
        cells = np.asarray(mesh.cells)
        first = np.full(mesh.n_points, -1, dtype=np.int64)
        flat = cells.reshape(-1)
        first[flat[::-1]] = np.arange(flat.size - 1, -1, -1)
        coarse_cell = first // 4 // (8**level)
        V = self.topo[0]
        x0 = self.coarse.points[V[coarse_cell, 0]]
        cp = self.coarse.points[V]
        J = np.stack([cp[:, 1] - cp[:, 0], cp[:, 2] - cp[:, 1], cp[:, 3] - cp[:, 2]], axis=2)
        p = np.einsum("cij,cj->ci", np.linalg.inv(J)[coarse_cell],
                      np.asarray(mesh.points) - x0) * n
        pi = np.rint(p).astype(np.int64)
        lam = np.stack([n - pi[:, 0], pi[:, 0] - pi[:, 1], pi[:, 1] - pi[:, 2], pi[:, 2]], axis=1)
        out = np.empty(mesh.n_points, dtype=np.int64)
        _m.places_of(coarse_cell, np.ascontiguousarray(lam), n, self.topo, out)
        return out


    def to_refined(self, x, level=None, mesh=None):
        """``x`` (on ``level``, default the finest) in the numbering of ``coarse.refine()``
        repeated ``level`` times; ``mesh`` is that refined mesh (built when not given: the
        places are found from its cells)."""
        level = self.k if level is None else level
        x = np.asarray(x, dtype=np.float64)
        if x.shape != (self.size(level),):
            raise InputError(f"x has shape {x.shape}; level {level} of this layout has "
                             f"{self.size(level):,} points")
        mesh = self.refined_mesh(level) if mesh is None else mesh
        return x[self.places(mesh, level)]

    def from_refined(self, u, level=None, mesh=None):
        """The inverse of :meth:`to_refined`."""
        level = self.k if level is None else level
        mesh = self.refined_mesh(level) if mesh is None else mesh
        u = np.asarray(u, dtype=np.float64)
        if u.shape != (mesh.n_points,):
            raise InputError(f"u has shape {u.shape}; the refined mesh has {mesh.n_points:,} "
                             "points")
        x = np.empty(self.size(level))
        x[self.places(mesh, level)] = u
        return x

    def patch(self, x, cell, level=None):
        """``(lam, values)``: the values of ``x`` on coarse ``cell``'s lattice with their
        integer barycentric coordinates (rows summing to ``2**level``, on the cell's
        points in Bey's order, ``self.topo[0][cell]``)."""
        level = self.k if level is None else level
        n = 2**level
        cell = integer_option(cell, "cell", minimum=0)
        if not cell < self.n_cells:
            raise InputError(f"cell {cell} is not a coarse cell (0..{self.n_cells - 1})")
        x = np.ascontiguousarray(x, dtype=np.float64)
        if x.shape != (self.size(level),):
            raise InputError(f"x has shape {x.shape}; level {level} has {self.size(level):,} "
                             "points")
        p = np.array([(a, b, c) for a in range(n + 1) for b in range(a + 1)
                      for c in range(b + 1)], dtype=np.int64)
        lam = np.stack([n - p[:, 0], p[:, 0] - p[:, 1], p[:, 1] - p[:, 2], p[:, 2]], axis=1)
        loc = np.empty((1, _t.lattice_size(n)))
        _m.gather_cells(x, np.array([int(cell)], dtype=np.int64), n, self.topo,
                        self.face_maps(level)[0], loc)
        return lam, loc[0]


class TetOperator(LinearOperator):
    """The stiffness matrix on ``level`` of a :class:`TetLayout`, matrix-free; held rows
    and columns taken out (zero) unless ``masked=False``."""

    def __init__(self, layout, W, level=None, masked=True):
        W = np.ascontiguousarray(W, dtype=np.float64)
        if W.shape != (layout.n_cells, 15, 15):
            raise InputError(f"W must be the class weights, shape ({layout.n_cells}, 15, 15), "
                             f"got {W.shape}")
        self.layout, self.W = layout, W
        self.level = layout.k if level is None else int(level)
        self.n = 2**self.level
        self.masked = bool(masked)
        size = layout.size(self.level)
        super().__init__(dtype=np.dtype(np.float64), shape=(size, size))

    def matvec_into(self, x, out):
        """``out = A x``; returns ``out``.  ``x`` is read only: any real vector of the
        level's size (copied unless it is a writable C-contiguous float64
        one); ``out`` must be a writable C-contiguous float64 ndarray of that size sharing
        no memory with ``x``, else an InputError names the argument
        (``hatkernels.checks.into_vectors``)."""
        x, = into_vectors("TetOperator.matvec_into", self.shape[0], {"x": x}, {"out": out})
        _t.product(x, out, self.n, self.layout.topo, self.W, 1.0 / self.n, _SLOTS, _N_SLOTS,
                   self.masked, *self.layout.buffers(self.level))
        return out

    def _matvec(self, x):
        x = np.ascontiguousarray(x, dtype=np.float64).reshape(-1)
        return self.matvec_into(x, np.empty(self.shape[0]))

    def _rmatvec(self, x):
        return self._matvec(x)

    def diagonal_and_bound(self):
        """``(diagonal, bound)``: the diagonal (0 at held points) and an upper bound on the
        spectrum of ``D^-1 A`` (Gershgorin's, from each coarse cell's absolute parts)."""
        lay, s = self.layout, 1.0 / self.n
        diag = lay.class_sum(self.W[:, :, 0] * s, self.W[:, 0, 0] * s, self.level, self.masked)
        rows = lay.class_sum(np.abs(self.W).sum(axis=2) * s, np.abs(self.W[:, 0]).sum(axis=1) * s,
                             self.level, self.masked)
        keep = diag > 0
        return diag, float((rows[keep] / diag[keep]).max(initial=1.0))

    def block_diagonal_and_bound(self):
        """:meth:`diagonal_and_bound` with the diagonal one number per block
        (:func:`block_values`; the same bits), computed on a level of at most 4
        subdivisions with this level's scale: a block's sum does not depend on the level,
        and from 4 subdivisions up every block has points.  No vector of this level's size
        is made."""
        lay, s = self.layout, 1.0 / self.n
        probe = min(self.level, 2)
        diag = lay.class_sum(self.W[:, :, 0] * s, self.W[:, 0, 0] * s, probe, self.masked)
        rows = lay.class_sum(np.abs(self.W).sum(axis=2) * s, np.abs(self.W[:, 0]).sum(axis=1) * s,
                             probe, self.masked)
        keep = diag > 0
        return (block_values(lay, probe, diag),
                float((rows[keep] / diag[keep]).max(initial=1.0)))


def _blocks(layout, level):
    """``(lens, firsts, bases)`` of a level's four groups of blocks (the insides of the
    cells, faces and edges; the vertices): points per block, the group's first block and
    its first point."""
    n = 2**int(level)
    lens = np.array([(n - 1) * (n - 2) * (n - 3) // 6, (n - 1) * (n - 2) // 2, n - 1, 1],
                    dtype=np.int64)
    counts = np.array([layout.n_cells, layout.n_faces, layout.n_edges, layout.n_vertices],
                      dtype=np.int64)
    return (lens, np.concatenate([[0], np.cumsum(counts)]),
            np.concatenate([[0], np.cumsum(counts * lens)]))


def block_values(layout, level, x):
    """One value per block (cells, faces, edges, vertices) of the level vector ``x``: its
    first point's (0 for a block without points on that level)."""
    lens, firsts, bases = _blocks(layout, level)
    out = np.zeros(int(firsts[-1]))
    for g in range(4):
        if lens[g]:
            out[firsts[g]:firsts[g + 1]] = x[bases[g] + lens[g] * np.arange(
                firsts[g + 1] - firsts[g])]
    return out


class PiecewiseDiagonal:
    """``1 / diag(A)`` on a level of a :class:`TetLayout`, one number per block of points:
    the inside of each coarse cell, of each coarse face and of each coarse edge, and each
    coarse vertex (the stencil's diagonal is the same on all points of a block: it sums
    the same classes' weights of the same cells); 0 where the diagonal is 0 (held points).

    Stands in for the per-point vector in :class:`hatkernels.precond.chebyshev.ChebyshevSmoother`
    (the same bits; 8 bytes per point less), through the kernel
    ``hatkernels._jit.patches3d_moves.piecewise_update``.
    """

    def __init__(self, layout, level, diag):
        """``diag``: the diagonal per block (:func:`block_values`), 0 at held blocks."""
        self.lens, self.firsts, self.bases = _blocks(layout, level)
        diag = np.asarray(diag, dtype=np.float64)
        if diag.shape != (int(self.firsts[-1]),):
            raise InputError(f"diag must hold one number per block ({int(self.firsts[-1])}: "
                             f"cells, faces, edges, vertices), got shape {diag.shape}")
        self.values = np.zeros_like(diag)
        np.divide(1.0, diag, out=self.values, where=diag > 0)

    @property
    def nbytes(self):
        return self.values.nbytes

    def expand(self):
        """The per-point vector (for tests and inspection)."""
        counts = np.diff(self.firsts)
        return np.repeat(self.values, np.repeat(self.lens, counts))

    def _update(self, mode, c=0.0, c1=0.0, c2=0.0, b=None, q=None, r=None, d=None, x=None):
        empty = np.empty(0)
        _m.piecewise_update(mode, self.values, self.lens, self.firsts, self.bases, c, c1, c2,
                            empty if b is None else b, empty if q is None else q,
                            empty if r is None else r, empty if d is None else d, x)

    def zero_start(self, c, b, x):
        """As :meth:`hatkernels.precond.chebyshev.PointDiagonal.zero_start`."""
        self._update(_m.PW_ZERO, c, b=b, x=x)

    def start(self, c, b, r, d, x, zero_guess):
        """As :meth:`hatkernels.precond.chebyshev.PointDiagonal.start`."""
        if zero_guess:
            self._update(_m.PW_START_ZERO, c, b=b, r=r, d=d, x=x)
        else:
            self._update(_m.PW_START, c, r=r, d=d, x=x)

    def step(self, q, c1, c2, r, d, x):
        """As :meth:`hatkernels.precond.chebyshev.PointDiagonal.step`."""
        self._update(_m.PW_STEP, 0.0, c1, c2, q=q, r=r, d=d, x=x)

    def last(self, q, c1, c2, r, d, x):
        """As :meth:`hatkernels.precond.chebyshev.PointDiagonal.last`."""
        self._update(_m.PW_LAST, 0.0, c1, c2, q=q, r=r, d=d, x=x)
