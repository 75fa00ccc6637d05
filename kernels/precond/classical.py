"""Classical AMG whose hierarchy is built by this project's parallel kernels.

``amg-native``: the method of ``amg-rs`` (strength threshold, a C/F
splitting, in point order where the numbering has locality, classical interpolation,
Galerkin coarse matrices; see
:mod:`hatkernels.precond.amg`), with the rows that classical interpolation
serves badly extended to distance two on sparse matrices (``interpolation``),
set up by the kernels of
:mod:`hatkernels._jit.amg` and :mod:`hatkernels._jit.amg_split` and cycled by the parallel Chebyshev cycle.
Index arrays are 32-bit while the counts fit (:func:`hatkernels.mesh.index_dtype`).
"""

import numba
import numpy as np
import pyamg
import scipy.sparse as sp

from hatkernels._jit import amg as _a
from hatkernels._jit import amg_split as _s
from hatkernels._jit import dense as _dense
from hatkernels.checks import integer_option, real_option
from hatkernels.errors import InputError
from hatkernels.locality import poorly_numbered
from hatkernels.mesh.core_index import index_dtype
from hatkernels.precond.amg import _AMG, _ChebyshevLevel

__all__ = ["ClassicalAMG", "ClassicalHierarchy", "INTERPOLATIONS", "SPLITTINGS"]

#: The interpolations of ``amg-native`` (ClassicalAMG), the default first: ``auto`` is
#: ``extended`` on a matrix with at most ``AUTO_ROW_LIMIT`` entries per row on average
#: (P1 on triangles: about 7) and ``classical`` on denser ones (tetrahedra: about 15),
#: where the extension's setup costs more than its iterations save (docs/solvers.md).
INTERPOLATIONS = ("auto", "extended", "classical")
AUTO_ROW_LIMIT = 10

#: The C/F splittings of ``amg-native``, the default first: ``auto`` is ``point-order``
#: unless the matrix's numbering has no locality (``hatkernels.locality.poorly_numbered``,
#: with the looser spread of three dimensions), where the order would be a random
#: one; ``point-order`` takes the points greedily in their order (a fraction of the
#: cost, about the same iterations on meshes numbered with locality); ``ruge-stuben``
#: is the measure-driven first pass (docs/solvers.md compares them).
SPLITTINGS = ("auto", "point-order", "ruge-stuben")

#: At most this many entries in a row of P that ``extended`` interpolation extends (the
#: largest in size, scaled to keep the row's sum): on ``ball(12)`` the cap took the
#: operator complexity from 3.56 to 3.16 (classical: 3.03) at the same 7 iterations.
EXTENDED_CAP = 4


class _Level:
    """A level of :class:`ClassicalHierarchy`: its matrix and, above the coarsest, P and R = P^T.

    ``diagonal``, when given, is ``(1 / diag(A), Gershgorin's bound)`` as the strength
    pass found them; it also says that every value of A, P and R was found finite
    (packing checks each product's values as it copies them), so the smoother's level
    needs no pass of its own over them.
    """

    #: built by the hierarchy from a checked matrix: the cycle takes its arrays as they are
    own = True

    def __init__(self, A, P=None, R=None, diagonal=None):
        self.A, self.P, self.R = A, P, R
        self.diagonal = diagonal


class _DenseCholesky:
    """The coarsest solve: a dense Cholesky factor (the level is small), in plain loops.

    A singular but positive semi-definite level (a pure Neumann problem: the
    constants are in the null space) gets a pseudo-inverse instead, as
    PyAMG's ``pinv`` coarse solver does; an indefinite one is refused.
    """

    description = "a dense Cholesky factor"

    def __init__(self, A):
        dense = A.toarray()
        dense = 0.5 * dense + 0.5 * dense.T  # (halves first: no overflow near the largest float)
        self.L, row = _dense.dense_cholesky(dense)
        self.pinv = None
        if row >= 0:
            w, V = np.linalg.eigh(dense)
            scale = max(abs(w).max(), np.finfo(float).tiny)
            if w[0] < -1e-10 * scale:
                raise InputError(f"amg: the coarsest level ({A.shape[0]} unknowns) is not "
                                 f"positive definite (pivot {row}, smallest eigenvalue "
                                 f"{w[0]:.3g}); A must be symmetric positive (semi-)definite")
            keep = w > 1e-10 * scale
            self.pinv = (V[:, keep] / w[keep]) @ V[:, keep].T
            self.L = None
            self.description = (f"a pseudo-inverse (the level is singular: {int((~keep).sum())} "
                                "zero eigenvalues)")

    def __call__(self, A, b):
        b = np.ascontiguousarray(b, dtype=np.float64)
        if self.pinv is not None:
            return self.pinv @ b
        out = np.empty(b.shape[0])
        _dense.cholesky_solve(self.L, b, out)
        return out


class _SmoothingSolve:
    """The coarsest solve when coarsening stalled on a large level: Chebyshev smoothing only."""

    def __init__(self, A, degree):
        self.description = f"Chebyshev smoothing of degree {degree} on [top/30, top]"
        self.level = _ChebyshevLevel(_Level(A), degree, lower=1.0 / 30.0, estimate=False)
        n = A.shape[0]
        self.work = (np.empty(n), np.empty(n), np.empty(n))

    def __call__(self, A, b):
        x = np.empty_like(b)
        self.level.smooth(x, b, True, *self.work)
        return x


def _csr_arrays(M):
    """``(indptr, indices, data)`` of CSR ``M`` with one index dtype (copies only if needed)."""
    itype = index_dtype(M.shape[0], M.indptr[-1])
    return (np.ascontiguousarray(M.indptr, dtype=itype),
            np.ascontiguousarray(M.indices, dtype=itype),
            np.ascontiguousarray(M.data, dtype=np.float64))


def _split(indptr, indices, strong, n, splitting="point-order"):
    """The C/F splitting (1 = C): in point order (``_jit.amg_split.point_order_split``, no
    transpose needed), or Ruge and Stueben's first pass (on the transpose of the strong
    couplings): PyAMG's compiled one where its 32-bit indices suffice;
    ``hatkernels._jit.amg_split.split`` is the same algorithm (tested to give the same
    splitting) and serves matrices whose indices need 64 bits.
    """
    if splitting == "point-order":
        return _s.point_order_split(indptr, indices, strong)
    tptr, tind = _s.transpose_pattern(indptr, indices, strong, n, _parts())
    if indptr.dtype != np.int32:
        return _s.split(indptr, indices, strong, tptr, tind)
    sptr, sind = _s.strong_pattern(indptr, indices, strong)
    state = np.empty(n, dtype=np.int32)
    pyamg.amg_core.rs_cf_splitting(n, sptr, sind, tptr, tind, np.zeros(n, dtype=np.int32), state)
    return state


def _parts():
    # row blocks of the parallel transposes: each keeps one count per column
    return min(numba.get_num_threads(), 8)


def _chunks():
    # one block of rows per thread: each block keeps a marker array as long as the level
    return numba.get_num_threads()


class _Room:
    """Scratch for :func:`_interpolation` and :func:`_galerkin`, kept from level to level
    (each smaller than the last, so its pages are first touched once), and the room per
    entry of R the product gives itself."""

    def __init__(self):
        self.sind = self.sdata = self._marks = None
        self.per_entry = 3.0  # P1 triangles: about 1.8 entries of R A P per entry of R

    def marks(self, dtype, n):
        """One row of marks per chunk, -1 in the first ``n`` places, as NumPy's array (large
        ones on huge pages) kept from call to call: the kernels' own arrays were first
        touched 4 KiB at a time at every call."""
        held = self._marks
        if held is None or held.dtype != dtype or held.shape[1] < n:
            self._marks = held = None  # free the old before the new is made
            self._marks = held = np.full((_chunks(), n), -1, dtype=dtype)
        else:
            held[:, :n] = -1
        return held

    def arrays(self, starts, n_rows):
        """Scratch for ``starts[-1]`` entries whose indices and places fit one dtype."""
        stype = index_dtype(n_rows, starts[-1])
        if self.sind is None or self.sind.shape[0] < starts[-1] or self.sind.dtype != stype:
            self.sind = self.sdata = None  # free the old before the new is made
            self.sind, self.sdata = np.empty(starts[-1], dtype=stype), np.empty(starts[-1])
        return self.sind, self.sdata


def _chunk_starts(n_rows, room_of):
    """Each chunk's first place in the scratch (the last entry: the end), from the room
    ``room_of(lo, hi)`` its rows ``lo:hi`` need; the chunks are the kernels' own."""
    nchunks = _chunks()
    bounds = [(n_rows * c) // nchunks for c in range(nchunks + 1)]
    starts = np.zeros(nchunks + 1, dtype=np.int64)
    np.cumsum([room_of(lo, hi) for lo, hi in zip(bounds[:-1], bounds[1:], strict=True)],
              out=starts[1:])
    return starts


def _packed(starts, counts, room, n_cols, name):
    """``(ptr, ind, data)`` of the rows a one-pass kernel left in ``room``'s chunks; an
    overflow to a non-finite value is refused, naming the level's matrix ``name``."""
    np.cumsum(counts, out=counts)
    dtype = index_dtype(max(len(counts) - 1, n_cols), counts[-1])
    ptr = counts.astype(dtype, copy=False)
    ind, data = np.empty(ptr[-1], dtype=dtype), np.empty(ptr[-1])
    if _a.gather_rows(starts, ptr, room.sind, room.sdata, ind, data, len(starts) - 1):
        raise InputError(f"amg: a level's {name} has a non-finite entry (the coarse levels "
                         f"overflowed: rescale the problem)")
    return ptr, ind, data


def _interpolation(A, strong, state, cidx, extend, room):
    """P as ``(pptr, pind, pdata, room)``: one pass into room of a matrix row plus
    ``EXTENDED_CAP`` entries per row (never too little), then packed."""
    indptr = A[0]
    n = indptr.shape[0] - 1
    starts = _chunk_starts(n, lambda lo, hi: indptr[hi] - indptr[lo] + EXTENDED_CAP * (hi - lo))
    sind, sdata = room.arrays(starts, n)
    counts = np.zeros(n + 1, dtype=np.int64)
    _a.interpolation(*A, strong, state, cidx.astype(sind.dtype, copy=False), counts, starts,
                     sind, sdata, extend, EXTENDED_CAP, len(starts) - 1,
                     room.marks(np.int32, n))
    return (*_packed(starts, counts, room, int(cidx[-1]) + 1 if n else 0, "P"), room)


def _galerkin(R, A, P, n_coarse, room):
    """``C = R A P`` as ``(cptr, cind, cdata, room)``: one pass into per-chunk room sized
    from R's entries, retried with twice the room when a chunk does not fit."""
    rptr = R[0]
    while True:
        starts = _chunk_starts(n_coarse,
                               lambda lo, hi: int(room.per_entry * (rptr[hi] - rptr[lo])) + 64)
        sind, sdata = room.arrays(starts, n_coarse)
        counts = np.zeros(n_coarse + 1, dtype=np.int64)
        over, zeros = _a.galerkin(*R, *A, *P, n_coarse, counts, starts, sind, sdata,
                                  len(starts) - 1, room.marks(sind.dtype, n_coarse))
        if over == 0:
            break
        room.per_entry *= 2.0
    cptr, cind, cdata = _packed(starts, counts, room, n_coarse, "A")
    # the next level's room: this level's entries per entry of R, and half as much again
    room.per_entry = max(2.0, 1.5 * cptr[-1] / max(rptr[-1], 1))
    if zeros:
        kept = _a.drop_zeros(cptr, cind, cdata)
        cind, cdata = cind[:kept].copy(), cdata[:kept].copy()
    return cptr, cind, cdata, room


class ClassicalHierarchy:
    """Classical AMG hierarchy built with this project's parallel kernels (``hatkernels._jit.amg``).

    Per level: strong couplings (one byte per entry), the C/F splitting
    (``splitting``, as for :class:`ClassicalAMG`; the second pass after it with
    ``second_pass``), interpolation P
    (``interpolation``, as for :class:`ClassicalAMG`), R = P^T and the Galerkin product
    R A P, until a level has at most ``max_coarse`` unknowns, ``max_levels``
    levels exist or coarsening stalls (fewer than 10% fewer points).  The
    coarsest level is solved by a dense Cholesky factor when it has at most
    ``DENSE_LIMIT`` unknowns, else by Chebyshev smoothing.
    """

    DENSE_LIMIT = 1000

    def __init__(self, A, theta=0.25, max_levels=30, max_coarse=300, degree=3,
                 second_pass=False, interpolation="auto", splitting="auto"):
        self.levels = []
        self.second_pass = bool(second_pass)
        if interpolation not in INTERPOLATIONS:
            raise InputError(f"interpolation must be one of {INTERPOLATIONS}, "
                             f"got {interpolation!r}")
        if splitting not in SPLITTINGS:
            raise InputError(f"splitting must be one of {SPLITTINGS}, got {splitting!r}")
        #: the splitting used, and why when ``auto`` chose the measure-driven one
        self.splitting, self.splitting_reason = splitting, ""
        if splitting == "auto":
            self.splitting = "point-order"
            if poorly_numbered(A, 3):
                self.splitting = "ruge-stuben"
                self.splitting_reason = " (the numbering has no locality)"
        splitting = self.splitting
        if interpolation == "auto":
            rows = max(A.shape[0], 1)
            interpolation = "extended" if A.nnz <= AUTO_ROW_LIMIT * rows else "classical"
        self.interpolation = interpolation
        extend = interpolation == "extended"
        indptr, indices, data = _csr_arrays(A)
        current = A
        room = _Room()
        while len(self.levels) + 1 < max_levels and current.shape[0] > max_coarse:
            n = current.shape[0]
            strong = np.empty(indptr[-1], dtype=np.uint8)
            dinv = np.empty(n)
            bound, row = _a.strength(indptr, indices, data, float(theta), strong, dinv)
            state = _split(indptr, indices, strong, n, splitting)
            if second_pass:
                state = state.astype(np.int8, copy=False)
                _s.second_pass(indptr, indices, strong, state)
            n_coarse = int(np.count_nonzero(state))
            if n_coarse == 0 or n_coarse > 0.9 * n:
                break  # the coarsest level: its own solve judges its diagonal
            if row >= 0:  # a smoothed level needs a positive diagonal
                raise InputError(f"amg chebyshev smoother: diagonal entry of row {row} of a "
                                 f"level with {n} unknowns is {current.diagonal()[row]}; "
                                 f"it must be > 0")
            itype = indptr.dtype
            cidx = np.cumsum(state, dtype=itype)
            cidx -= 1
            pptr, pind, pdata, room = _interpolation((indptr, indices, data), strong, state,
                                                     cidx, extend, room)
            del strong, state, cidx
            rptr, rind, rdata = _a.transpose(pptr, pind, pdata, n_coarse, _parts())
            cptr, cind, cdata, room = _galerkin((rptr, rind, rdata), (indptr, indices, data),
                                                (pptr, pind, pdata), n_coarse, room)
            P = sp.csr_array((pdata, pind, pptr), shape=(n, n_coarse))
            R = sp.csr_array((rdata, rind, rptr), shape=(n_coarse, n))
            self.levels.append(_Level(current, P, R, (dinv, float(bound))))
            current = sp.csr_array((cdata, cind, cptr), shape=(n_coarse, n_coarse))
            indptr, indices, data = cptr, cind, cdata
        del room
        self.levels.append(_Level(current))
        if current.shape[0] <= self.DENSE_LIMIT:
            self.coarse_solver = _DenseCholesky(current)
        else:
            self.coarse_solver = _SmoothingSolve(current, 4 * degree)

    def operator_complexity(self):
        return sum(lv.A.nnz for lv in self.levels) / self.levels[0].A.nnz

    def grid_complexity(self):
        return sum(lv.A.shape[0] for lv in self.levels) / self.levels[0].A.shape[0]


class ClassicalAMG(_AMG):
    """Classical AMG, set up and cycled on this project's parallel kernels.

    The method of ``amg-rs`` (strength threshold ``theta``, a C/F splitting,
    classical interpolation, Galerkin coarse matrices), built without PyAMG:
    the strength test, interpolation and triple product run in parallel, the
    splitting is one serial pass, and nothing but P, R and the coarse matrices
    is kept (the strong couplings are one byte per entry, freed per level).
    Smoothing is the parallel Chebyshev cycle of ``amg-rs``.

    Parameters
    ----------
    A : sparse matrix, shape (n, n)
        Symmetric positive definite.
    cycle : {"V", "W"}
    degree, lower, estimate
        The Chebyshev smoother, as for ``amg-rs``.
    theta : float
        Strength threshold, 0 < theta < 1.
    max_levels, max_coarse : int
        Stop coarsening at this many levels or at a level this small; the
        coarsest level is solved by a dense Cholesky factor (or, when
        coarsening stalled above 1000 unknowns, by Chebyshev smoothing).
    splitting : {"auto", "point-order", "ruge-stuben"}
        How the C points are chosen.  ``point-order``: each point
        still undecided at its turn becomes C and the points that strongly
        depend on it F, in the order of the points.  ``auto`` (default):
        ``point-order``, unless more than half of the matrix's entries lie far
        from its diagonal (``hatkernels.locality.poorly_numbered``, with the
        spread of three dimensions: a numbering without locality, where the
        order is a random one), then ``ruge-stuben``.  ``ruge-stuben``: Ruge and
        Stueben's first pass, which takes next the undecided point that the
        most others depend on, keeping those counts up to date (amg-rs's
        splitting, computed by PyAMG).  Measured at 1e6 unknowns, CG to 1e-8
        (docs/solvers.md): the setup costs 35 to 45 % less in point order;
        the iterations are the same on most meshes, one more on
        ``rectangle(1000, 1000)`` (7 against 6, the same rates at 1e-6 and
        1e-10), three fewer on a rotated anisotropic coefficient, and three
        more on a randomly numbered mesh solved without renumbering.
    second_pass : bool
        Follow the first pass of the splitting by the second (K. Stueben, "A
        review of algebraic multigrid", 2001): every strong F-F coupling then
        has a C point in common to interpolate through.  Off by default: it
        pays on some meshes and not on others (docs/solvers.md, measured at
        1e6 unknowns, CG to 1e-10: 21 % less time on ``disk(600)``, 27 to 12
        iterations; none on a jittered Delaunay mesh, whose hierarchy it
        nearly doubles; on tetrahedra the operator complexity goes from 3.3
        to 7.9).
    interpolation : {"auto", "extended", "classical"}
        ``classical``: an F point interpolates from its strong C points, a
        strong F neighbour's coupling spread over those it is coupled to, or
        lumped onto the diagonal when it is coupled to none (PyAMG's
        ``classical``).  ``extended``: a row with such a neighbour also
        interpolates from that neighbour's strong C points, by the
        extended+i formula of De Sterck, Falgout, Nolting and Yang (2008),
        keeping its 4 largest weights (``EXTENDED_CAP``) scaled to the same
        sum; every other row stays classical, so a uniform mesh keeps its
        first level's P (a few rows of its coarse levels may extend).
        ``auto`` (default): ``extended`` when A has at most 10
        entries per row on average (triangles), else ``classical``
        (tetrahedra, whose denser coarse levels make the extension's setup
        cost more than it saves).  Measured at 1e6 unknowns, CG to 1e-10
        (docs/solvers.md): ``disk(600)`` 27 to 12 iterations and 16 to 30 %
        less time, a jittered Delaunay mesh 34 to 14 and 7 to 27 % less,
        ``l_shape(400)`` 14 to 9; ``ball(30)`` 15 to 10 but 25 to 55 % more
        time for one solve.

    Costs: as ``amg-rs``; setup memory beyond the hierarchy is about one
    byte per matrix entry and a few index arrays of the level's length.
    """

    name = "amg-native"
    #: :func:`hatkernels.solve` starts CG from full multigrid with it unless told otherwise:
    #: about two cycles' work for three fewer iterations to 1e-8 on structured meshes and
    #: as many cycles in all on unstructured ones (docs/solvers.md)
    default_start = "nested"
    #: Peak bytes per point of a whole solve with it, beyond the mesh (measured at
    #: about 1e6 unknowns, docs/performance.md; hatkernels.memory uses it).
    solve_bytes_per_point = 640
    kind = "classical AMG (own parallel setup)"

    def __init__(self, A, *, cycle="V", degree=2, lower=0.3, estimate=False, theta=0.25,
                 max_levels=30, max_coarse=300, second_pass=False, interpolation="auto",
                 splitting="auto"):
        max_levels = integer_option(max_levels, f"{self.name}: max_levels", minimum=1)
        max_coarse = integer_option(max_coarse, f"{self.name}: max_coarse", minimum=1)
        theta = real_option(theta, f"{self.name}: theta", between=(0, 1))
        if not isinstance(second_pass, (bool, np.bool_)):
            raise InputError(f"{self.name}: second_pass must be True or False, "
                             f"got {second_pass!r}")
        if interpolation not in INTERPOLATIONS:
            raise InputError(f"{self.name}: interpolation must be one of {INTERPOLATIONS}, "
                             f"got {interpolation!r}")
        if splitting not in SPLITTINGS:
            raise InputError(f"{self.name}: splitting must be one of {SPLITTINGS}, "
                             f"got {splitting!r}")
        options = {"theta": float(theta), "max_levels": int(max_levels),
                   "max_coarse": int(max_coarse), "degree": degree,
                   "second_pass": bool(second_pass), "interpolation": interpolation,
                   "splitting": splitting}
        super().__init__(A, cycle, "chebyshev", degree, options, lower, estimate)

    def _build(self, C, options):
        return ClassicalHierarchy(C, **options)

    def _details(self):
        second = " with the second pass" if self.ml.second_pass else ""
        return (f"{self.ml.interpolation} interpolation, {self.ml.splitting} C/F splitting"
                f"{self.ml.splitting_reason}{second}, " + super()._details())
