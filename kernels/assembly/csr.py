"""The ``csr`` strategy: symbolic phase once, then a parallel, race-free numeric phase."""

import numpy as np

from hatkernels._jit import assembly as _jit_assembly
from hatkernels.assembly.elements import mass_values
from hatkernels.assembly.plan import build_plan
from hatkernels.coefficients import triangle_means


def kernel_coefficient(coef, mesh, quadrature):
    """The kernel's view of a stiffness coefficient: ``(kappa, ks, tensor, ts)``."""
    empty = np.empty((0, 2, 2))
    if coef.kind == "tensor":
        T = np.ascontiguousarray(coef.value, dtype=np.float64).reshape(-1, 2, 2)
        return np.ones(1), 0, T, 1 if coef.value.ndim == 3 else 0
    mean = triangle_means(coef, mesh, quadrature)
    if np.ndim(mean) == 0:
        return np.array([float(mean)]), 0, empty, 0
    return np.ascontiguousarray(mean, dtype=np.float64), 1, empty, 0


class CSRNumeric:
    """Numeric phases on a :class:`~hatkernels.assembly.plan.CSRPlan`.

    ``fused=True`` computes the stiffness without the (M, 3) element-value
    temporaries (48 bytes per triangle less at peak, slower by the
    recomputation; see docs/assembly.md).
    """

    def __init__(self, mesh, plan=None, *, fused=False):
        self.mesh = mesh
        self.plan = build_plan(mesh) if plan is None else plan
        self.fused = fused

    def stiffness_data(self, coef, quadrature, out=None):
        pl, m = self.plan, self.mesh
        data = np.empty(pl.nnz) if out is None else out
        kappa, ks, tensor, ts = kernel_coefficient(coef, m, quadrature)
        if self.fused:
            _jit_assembly.gather_stiffness(
                m.points,
                pl.triangles,
                kappa,
                ks,
                tensor,
                ts,
                pl.indptr,
                pl.diag,
                pl.ptr,
                pl.codes,
                pl.slot_next,
                pl.slot_prev,
                data,
            )
            return data
        d = np.empty((m.n_triangles, 3))
        o = np.empty((m.n_triangles, 3))
        _jit_assembly.stiffness_values(m.points, pl.triangles, kappa, ks, tensor, ts, d, o)
        self._gather(d, o, data)
        return data

    def mass_data(self, coef, quadrature, out=None):
        d, o = mass_values(self.mesh, coef, quadrature)
        data = np.empty(self.plan.nnz) if out is None else out
        self._gather(np.ascontiguousarray(d), np.ascontiguousarray(o), data)
        return data

    def _gather(self, d, o, data):
        pl = self.plan
        _jit_assembly.gather_values(
            pl.indptr, pl.diag, pl.ptr, pl.codes, pl.slot_next, pl.slot_prev, d, o, data
        )
