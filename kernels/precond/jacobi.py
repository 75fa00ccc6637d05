"""The identity (``none``) and the diagonal (``jacobi``) preconditioners."""

import numpy as np

from hatkernels._jit import sparse as _k
from hatkernels.checks import into_vectors
from hatkernels.precond.registry import Preconditioner, checked_diagonal, require_csr

__all__ = ["Identity", "Jacobi"]


class Identity(Preconditioner):
    """``M = I``: plain conjugate gradients.  Setup and apply cost nothing but a copy."""

    name = "none"
    #: Peak bytes per point of a whole solve with it, beyond the mesh (measured at
    #: about 1e6 unknowns, docs/performance.md; hatkernels.memory uses it).
    solve_bytes_per_point = 380
    kind = "identity (no preconditioning)"
    #: Tells :func:`hatkernels.krylov.cg` to skip the apply (plain CG).
    is_identity = True
    needs_matrix = False

    def __init__(self, A):
        super().__init__(A.shape[0])

    def _apply(self, r):
        return r.copy()

    def apply_into(self, r, z):
        """``z = r``; returns ``z``.  ``r`` and ``z`` as in
        :meth:`hatkernels.precond.Preconditioner.apply_into`."""
        r, = into_vectors("Identity.apply_into", self.shape[0], {"r": r}, {"z": z})
        z[:] = r
        return z


class Jacobi(Preconditioner):
    """``M = diag(A)^{-1}``.

    Setup reads the matrix once; an apply reads two vectors and writes one
    (24 bytes and 1 flop per unknown).  :func:`hatkernels.krylov.cg` fuses it
    into its vector update through ``inverse_diagonal``.

    Raises
    ------
    InputError
        A diagonal entry is missing or not positive (the message names the row).
    """

    name = "jacobi"
    #: Peak bytes per point of a whole solve with it, beyond the mesh (measured at
    #: about 1e6 unknowns, docs/performance.md; hatkernels.memory uses it).
    solve_bytes_per_point = 400
    is_diagonal = True
    kind = "diagonal (Jacobi) scaling"

    def __init__(self, A):
        C = require_csr(A, self.name)
        super().__init__(C.shape[0])
        self.inverse_diagonal = 1.0 / checked_diagonal(C, self.name)

    def _apply(self, r):
        out = np.empty_like(r)
        self.apply_into(r, out)
        return out

    def apply_into(self, r, z):
        """``z = D^-1 r``; returns ``z``.  ``r`` and ``z`` as in
        :meth:`hatkernels.precond.Preconditioner.apply_into`."""
        r, = into_vectors("Jacobi.apply_into", self.shape[0], {"r": r}, {"z": z})
        _k.jacobi_apply(self.inverse_diagonal, r, z)
        return z

    @property
    def memory_bytes(self):
        return self.inverse_diagonal.nbytes
