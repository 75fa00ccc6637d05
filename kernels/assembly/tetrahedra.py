"""Assembly on tetrahedra: element values into canonical CSR, by the three strategies.

The element values (stiffness ``|T| kappa grad(phi_a) . grad(phi_b)``, mass,
load) come from :mod:`hatkernels.assembly.elements`; the strategies differ in
how they are summed into the matrix, as in 2-D:

``reference``
    a plain loop over cells adding each element matrix into a dictionary of
    entries: the executable specification;
``triplets``
    scipy COO of the ``16 M`` entries, converted to CSR (duplicates summed);
``csr``
    the generic row-owned plan of :class:`~hatkernels.assembly.dofs.DofAssembler`
    with the points as degrees of freedom: built once per assembler, then a
    parallel gather with the same bits for any thread count.  The stiffness
    skips the (M, 4, 4) element matrices and the gradients: six edge
    values per cell straight from the coordinates, then the gather
    (:mod:`hatkernels._jit.assembly3d`).

Every strategy returns the same canonical matrix: sorted indices, no
duplicates, the full pattern of the mesh graph (explicit zeros kept).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from hatkernels._jit import assembly3d as _jit3d
from hatkernels.assembly.dofs import DofAssembler
from hatkernels.assembly.elements import (
    _tetrahedron_means,
    tetrahedron_load_values,
    tetrahedron_lumped_values,
    tetrahedron_mass_values,
    tetrahedron_stiffness_values,
)
from hatkernels.errors import InputError
from hatkernels.geometry import element_gradients
from hatkernels.mesh import tetrahedra as _tet

__all__ = ["TetrahedronAssembly"]


def _reference(cells, values, n):
    """Sum element matrices entry by entry: the specification, readable and slow."""
    entries = {}
    for t, cell in enumerate(cells.tolist()):
        for a, i in enumerate(cell):
            for b, j in enumerate(cell):
                entries[i, j] = entries.get((i, j), 0.0) + values[t, a, b]
    keys = sorted(entries)
    rows = np.array([k[0] for k in keys], dtype=np.int64)
    cols = np.array([k[1] for k in keys], dtype=np.int64)
    data = np.array([entries[k] for k in keys])
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.add.at(indptr, rows + 1, 1)
    return sp.csr_matrix((data, cols, np.cumsum(indptr)), shape=(n, n))


def _triplets(cells, values, n):
    k = cells.shape[1]
    rows = np.repeat(cells, k, axis=1).ravel()
    cols = np.tile(cells, (1, k)).ravel()
    A = sp.coo_matrix((values.ravel(), (rows, cols)), shape=(n, n)).tocsr()
    A.sum_duplicates()  # also sorts the indices: the canonical form
    return A


class TetrahedronAssembly:
    """Matrices and vectors of one tetrahedral mesh; the geometry and the csr plan are
    computed once and reused by every later call."""

    def __init__(self, mesh, strategy="csr"):
        self.mesh = mesh
        self.strategy = strategy
        self._geometry = None
        self._dofs = None

    def volumes(self):
        """Cell volumes (M,): from :meth:`geometry` when it is there, else without the
        gradients (8 bytes per cell instead of 104)."""
        if self._geometry is not None:
            return self._geometry[0]
        return np.abs(_tet.six_volumes(self.mesh.points, self.mesh.cells)) / 6.0

    def geometry(self):
        """``(volumes (M,), gradients (M, 4, 3))``, computed on first use."""
        if self._geometry is None:
            self._geometry = element_gradients(self.mesh.points, self.mesh.cells)
        return self._geometry

    @property
    def plan(self):
        """The csr strategy's :class:`~hatkernels.assembly.dofs.DofAssembler` (built on use)."""
        if self._dofs is None:
            self._dofs = DofAssembler(self.mesh.cells, self.mesh.n_points)
        return self._dofs

    def _matrix(self, values):
        cells, n = self.mesh.cells, self.mesh.n_points
        if self.strategy == "reference":
            return _reference(cells, values, n)
        if self.strategy == "triplets":
            return _triplets(cells, values, n)
        return self.plan.matrix(values)

    def stiffness(self, coef, quadrature):
        if self.strategy == "csr":
            return self.plan.plan.matrix(self.stiffness_data(coef, quadrature))
        volumes, gradients = self.geometry()
        values = tetrahedron_stiffness_values(self.mesh.points, self.mesh.cells, volumes,
                                              gradients, coef, quadrature)
        return self._matrix(values)

    def stiffness_data(self, coef, quadrature, out=None):
        """The csr strategy's stiffness values on the plan's pattern, from the six edge values
        of each cell computed straight from the coordinates (:mod:`hatkernels._jit.assembly3d`)."""
        m = self.mesh
        edges = np.empty((m.n_cells, 6))
        if coef.kind == "tensor":
            K = np.ascontiguousarray(coef.value, dtype=np.float64)
            if K.shape not in ((3, 3), (m.n_cells, 3, 3)):
                raise InputError(
                    f"{coef.name}: a tensor on tetrahedra must have shape (3, 3) or "
                    f"({m.n_cells}, 3, 3), got {K.shape}"
                )
            _jit3d.stiffness_edges_tensor(m.points, m.cells, K.reshape(-1, 3, 3),
                                          int(K.ndim == 3), edges)
        else:
            kappa = np.ascontiguousarray(
                np.atleast_1d(_tetrahedron_means(m.points, m.cells, coef, quadrature)),
                dtype=np.float64)
            _jit3d.stiffness_edges(m.points, m.cells, kappa, int(kappa.size > 1), edges)
        pl = self.plan.plan
        data = np.empty(pl.nnz) if out is None else out
        _jit3d.gather_edges(pl.indptr, pl.ptr, pl.codes, pl.slots, edges, data)
        return data

    def mass(self, coef, quadrature):
        volumes = self.volumes()
        return self._matrix(tetrahedron_mass_values(self.mesh.points, self.mesh.cells, volumes,
                                                    coef, quadrature))

    def lumped(self, coef, quadrature):
        volumes = self.volumes()
        values = tetrahedron_lumped_values(self.mesh.points, self.mesh.cells, volumes, coef,
                                           quadrature)
        diag = np.bincount(self.mesh.cells.ravel(), weights=values.ravel(),
                           minlength=self.mesh.n_points)
        return sp.csr_matrix(sp.diags(diag, format="csr"))

    def load(self, coef, quadrature):
        m = self.mesh
        if coef.kind in ("constant", "cell"):
            # the same value at the four vertices: one pass, no (M,) temporaries
            value = np.ascontiguousarray(np.atleast_1d(coef.value), dtype=np.float64)
            out = np.empty(m.n_points)
            _jit3d.load_per_tetrahedron(m.points, m.cells, value,
                                        0 if coef.kind == "constant" else 1, out)
            return out
        volumes = self.volumes()
        values = tetrahedron_load_values(self.mesh.points, self.mesh.cells, volumes, coef,
                                         quadrature)
        return np.bincount(self.mesh.cells.ravel(), weights=values.ravel(),
                           minlength=self.mesh.n_points)
