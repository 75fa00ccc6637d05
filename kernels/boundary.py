"""Dirichlet conditions: reduce a system to its free unknowns, and lift back.

Given ``A u = b`` with ``u = g`` prescribed on a set of points, the reduced
system is ``A_ff u_f = b_f - A_fd g``: the free-free block of a symmetric
positive definite matrix, so it stays symmetric positive definite and CG
applies.  :meth:`DirichletSystem.expand` puts the prescribed values back.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import scipy.sparse as sp

from hatkernels._jit import dirichlet as _jit_dirichlet
from hatkernels.checks import point_indices
from hatkernels.errors import InputError
from hatkernels.sparse import as_csr, remember_checked

__all__ = ["DirichletSystem", "apply_dirichlet", "apply_dirichlet_in_place", "apply_dirichlet_assembling"]


@dataclasses.dataclass(frozen=True, repr=False)
class DirichletSystem:
    """A system reduced to its free unknowns.

    Attributes
    ----------
    A : scipy CSR, shape (n_free, n_free)
    b : ndarray, shape (n_free,)
    free : ndarray
        Full-system index of each reduced unknown (sorted).
    fixed, values : ndarray
        Prescribed points (sorted, unique) and their values.
    isolated : ndarray
        Points whose matrix row is empty (points in no triangle): they are
        not unknowns, and :meth:`expand` gives them the value 0.
    n : int
        Size of the full system.
    """

    A: sp.csr_matrix
    b: np.ndarray
    free: np.ndarray
    fixed: np.ndarray
    values: np.ndarray
    isolated: np.ndarray
    n: int

    def expand(self, x_free):
        """Full-length vector: ``x_free`` on the free points, the prescribed values on the fixed."""
        x_free = np.asarray(x_free)
        if x_free.shape != (len(self.free),):
            raise InputError(f"expected {len(self.free)} free values, got shape {x_free.shape}")
        u = np.zeros(self.n, dtype=np.result_type(x_free.dtype, np.float64))
        u[self.free] = x_free
        u[self.fixed] = self.values
        return u

    def restrict(self, u):
        """The free part of a full-length vector."""
        u = np.asarray(u)
        if u.shape != (self.n,):
            raise InputError(f"expected a vector of length {self.n}, got shape {u.shape}")
        return u[self.free]

    def __repr__(self):
        return (
            f"DirichletSystem({len(self.free)} free of {self.n}, {len(self.fixed)} fixed, "
            f"{len(self.isolated)} isolated, nnz {self.A.nnz})"
        )


def _canonical_csr(A):
    """``A`` checked by :func:`~hatkernels.sparse.as_csr`, with duplicates summed (in a copy)."""
    A = as_csr(A)  # never changed below: shared with the caller when already CSR float64
    if not A.has_canonical_format:
        A = A.copy()
        A.sum_duplicates()
    return A


def _points_and_values(points, values, n):
    if np.isscalar(points) or (isinstance(points, np.ndarray) and points.ndim == 0):
        points = [points]  # one point
    idx = point_indices(points, n, "points")
    v = np.asarray(values)
    if v.dtype.kind not in "fiu":
        raise InputError(f"Dirichlet values must be real numbers, got dtype {v.dtype}")
    v = np.broadcast_to(v.astype(np.float64), idx.shape) if v.ndim == 0 else v.astype(np.float64)
    if v.shape != idx.shape:
        raise InputError(f"got {v.size} Dirichlet values for {idx.size} points")
    bad = ~np.isfinite(v)
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise InputError(f"Dirichlet value {float(v[k])!r} at point {idx[k]} is not finite")
    order = np.argsort(idx, kind="stable")
    idx, v = idx[order], v[order]
    dup = np.flatnonzero(idx[1:] == idx[:-1])
    if dup.size:
        clash = dup[v[dup + 1] != v[dup]]
        if clash.size:
            k = int(clash[0])
            raise InputError(
                f"point {idx[k]} is given two different Dirichlet values, {float(v[k])!r} and {float(v[k + 1])!r}"
            )
        keep = np.ones(idx.size, dtype=bool)
        keep[dup + 1] = False
        idx, v = idx[keep], v[keep]
    return idx, v


def apply_dirichlet(A, b, points, values=0.0):
    """Reduce ``A u = b`` with ``u[points] = values`` to the free unknowns.

    Parameters
    ----------
    A : scipy sparse matrix, shape (n, n)
        Symmetric positive (semi)definite, e.g. a stiffness matrix; not modified.
    b : array_like, shape (n,)
        Not modified.
    points : array_like of int
        Points with a prescribed value (repeats allowed if their values agree).
    values : float or array_like, shape (len(points),)

    Returns
    -------
    DirichletSystem
        ``.A`` (CSR, symmetric positive definite when A is and every connected
        part of the mesh touches a fixed point), ``.b`` and ``.expand(x)``.

    Raises
    ------
    InputError
        Shapes, indices, non-finite values, conflicting values; a free row with
        a non-positive diagonal (the matrix is not positive definite); an empty
        row whose right-hand side is not zero (no solution).

    Examples
    --------
    >>> import numpy as np, hatkernels
    >>> m = hatkernels.mesh.rectangle(4, 4)
    >>> A = hatkernels.assemble_stiffness(m)
    >>> sysd = hatkernels.apply_dirichlet(A, hatkernels.assemble_load(m, 1.0), m.boundary_points())
    >>> sysd
    DirichletSystem(9 free of 25, 16 fixed, 0 isolated, nnz 41)
    >>> u = sysd.expand(np.zeros(9))
    """
    A, b, fixed, vals, free, isolated, newindex, g = _reduction(A, b, points, values)
    dt = A.indptr.dtype
    counts = _jit_dirichlet.reduced_counts(A.indptr, A.indices, newindex, free)
    rindptr = np.zeros(free.size + 1, dtype=dt)
    np.cumsum(counts, out=rindptr[1:])
    rindices = np.empty(int(rindptr[-1]), dtype=dt)
    rdata = np.empty(int(rindptr[-1]))
    rb = np.empty(free.size)
    _jit_dirichlet.reduced_fill(
        A.indptr, A.indices, A.data, newindex, free, g, b, rindptr, rindices, rdata, rb
    )
    return _system(rdata, rindices, rindptr, rb, free, fixed, vals, isolated, n=A.shape[0])


def apply_dirichlet_in_place(A, b, points, values=0.0):
    """:func:`apply_dirichlet` that builds the reduced matrix in ``A``'s own arrays.

    For a matrix that the caller made and will not use again (the solvers'
    assembled systems): no second matrix is allocated, which saves its memory
    and the time of touching it.  Afterwards ``A`` holds garbage; ``b`` is
    not modified.  When ``A`` is not canonical CSR of float64 a converted
    copy is reduced instead, and ``A`` is left as it was.
    """
    A, b, fixed, vals, free, isolated, newindex, g = _reduction(A, b, points, values)
    rindptr = np.empty(free.size + 1, dtype=A.indptr.dtype)
    rb = np.empty(free.size)
    nnz = _jit_dirichlet.compact_in_place(
        A.indptr, A.indices, A.data, newindex, free, g, b, rindptr, rb
    )
    data, indices = A.data[:nnz], A.indices[:nnz]
    if nnz < 0.75 * A.data.size:  # most of A held: do not keep its arrays alive
        data, indices = data.copy(), indices.copy()
    return _system(data, indices, rindptr, rb, free, fixed, vals, isolated, n=A.shape[0])


def _system(data, indices, indptr, b, free, fixed, vals, isolated, *, n):
    size = free.size
    Ar = sp.csr_matrix((data, indices, indptr), shape=(size, size), copy=False)
    Ar.has_sorted_indices = True
    Ar.has_canonical_format = True
    # a renumbered part of a checked pattern (as_csr's, or the package's own): as_csr
    # need not walk it again; its values are still checked where they are read
    remember_checked(Ar)
    dt = indptr.dtype
    return DirichletSystem(A=Ar, b=b, free=free, fixed=fixed.astype(dt), values=vals,
                           isolated=isolated.astype(dt), n=n)


def _reduction(A, b, points, values):
    """The checked inputs of a reduction and its index maps: ``A`` (canonical CSR),
    ``b`` (float64), the fixed points and values, the free and isolated points,
    each point's free index (-1 if not free) and the full-length lifting vector."""
    A = _canonical_csr(A)
    n = A.shape[0]
    b = _checked_b(b, n)
    diag = np.empty(n)
    empty = np.empty(n, dtype=np.bool_)  # rows with no entry, or zeros only
    _jit_dirichlet.row_summary(A.indptr, A.indices, A.data, diag, empty)
    return (A, b) + _maps(n, b, points, values, empty, diag, A.indptr.dtype)


def _checked_b(b, n):
    b = np.asarray(b)
    if b.shape != (n,):
        raise InputError(f"b must have shape ({n},) to match A, got {b.shape}")
    if b.dtype.kind not in "fiu":
        raise InputError(f"b must be real numbers, got dtype {b.dtype}")
    b = b.astype(np.float64, copy=False)
    if not np.isfinite(b).all():
        k = int(np.flatnonzero(~np.isfinite(b))[0])
        raise InputError(f"b[{k}] = {float(b[k])!r} is not finite")
    return b


def _maps(n, b, points, values, empty, diag, dt):
    """``(fixed, vals, free, isolated, newindex, g)`` of a reduction whose matrix has
    ``empty`` rows (no entry, or zeros only) and diagonal ``diag`` (None: not known yet)."""
    fixed, vals = _points_and_values(points, values, n)
    is_fixed = np.zeros(n, dtype=bool)
    is_fixed[fixed] = True
    isolated = np.flatnonzero(empty & ~is_fixed)
    if isolated.size:
        loaded = isolated[b[isolated] != 0]
        if loaded.size:
            k = int(loaded[0])
            raise InputError(
                f"row {k} of the matrix is empty but b[{k}] = {float(b[k])!r}: the system has no solution"
            )
    free = np.flatnonzero(~is_fixed & ~empty)
    bad = free[~(diag[free] > 0)] if diag is not None else free[:0]
    if bad.size:
        k = int(bad[0])
        raise InputError(
            f"row {k} has diagonal {float(diag[k])!r} <= 0: the matrix is not positive definite"
        )
    free = free.astype(dt)
    newindex = np.full(n, -1, dtype=dt)
    newindex[free] = np.arange(free.size, dtype=dt)
    g = np.zeros(n)
    g[fixed] = vals
    return fixed, vals, free, isolated, newindex, g


def apply_dirichlet_assembling(pattern, rows, fill, b, points, values=0.0):
    """:func:`apply_dirichlet` of a matrix that is never formed whole: each free row is
    assembled straight into the reduced system, by ``fill``.

    ``pattern`` is ``(indptr, indices)`` of the whole matrix (sorted rows, structurally
    symmetric: each row's count of fixed columns comes from the fixed rows), ``rows``
    says which rows have entries (the others, unless fixed, are isolated points), and
    ``fill(newindex, free, g, b, rindptr, rindices, rdata, rb)`` forms the free rows
    into the reduced arrays as :func:`hatkernels._jit.dirichlet.reduced_fill` would
    from the whole matrix, returning -1, or a free row whose diagonal is not positive.
    Returns the :class:`DirichletSystem`, or None after such a row (the caller then
    reduces the whole matrix, which reports it, or takes a row of zeros as isolated).
    ``b`` is not modified.
    """
    indptr, indices = pattern
    n = indptr.shape[0] - 1
    b = _checked_b(b, n)
    fixed, vals, free, isolated, newindex, g = _maps(n, b, points, values, ~rows, None,
                                                     indptr.dtype)
    counts = np.empty(free.size, dtype=indptr.dtype)
    _jit_dirichlet.reduced_counts_symmetric(indptr, indices, fixed.astype(indptr.dtype), free,
                                            np.zeros(n, dtype=indptr.dtype), counts)
    rindptr = np.zeros(free.size + 1, dtype=indptr.dtype)
    np.cumsum(counts, out=rindptr[1:])
    del counts
    rindices = np.empty(int(rindptr[-1]), dtype=indptr.dtype)
    rdata = np.empty(int(rindptr[-1]))
    rb = np.empty(free.size)
    if fill(newindex, free, g, b, rindptr, rindices, rdata, rb) >= 0:
        return None
    return _system(rdata, rindices, rindptr, rb, free, fixed, vals, isolated, n=n)
