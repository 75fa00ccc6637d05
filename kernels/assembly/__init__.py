"""Assembly of P1 stiffness and mass matrices, load vectors and boundary terms.

Three strategies build the same canonical scipy CSR matrix (sorted indices,
no duplicates, the full pattern of the mesh graph including explicit zeros):

``reference``
    Plain loops over triangles; the executable specification.
``triplets``
    Vectorised NumPy element matrices into scipy COO, converted to CSR; the
    common baseline.
``csr``
    numba, parallel: a symbolic phase (pattern and slot plan) once, then a
    numeric phase that fills ``data`` row by row with no COO step,
    race-free and with the same bits for any thread count.

On tetrahedra (a mesh of ``dim == 3``) the same three strategies apply to
the element values of :mod:`hatkernels.assembly.elements`, the ``csr`` one
through the generic plan of :class:`DofAssembler`
(:mod:`hatkernels.assembly.tetrahedra`).

See docs/assembly.md for what each costs.
"""

import numpy as np
import scipy.sparse as sp

from hatkernels._jit import assembly as _jit_assembly
from hatkernels.assembly import reference as _reference
from hatkernels.assembly import triplets as _triplets
from hatkernels.assembly.boundary_terms import boundary_load, boundary_mass
from hatkernels.assembly.csr import CSRNumeric
from hatkernels.assembly.dofs import DofAssembler
from hatkernels.assembly.elements import load_values, lumped_values, mass_values
from hatkernels.assembly.plan import CSRPlan, build_plan
from hatkernels.assembly.tetrahedra import TetrahedronAssembly
from hatkernels.boundary import apply_dirichlet_assembling, apply_dirichlet_in_place
from hatkernels.checks import into_vectors
from hatkernels.coefficients import parse_coefficient
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh

__all__ = [
    "STRATEGIES",
    "CSRPlan",
    "DofAssembler",
    "StiffnessAssembler",
    "assemble_boundary_load",
    "assemble_boundary_mass",
    "assemble_load",
    "assemble_mass",
    "assemble_stiffness",
    "build_plan",
]

#: Values of ``strategy``: plain loops (the specification), vectorised triplets
#: through scipy's COO, and the parallel symbolic-then-numeric ``csr`` (the default).
STRATEGIES = ("reference", "triplets", "csr")


def _mesh(mesh):
    if not isinstance(mesh, Mesh):
        raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
    return mesh


def _strategy(strategy):
    if strategy not in STRATEGIES:
        raise InputError(f"unknown assembly strategy {strategy!r}; choose one of {STRATEGIES}")
    return strategy


class StiffnessAssembler:
    """Assemble many matrices on one mesh, paying for the symbolic phase once.

    Parameters
    ----------
    mesh : Mesh
    strategy : {"csr", "triplets", "reference"}
        Only ``csr`` reuses anything between calls; the others are here so
        that strategies can be swapped behind one interface.
    fused : bool
        ``csr`` only: fill the matrix row by row, computing each triangle's
        values at each of its vertices (nothing stored beyond the plan; slower).
    by_rows : bool
        ``csr`` only: fill the matrix row by row from stored element values,
        each row summing its triangles in mesh order: the bits of
        :func:`assemble_stiffness` and of the distributed assembly, whose
        owned rows are the serial ones.  By default the values go in triangle
        by triangle over coloured blocks of triangles (each geometry computed
        once; about twice as fast; the same matrix to rounding, still the same
        bits on any thread count and symmetric to the last bit).

    Examples
    --------
    >>> import hatkernels
    >>> assembler = hatkernels.StiffnessAssembler(hatkernels.mesh.rectangle(8, 8))
    >>> A1 = assembler.assemble()          # symbolic phase already done
    >>> A2 = assembler.assemble(2.5)       # numeric phase only
    >>> bool(abs(A2 - 2.5 * A1).max() < 1e-12)
    True
    """

    def __init__(self, mesh, *, strategy="csr", fused=False, index_dtype=None, by_rows=False):
        self.mesh = _mesh(mesh)
        self.strategy = _strategy(strategy)
        self._numeric = None
        self._cells3d = None
        if mesh.dim == 3:
            if fused or by_rows or index_dtype is not None:
                raise InputError("fused, by_rows and index_dtype apply to triangle meshes only")
            self._cells3d = TetrahedronAssembly(mesh, strategy)
        elif strategy == "csr":
            plan = build_plan(mesh, index_dtype_override=index_dtype)
            self._numeric = CSRNumeric(mesh, plan, fused=fused, by_rows=by_rows)

    @property
    def plan(self):
        """The :class:`CSRPlan` (``csr`` strategy only; on tetrahedra, the DofAssembler)."""
        if self._cells3d is not None:
            return self._cells3d.plan if self.strategy == "csr" else None
        return None if self._numeric is None else self._numeric.plan

    def _matrix(self, data):
        # Each matrix gets its own index arrays: scipy may change them in place.
        return self._numeric.plan.matrix(data, copy_pattern=True)

    def assemble(self, coefficient=None, *, quadrature=2):
        """Stiffness matrix ``int kappa grad phi_i . grad phi_j`` as canonical CSR.

        ``coefficient``: see :mod:`hatkernels.coefficients`; callables are
        averaged over each triangle with the rule of degree ``quadrature``.
        """
        coef = parse_coefficient(coefficient, self.mesh, name="coefficient", tensor=True)
        if self._cells3d is not None:
            return self._cells3d.stiffness(coef, quadrature)
        if self.strategy == "reference":
            return _reference.stiffness(self.mesh, coef, quadrature)
        if self.strategy == "triplets":
            return _triplets.stiffness(self.mesh, coef, quadrature)
        return self._matrix(self._numeric.stiffness_data(coef, quadrature))

    def assemble_data(self, coefficient=None, *, quadrature=2, out=None):
        """``csr`` only: the numeric phase alone, into ``out`` (the matrix ``data``) if given:
        a writable C-contiguous float64 vector of the pattern's length."""
        if self._numeric is None:
            raise InputError("assemble_data needs the csr strategy on a triangle mesh")
        coef = parse_coefficient(coefficient, self.mesh, name="coefficient", tensor=True)
        if out is not None:  # written in place: checked as every _into method's output
            into_vectors("StiffnessAssembler.assemble_data", self.plan.nnz,
                         outputs={"out": out}, size="the pattern has {:,} entries")
        return self._numeric.stiffness_data(coef, quadrature, out)

    def assemble_reduced(self, b, points, values=0.0, coefficient=None, *, quadrature=2):
        """The stiffness matrix reduced by Dirichlet conditions: ``apply_dirichlet(A, b,
        points, values)`` of ``A = assemble(coefficient)``, with each free row assembled
        straight into the reduced matrix, so the whole matrix's values are never formed.

        ``csr`` on triangles only.  The bits are those of a ``fused`` (or ``by_rows``)
        assembler's matrix, reduced.  A free row whose diagonal is not positive (checked
        meshes and coefficients give none; only an overflow could) sends the call
        through the whole matrix, whose reduction reports the row.
        ``b`` is not modified.  Returns a :class:`~hatkernels.boundary.DirichletSystem`.
        """
        if self._numeric is None:
            raise InputError("assemble_reduced needs the csr strategy on a triangle mesh")
        coef = parse_coefficient(coefficient, self.mesh, name="coefficient", tensor=True)
        pl = self.plan

        def fill(*arrays):
            return self._numeric.stiffness_reduced(coef, quadrature, *arrays)

        rows = pl.ptr[1:] > pl.ptr[:-1]  # points in at least one triangle
        reduced = apply_dirichlet_assembling((pl.indptr, pl.indices), rows, fill, b, points,
                                             values)
        if reduced is None:
            fused = CSRNumeric(self.mesh, pl, fused=True).stiffness_data(coef, quadrature)
            reduced = apply_dirichlet_in_place(pl.matrix(fused, copy_pattern=True), b, points,
                                               values)
        return reduced

    def assemble_mass(self, coefficient=None, *, lumped=False, quadrature=2):
        """Mass matrix ``int c phi_i phi_j`` (consistent, or lumped to its row sums)."""
        coef = parse_coefficient(coefficient, self.mesh, name="mass coefficient", sign="any")
        if self._cells3d is not None:
            return (self._cells3d.lumped if lumped else self._cells3d.mass)(coef, quadrature)
        if lumped:
            return _lumped(self.mesh, coef, quadrature)
        if self.strategy == "reference":
            return _reference.mass(self.mesh, coef, quadrature)
        if self.strategy == "triplets":
            return _triplets.mass(self.mesh, coef, quadrature)
        return self._matrix(self._numeric.mass_data(coef, quadrature))


def _lumped(mesh, coef, quadrature):
    d, o = mass_values(mesh, coef, quadrature)
    diag = np.bincount(
        mesh.triangles.ravel(), weights=lumped_values(d, o).ravel(), minlength=mesh.n_points
    )
    return sp.csr_matrix(sp.diags(diag, format="csr"))


def assemble_stiffness(mesh, coefficient=None, *, strategy="csr", quadrature=2):
    """Stiffness matrix ``A_ij = int kappa grad phi_i . grad phi_j`` as canonical scipy CSR.

    Parameters
    ----------
    mesh : Mesh
    coefficient : None, number, array, tensor or callable
        ``kappa``: see :mod:`hatkernels.coefficients`.  It must be positive (tensors
        symmetric positive definite); the error names the first bad triangle or point.
    strategy : {"csr", "triplets", "reference"}
    quadrature : int
        Degree of the rule that averages a callable coefficient over each triangle.

    Examples
    --------
    >>> import hatkernels
    >>> A = hatkernels.assemble_stiffness(hatkernels.mesh.rectangle(4, 4))
    >>> A.shape, float(A[12, 12])                # an interior point: 4 on the diagonal
    ((25, 25), 4.0)
    """
    if _strategy(strategy) != "csr" or _mesh(mesh).dim == 3:
        return StiffnessAssembler(mesh, strategy=strategy).assemble(coefficient, quadrature=quadrature)
    # One matrix only: the fused numeric phase (no element-value temporaries)
    # and the plan's pattern handed to the matrix, which keeps the peak memory
    # near the plan plus the matrix itself.
    assembler = StiffnessAssembler(mesh, fused=True)
    return assembler.plan.matrix(assembler.assemble_data(coefficient, quadrature=quadrature))


def assemble_mass(mesh, coefficient=None, *, lumped=False, strategy="csr", quadrature=2):
    """Mass matrix ``M_ij = int c phi_i phi_j`` as canonical scipy CSR.

    ``lumped=True`` returns the diagonal matrix of its row sums.  The
    coefficient ``c`` may be a number, per triangle, per point (exact for
    the linear interpolant) or a callable (quadrature of ``quadrature``
    degree); its sign is not restricted.

    >>> import hatkernels
    >>> M = hatkernels.assemble_mass(hatkernels.mesh.rectangle(3, 3))
    >>> round(float(M.sum()), 12)                # the area of the unit square
    1.0
    """
    if _mesh(mesh).dim == 3:
        return StiffnessAssembler(mesh, strategy=strategy).assemble_mass(
            coefficient, lumped=lumped, quadrature=quadrature)
    if lumped:
        coef = parse_coefficient(coefficient, mesh, name="mass coefficient", sign="any")
        return _lumped(mesh, coef, quadrature)
    if _strategy(strategy) != "csr":
        return StiffnessAssembler(mesh, strategy=strategy).assemble_mass(
            coefficient, quadrature=quadrature
        )
    assembler = StiffnessAssembler(mesh)
    coef = parse_coefficient(coefficient, mesh, name="mass coefficient", sign="any")
    return assembler.plan.matrix(assembler._numeric.mass_data(coef, quadrature))


def assemble_load(mesh, f, *, quadrature=2):
    """Load vector ``b_i = int f phi_i``, shape (n_points,).

    ``f`` is a number, an array per point (integrated exactly as its linear
    interpolant), per triangle, or a callable ``f(x, y)`` integrated with the
    triangle rule exact to degree ``quadrature`` (1, 2 or 5; see
    :mod:`hatkernels.quadrature`).

    >>> import hatkernels
    >>> b = hatkernels.assemble_load(hatkernels.mesh.rectangle(2, 2), 3.0)
    >>> round(float(b.sum()), 12)                # 3 times the area
    3.0
    """
    _mesh(mesh)
    coef = parse_coefficient(f, mesh, name="load", sign="any")
    if mesh.dim == 3:
        return TetrahedronAssembly(mesh).load(coef, quadrature)
    tri = mesh.triangles
    if coef.kind in ("constant", "cell"):
        # the same value at the three vertices: one pass, no (M,) temporaries
        value = np.ascontiguousarray(np.atleast_1d(coef.value), dtype=np.float64)
        out = np.empty(mesh.n_points)
        _jit_assembly.load_per_triangle(
            mesh.points, tri, value, 0 if coef.kind == "constant" else 1, out
        )
        return out
    v = load_values(mesh, coef, quadrature)
    return sum(
        np.bincount(tri[:, a], weights=v[:, a], minlength=mesh.n_points) for a in range(3)
    )


def assemble_boundary_load(mesh, g, edges=None, *, quadrature=2):
    """Neumann load ``b_i = int_Gamma g phi_i ds`` over sides (default: the whole boundary).

    ``edges``: the sides, (k, 2) edges of triangles or (k, 3) faces of
    tetrahedra (default :meth:`Mesh.boundary_edges` / :meth:`Mesh.boundary_faces`).
    ``g``: a number, an array per point or per side (in the order of the
    sides), or a callable integrated exactly to degree ``quadrature``
    (Gauss-Legendre on edges, :func:`~hatkernels.quadrature.triangle_rule` on faces).

    >>> import hatkernels
    >>> b = hatkernels.assemble_boundary_load(hatkernels.mesh.rectangle(2, 2), 1.0)
    >>> round(float(b.sum()), 12)                # the perimeter
    4.0
    >>> b = hatkernels.assemble_boundary_load(hatkernels.mesh.cuboid(2, 2, 2), 1.0)
    >>> round(float(b.sum()), 12)                # the surface of the unit cube
    6.0
    """
    return boundary_load(_mesh(mesh), g, edges, quadrature=quadrature)


def assemble_boundary_mass(mesh, r, edges=None, *, quadrature=2):
    """Robin term ``R_ij = int_Gamma r phi_i phi_j ds`` over sides (edges or faces, as for
    :func:`assemble_boundary_load`), as canonical CSR.

    ``r`` must be non-negative (so that stiffness plus ``R`` stays positive definite).

    >>> import hatkernels
    >>> R = hatkernels.assemble_boundary_mass(hatkernels.mesh.rectangle(2, 2), 2.0)
    >>> round(float(R.sum()), 12)                # r times the perimeter
    8.0
    """
    return boundary_mass(_mesh(mesh), r, edges, quadrature=quadrature)
