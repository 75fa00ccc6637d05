"""What the conjugate-gradient loop (:mod:`hatkernels._cg`) is given besides the operator:
the preconditioner as an object of the protocol, and the vectors it may keep between
solves.

A march solves one system per step: fresh vectors on every solve would be touched for
the first time on every step (page faults: 0.1 to 0.3 s per GiB measured on the
development machine when the system has the pages at hand, up to 3 s per GiB when it
must first back them), so a
:class:`Workspace` keeps them for the next solve of the same length.
"""

from __future__ import annotations

import numpy as np
from scipy.sparse.linalg import LinearOperator, aslinearoperator

from hatkernels._jit import sparse as _k
from hatkernels.errors import InputError

__all__ = ["Workspace", "as_preconditioner"]


class Workspace:
    """CG's vectors by name, kept between solves (``get`` makes one of a new length).

    The solution a solve returns is one of them: the caller copies what it keeps
    before the next solve with the same workspace.
    """

    def __init__(self):
        self._vectors = {}

    def get(self, name, n):
        v = self._vectors.get(name)
        if v is None or v.shape[0] != n:
            v = self._vectors[name] = np.empty(n)
        return v

    @property
    def nbytes(self):
        return sum(v.nbytes for v in self._vectors.values())


class _Diagonal:
    """A preconditioner given by its inverse diagonal (applied inside CG's vector update)."""

    def __init__(self, dinv):
        self.inverse_diagonal = dinv

    def apply_into(self, r, z):
        _k.jacobi_apply(self.inverse_diagonal, r, z)


class _ApplyOnly:
    """A preconditioner's ``apply_into`` without its other attributes."""

    def __init__(self, apply_into):
        self.apply_into = apply_into


class _MatvecPreconditioner:
    """A LinearOperator's ``matvec`` as ``apply_into``; the result is checked for shape."""

    def __init__(self, op, n):
        self.op = op
        self.n = n

    def apply_into(self, r, z):
        y = np.asarray(self.op.matvec(r))
        if y.shape not in ((self.n,), (self.n, 1)):
            raise InputError(f"M.matvec returned shape {y.shape}, expected ({self.n},)")
        z[:] = y.reshape(self.n)


def as_preconditioner(M, n):
    """``M`` as an object of the preconditioner protocol, or None for the identity.

    Objects of the protocol (:mod:`hatkernels.krylov`) are used as they are
    (a valid ``inverse_diagonal`` first); anything else that scipy can turn
    into a LinearOperator of shape ``(n, n)`` is wrapped so that its
    ``matvec`` serves as ``apply_into``.
    """
    if M is None or getattr(M, "is_identity", False) is True:
        return None
    dinv = getattr(M, "inverse_diagonal", None)
    if isinstance(dinv, np.ndarray) and dinv.shape == (n,) and dinv.dtype == np.float64:
        return _Diagonal(np.ascontiguousarray(dinv))
    if callable(getattr(M, "apply_into", None)):
        shape = getattr(M, "shape", None)
        if shape is not None and tuple(shape) != (n, n):
            raise InputError(f"M has shape {shape}, expected ({n}, {n}) to match A")
        # an inverse diagonal of another length or dtype must not reach the fused kernel
        return M if dinv is None else _ApplyOnly(M.apply_into)
    if not isinstance(M, LinearOperator):
        try:
            M = aslinearoperator(M)
        except TypeError as exc:
            raise InputError(f"M must be None, a matrix, a LinearOperator or a preconditioner "
                             f"with apply_into ({exc})") from None
    if M.shape != (n, n):
        raise InputError(f"M has shape {M.shape}, expected ({n}, {n}) to match A")
    return _MatvecPreconditioner(M, n)
