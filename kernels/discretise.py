"""From a :class:`~hatkernels.problem.PoissonProblem` to the linear system CG solves.

Two forms, one :class:`LinearSystem`:

assembled
    stiffness (+ mass of the reaction, + Robin boundary mass) in canonical
    CSR, reduced to the free unknowns in its own arrays
    (:func:`hatkernels.boundary.apply_dirichlet_in_place`);
matrix-free
    a :class:`~hatkernels.StiffnessOperator` with identity rows at the held
    points, the held values lifted to the right-hand side (stiffness term
    only: no reaction or Robin term).

Either way the system knows how to go between its unknowns and all points
(:meth:`LinearSystem.expand`, :meth:`LinearSystem.restrict`), what it stores
and the :class:`~hatkernels.precond.PreconditionerContext` that tells a
preconditioner where it came from.
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np

from hatkernels.assembly import StiffnessAssembler, assemble_load
from hatkernels.assembly.boundary_terms import side_load, side_mass
from hatkernels.boundary import apply_dirichlet_in_place
from hatkernels.errors import InputError
from hatkernels.operators import StiffnessOperator
from hatkernels.precond import PreconditionerContext
from hatkernels.solver import stored_bytes

__all__ = ["LinearSystem", "discretise", "balanced", "boundary_vector", "zero_means"]


@dataclasses.dataclass(repr=False)
class LinearSystem:
    """``A x = b`` for the unknowns of a problem.

    Attributes
    ----------
    A : scipy CSR (n_free, n_free), or StiffnessOperator (n_points, n_points); over MPI,
        this rank's :class:`~hatkernels.distributed.matrix.DistributedMatrix`
    b : ndarray
    problem : PoissonProblem
    matrix_free : bool
    variant : str or None
        The matrix-free variant (None when assembled).
    unknowns : int
        Free unknowns (the held points are not unknowns); over MPI, this rank's.
    stored_bytes : int
        What ``A`` stores.
    nnz : int
        Stored entries of ``A`` (0 when matrix-free).
    timings : dict
        Seconds of the phases that built it ("boundary", "assemble").
    mass : ndarray or None
        The row sums of its reaction and Robin terms, per point (for ``gmg``'s
        levels; :class:`~hatkernels.precond.PreconditionerContext`).
    """

    A: object
    b: np.ndarray
    problem: object
    matrix_free: bool
    variant: object
    unknowns: int
    stored_bytes: int
    nnz: int
    timings: dict
    _reduced: object = None
    mass: object = None

    def expand(self, x):
        """Values at all points from a solution ``x`` of the system (held values put back;
        a floating part of a ``zero_mean`` problem shifted to mean zero)."""
        u = x if self._reduced is None else self._reduced.expand(x)
        if self.problem.floating.size:
            u = zero_means(self.problem, u)
        return u

    def drop_matrix(self):
        """Let the assembled matrix go (``A`` becomes None) once a copy of it serves the solve
        (a renumbered one): one matrix less at the solve's peak.  ``expand`` and
        ``restrict`` still work."""
        self.A = None
        if self._reduced is not None:
            self._reduced = dataclasses.replace(self._reduced, A=None)

    @property
    def points(self):
        """The mesh point of each unknown (the free points of an assembled system)."""
        if self._reduced is not None:
            return self._reduced.free
        return np.arange(self.problem.mesh.n_points)

    def restrict(self, u):
        """The system's unknowns from values at all points."""
        if self._reduced is not None:
            return self._reduced.restrict(u)
        u = np.array(u, dtype=np.float64)
        held = self.problem.dirichlet
        u[held.points] = held.values
        return u

    def context(self):
        """The :class:`PreconditionerContext` of this system."""
        p = self.problem
        return PreconditionerContext(mesh=p.mesh, coefficient=p.coefficient,
                                     fixed=p.dirichlet.points, variant=self.variant,
                                     quadrature=p.quadrature, mass=self.mass)

    def __repr__(self):
        form = f"matrix-free ({self.variant})" if self.matrix_free else f"CSR, nnz {self.nnz}"
        return f"LinearSystem({self.unknowns} unknowns, {form}, {self.stored_bytes} bytes)"


def zero_means(problem, u):
    """``u`` shifted on each floating part of ``problem`` so that its mean over the part is 0.

    The mean is the integral of the P1 function over the part divided by the
    part's measure: weights ``int phi_i`` (the load of the source 1).
    """
    mesh = problem.mesh
    labels = problem.part_labels
    weights = assemble_load(mesh, 1.0)
    u = np.array(u, dtype=np.float64)
    for part in problem.floating:
        inside = labels == part
        u[inside] -= np.dot(weights[inside], u[inside]) / weights[inside].sum()
    return u


def balanced(problem, b):
    """``b`` with each floating part's sum removed in proportion to ``int phi_i``.

    That is a constant subtracted from the part's source: it makes the
    singular part's system consistent, so the held pin point takes no load.
    """
    labels = problem.part_labels
    weights = assemble_load(problem.mesh, 1.0)
    for part in problem.floating:
        inside = labels == part
        b[inside] -= b[inside].sum() * weights[inside] / weights[inside].sum()
    return b


def boundary_vector(problem):
    """The flux and Robin loads ``int h phi_i + int s phi_i`` over their sides, shape (n_points,)."""
    mesh, q = problem.mesh, problem.quadrature
    b = np.zeros(mesh.n_points)
    if problem.flux is not None:
        b += side_load(mesh, problem.flux.flux, problem.flux.sides, q)
    if problem.robin is not None:
        b += side_load(mesh, problem.robin.s, problem.robin.sides, q)
    return b


def _lower_order_terms(problem, assembler, quadrature):
    """The reaction and Robin matrices of ``problem`` that it has (a generator)."""
    if problem.reaction is not None:
        yield assembler.assemble_mass(problem.reaction, quadrature=quadrature)
    if problem.robin is not None:
        yield side_mass(problem.mesh, problem.robin.r, problem.robin.sides, quadrature)


def discretise(problem, *, matrix_free=False, variant=None, progress=None):
    """The :class:`LinearSystem` of ``problem``.

    Parameters
    ----------
    problem : PoissonProblem
    matrix_free : bool
        Build the matrix-free form (stiffness term only).
    variant : str, optional
        Its variant (:data:`hatkernels.operators.VARIANTS`, or ``inherited``); default
        :func:`~hatkernels.operators.preferred_variant` of the mesh.
    progress : callable, optional
        ``progress(phase)`` as "boundary" and "assemble" start.

    Returns
    -------
    LinearSystem
    """
    note = progress or (lambda phase: None)
    mesh, q = problem.mesh, problem.quadrature
    timings = {}
    if matrix_free and problem.lower_order:
        raise InputError("matrix_free=True supports the stiffness term only (no reaction or robin)")
    if variant is not None and not matrix_free:
        raise InputError("variant applies to matrix-free systems (matrix_free=True)")

    note("boundary")
    t = time.perf_counter()
    b = boundary_vector(problem)
    timings["boundary"] = time.perf_counter() - t

    note("assemble")
    t = time.perf_counter()
    b += assemble_load(mesh, problem.source, quadrature=q)
    if problem.floating.size:
        b = balanced(problem, b)
    held = problem.dirichlet
    if matrix_free:
        op = StiffnessOperator(mesh, problem.coefficient, dirichlet=held.points, quadrature=q,
                               variant=variant)
        variant = op.variant
        g = np.zeros(mesh.n_points)
        g[held.points] = held.values
        b -= op.unmasked_matvec(g)  # lifting: move the known values to the right
        b[op.fixed] = g[op.fixed]
        del g  # a vector less during the solve
        system = LinearSystem(op, b, problem, True, variant, mesh.n_points - len(op.fixed),
                              int(op.nbytes), 0, timings)
    else:
        # row by row in mesh order: the bits the distributed solve reproduces on any
        # number of ranks (one rank equals this solve to the last bit).  Each row computes
        # its triangles' values itself (``fused``): the same bits as from stored element
        # values (``by_rows``) without their 48 bytes per triangle of fresh memory, whose
        # first touch made that the slower of the two here (docs/assembly.md)
        assembler = StiffnessAssembler(mesh, fused=mesh.dim == 2)
        mass = None  # the lower-order terms' row sums, for gmg's levels
        if mesh.dim == 2 and not problem.lower_order:
            # each free row straight into the reduced matrix: the whole matrix's values
            # are never formed (the same bits as reducing the fused matrix below)
            reduced = assembler.assemble_reduced(b, held.points, held.values,
                                                 problem.coefficient, quadrature=q)
        else:
            if mesh.dim == 2:  # on the plan's own pattern: neither is used after the reduction
                A = assembler.plan.matrix(assembler.assemble_data(problem.coefficient,
                                                                  quadrature=q))
            else:
                A = assembler.assemble(problem.coefficient, quadrature=q)
            for term in _lower_order_terms(problem, assembler, q):
                A = A + term
                rows = np.asarray(term.sum(axis=1)).ravel()
                mass = rows if mass is None else mass + rows
            # A is ours and not used again: the reduced matrix is built in its arrays
            reduced = apply_dirichlet_in_place(A, b, held.points, held.values)
            del A
        system = LinearSystem(reduced.A, reduced.b, problem, False, None, reduced.A.shape[0],
                              stored_bytes(reduced.A), int(reduced.A.nnz), timings, reduced,
                              mass)
    timings["assemble"] = time.perf_counter() - t
    return system
