"""The ``direct`` preconditioner: a sparse LU factorisation (scipy's SuperLU).

Used as a preconditioner, CG converges in one or two iterations (the factor is
exact up to round-off); it exists as a reference and for small systems.  The
fill-in of a sparse factorisation grows faster than ``n`` (for 2-D meshes
about ``n log n`` entries and ``n^1.5`` flops with a fill-reducing ordering),
so it is refused above :data:`DIRECT_LIMIT` unknowns unless the caller raises
the limit.
"""

from scipy.sparse.linalg import splu

from hatkernels.checks import integer_option
from hatkernels.errors import InputError
from hatkernels.precond.registry import Preconditioner, require_csr

__all__ = ["SparseDirect", "DIRECT_LIMIT"]

#: Default largest system ``direct`` accepts.  On a 2-D Poisson grid of 490 000
#: unknowns SuperLU (minimum-degree ordering on A + A^T) stores ~70 entries per
#: unknown (about 0.4 GB) and takes ~3.5 s on this project's 2-core benchmark
#: machine, several times AMG's setup plus solve (see docs/solvers.md).
DIRECT_LIMIT = 500_000


class SparseDirect(Preconditioner):
    """``M = A^{-1}`` through SuperLU (``scipy.sparse.linalg.splu``).

    Parameters
    ----------
    A : sparse matrix, shape (n, n)
    max_unknowns : int
        Refuse systems larger than this (default :data:`DIRECT_LIMIT`).
    permc_spec : str
        Column ordering passed to ``splu``.  The default, minimum degree on
        ``A^T + A`` with symmetric mode and no pivoting, suits SPD matrices.

    Costs: setup ``O(n^1.5)`` flops on 2-D meshes; storage and an apply both
    ~12 bytes (and 2 flops) per factor entry, ~70 entries per unknown for a
    2-D grid of 5e5 unknowns.
    """

    name = "direct"
    #: Peak bytes per point of a whole solve with it, beyond the mesh (measured at
    #: about 1e6 unknowns, docs/performance.md; hatkernels.memory uses it).
    solve_bytes_per_point = 2900
    #: On tetrahedra the fill-in is far larger: SuperLU on 103,823 unknowns of a cuboid
    #: took 2.5e8 factor entries, about 29,000 bytes per point (growing with the size).
    solve_bytes_per_point_3d = 30_000
    kind = "sparse LU factorisation (SuperLU)"

    def __init__(self, A, *, max_unknowns=DIRECT_LIMIT, permc_spec="MMD_AT_PLUS_A"):
        C = require_csr(A, self.name)
        n = C.shape[0]
        max_unknowns = integer_option(max_unknowns, "direct: max_unknowns")
        if n > max_unknowns:
            raise InputError(
                f"direct: refused for n = {n} unknowns, above the limit of {max_unknowns}: "
                f"sparse LU fill-in and time grow faster than n (about n log n entries and "
                f"n^1.5 flops for 2-D meshes; ~0.4 GB and seconds at {DIRECT_LIMIT} unknowns). "
                f"Use 'amg', or pass max_unknowns={n} to factorise anyway.")
        super().__init__(n)
        opts = {}
        if permc_spec == "MMD_AT_PLUS_A":
            opts = {"diag_pivot_thresh": 0.0, "options": {"SymmetricMode": True}}
        try:
            self._lu = splu(C.tocsc(), permc_spec=permc_spec, **opts)
        except (RuntimeError, ValueError) as exc:
            raise InputError(f"direct: factorisation failed ({exc}); "
                             f"A is singular or permc_spec is invalid") from None
        self._nnz = int(self._lu.L.nnz + self._lu.U.nnz)
        self._itemsize = 8 + self._lu.L.indices.itemsize

    def _apply(self, r):
        return self._lu.solve(r)

    @property
    def memory_bytes(self):
        n = self.shape[0]
        return self._nnz * self._itemsize + 2 * 8 * (n + 1) + 2 * 4 * n

    def _details(self):
        return f"nnz(L+U)={self._nnz} ({self._nnz / self.shape[0]:.1f} per unknown)"


def coarse_correction(solver, A, free, x, b, zero_guess):
    """A multigrid cycle's bottom: ``x`` solved at the ``free`` points of the coarsest
    level with ``solver`` (an approximation of ``A^-1``, ``A`` the free part), 0 at the
    others when ``zero_guess``; otherwise ``x`` corrected by ``solver (b - A x)`` there."""
    if zero_guess:
        x[:] = 0.0
        x[free] = solver.matvec(b[free])
    else:
        rf = b[free] - A @ x[free]
        x[free] += solver.matvec(rf)
