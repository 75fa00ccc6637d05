"""What :func:`hatkernels.eigenmodes` returns: the modes and what was found and spent.

Kept apart from the drivers (:mod:`hatkernels.eigen` on a stored mesh,
:mod:`hatkernels.eigen_patches` on a refinement that is never stored), which
both make them.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

__all__ = ["EigenStats", "Eigenmodes"]


@dataclasses.dataclass
class EigenStats:
    """What :func:`eigenmodes` did and cost.

    Attributes
    ----------
    method : str
        "dense", "shift-invert" or "lobpcg".
    unknowns : int
        Free unknowns of the problem (points not held and in some cell).
    block : int
        lobpcg's block size (wanted modes beyond the zero modes plus extra vectors); 0 otherwise.
    iterations : int
        lobpcg iterations on the given mesh (0 for shift-invert).
    levels : list of (unknowns, iterations)
        The nested iteration, coarsest first: the start level (0 iterations: shift-invert)
        and every level lobpcg ran on.
    converged : bool
    errors : ndarray, shape (k,)
        lobpcg's estimated relative errors of the eigenvalues (0 for zero modes; NaN for
        shift-invert, converged to machine precision by ARPACK).
    rtol : float
    products : dict
        Products with the stiffness matrix and with the mass matrix, and preconditioner
        applications, over all levels, each counted as its share of one on the given mesh.
    preconditioner : str
        What preconditioned lobpcg on the given mesh, in words ("" for shift-invert).
    shift : float
        The shift ``s`` of the zero modes' preconditioner ``K + s M`` (0 when there are none).
    timings : dict
        Seconds: ``assemble`` (all levels), ``setup`` (preconditioners), ``solve``
        (eigensolvers), ``total``; with lobpcg also the parts of ``solve`` spent in
        ``products`` (stiffness and mass), the ``preconditioner`` and the ``dense`` block
        algebra (Gram matrices and updates).
    product_seconds : float
        One product with the assembled stiffness matrix of the given mesh (the faster of the
        parallel CSR kernel and scipy's product, best of three), measured in the same call;
        NaN on a never-stored refinement (:mod:`hatkernels.eigen_patches`), which assembles
        nothing (``assemble`` is 0 there and ``work_units`` NaN).
    work_units : float
        ``timings["total"] / product_seconds``: the whole call in products with the
        matrix (the performance model of docs/eigenmodes.md).
    threads : int
    peak_rss_bytes : int
    """

    method: str
    unknowns: int
    block: int = 0
    iterations: int = 0
    levels: list = dataclasses.field(default_factory=list)
    converged: bool = True
    errors: np.ndarray = None
    rtol: float = math.nan
    products: dict = dataclasses.field(default_factory=dict)
    preconditioner: str = ""
    shift: float = 0.0
    timings: dict = dataclasses.field(default_factory=dict)
    product_seconds: float = math.nan
    work_units: float = math.nan
    threads: int = 1
    peak_rss_bytes: int = 0


class Eigenmodes(tuple):
    """``(values, vectors)``, with what was found about them.

    A tuple, so ``values, vectors = eigenmodes(mesh, k)`` works.

    Attributes
    ----------
    values : ndarray, shape (k,)
        Ascending; exactly 0.0 for zero modes.
    vectors : ndarray, shape (n_points, k)
        Mass-normalised (``v.T @ M @ v = 1`` with the mass matrix of ``rho``),
        M-orthogonal, 0 at held points and at points in no cell; each one's
        largest entry (by magnitude, the first of equals) is positive.
    zero_modes : ndarray of bool, shape (k,)
        True for the eigenvalue 0 of a part of the mesh that nothing holds
        (its vector is constant on that part and 0 elsewhere).
    stats : EigenStats
    mesh : Mesh
    """

    def __new__(cls, values, vectors, zero_modes, stats, mesh):
        self = super().__new__(cls, (values, vectors))
        self.zero_modes = zero_modes
        self.stats = stats
        self.mesh = mesh
        return self

    def __reduce__(self):
        return (Eigenmodes, (self[0], self[1], self.zero_modes, self.stats, self.mesh))

    @property
    def values(self):
        return self[0]

    @property
    def vectors(self):
        return self[1]

    def __repr__(self):
        s = self.stats
        shown = ", ".join(f"{v:.6g}" for v in self.values[:4])
        more = ", ..." if len(self.values) > 4 else ""
        return (f"Eigenmodes([{shown}{more}], {int(self.zero_modes.sum())} zero modes, "
                f"{s.method}, {s.unknowns} unknowns)")
