"""Preconditioners for conjugate gradients, built once and applied many times.

:data:`PRECONDITIONERS` lists the registered names:

``none``    identity
``jacobi``  diagonal scaling
``ic0``     incomplete Cholesky, zero fill (``modified=True`` for the modified variant)
``amg-sa``  smoothed-aggregation AMG (PyAMG hierarchy)
``amg-rs``  classical Ruge-Stuben AMG (PyAMG hierarchy)
``amg-native`` classical AMG (C/F splitting in point order where the numbering has locality), hierarchy built by this project's parallel kernels
``direct``  sparse LU (SuperLU), refused above a size limit
``amg``     the AMG variant measured fastest on 2-D Poisson (docs/solvers.md)
``gmg``     geometric multigrid on a mesh's refinement history, matrix-free

:func:`make_preconditioner` builds one; :func:`register_preconditioner` adds
a user factory.
"""

from hatkernels.precond.amg import RugeStubenAMG, SmoothedAggregationAMG
from hatkernels.precond.classical import ClassicalAMG
from hatkernels.precond.direct import DIRECT_LIMIT, SparseDirect
from hatkernels.precond.gmg import GeometricMultigrid
from hatkernels.precond.ichol import IncompleteCholesky
from hatkernels.precond.jacobi import Identity, Jacobi
from hatkernels.precond.registry import (
    PRECONDITIONERS,
    Capabilities,
    Preconditioner,
    PreconditionerContext,
    capabilities,
    make_preconditioner,
    register_preconditioner,
)

__all__ = [
    "PRECONDITIONERS",
    "Capabilities",
    "Preconditioner",
    "PreconditionerContext",
    "capabilities",
    "make_preconditioner",
    "register_preconditioner",
    "Identity",
    "Jacobi",
    "IncompleteCholesky",
    "SmoothedAggregationAMG",
    "RugeStubenAMG",
    "ClassicalAMG",
    "SparseDirect",
    "GeometricMultigrid",
    "DIRECT_LIMIT",
    "AMG_DEFAULT",
    "DEFAULT",
]

#: The preconditioner of a solve that names none (the default of hatkernels.solve and
#: solve_poisson; the distributed solve's on its replicated path).
DEFAULT = "amg"

#: The variant ``"amg"`` names: the faster one on 2-D Poisson in bench/test_bench_linear.py.
AMG_DEFAULT = "amg-native"

for _factory in (Identity, Jacobi, IncompleteCholesky, SmoothedAggregationAMG, RugeStubenAMG,
                 ClassicalAMG, SparseDirect):
    register_preconditioner(_factory.name, _factory)
register_preconditioner("amg", {"amg-sa": SmoothedAggregationAMG, "amg-rs": RugeStubenAMG,
                                "amg-native": ClassicalAMG}[AMG_DEFAULT])
register_preconditioner("gmg", GeometricMultigrid)
del _factory
