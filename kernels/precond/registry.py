"""The preconditioner registry, the common base class and shared checks.

A preconditioner is built once from a matrix (setup) and applied many times
(a scipy ``LinearOperator`` approximating ``A^{-1}``, symmetric positive
definite so that conjugate gradients can use it).  Factories are registered
by name; :func:`make_preconditioner` looks the name up, checks the options
against the factory's keyword parameters, times the setup and returns the
operator.
"""

import inspect
import time
from collections.abc import Sequence

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import LinearOperator

from hatkernels.errors import InputError
from hatkernels.sparse import as_csr

__all__ = [
    "PRECONDITIONERS",
    "Preconditioner",
    "make_preconditioner",
    "register_preconditioner",
    "require_csr",
    "checked_diagonal",
]


def _format_seconds(t):
    if t < 1e-3:
        return f"{t * 1e6:.0f} us"
    if t < 1.0:
        return f"{t * 1e3:.1f} ms"
    return f"{t:.2f} s"


class Preconditioner(LinearOperator):
    """Base of the built-in preconditioners: a float64 symmetric LinearOperator.

    Subclasses set ``name`` and ``kind`` (what it is, in words), implement
    ``_apply(r)`` on a contiguous float64 vector, and may override
    ``memory_bytes`` and ``_details()`` (what it costs, in words).
    """

    name = "?"
    kind = "?"

    def __init__(self, n):
        super().__init__(dtype=np.dtype(np.float64), shape=(n, n))
        self.setup_seconds = None
        self.requested_name = None

    def _matvec(self, x):
        r = np.ascontiguousarray(x, dtype=np.float64).reshape(-1)
        return self._apply(r)

    def _rmatvec(self, x):
        return self._matvec(x)

    def _adjoint(self):
        return self

    def _apply(self, r):  # pragma: no cover - every subclass overrides it
        raise NotImplementedError

    @property
    def memory_bytes(self):
        """Bytes held by the preconditioner's arrays."""
        return 0

    def _details(self):
        return ""

    @property
    def description(self):
        """One line: name, what it is, what it costs."""
        name = self.name
        if self.requested_name and self.requested_name != self.name:
            name = f"{self.requested_name} (= {self.name})"
        parts = [f"{name}: {self.kind}", f"n={self.shape[0]}"]
        details = self._details()
        if details:
            parts.append(details)
        parts.append(f"memory {self.memory_bytes} bytes")
        if self.setup_seconds is not None:
            parts.append(f"setup {_format_seconds(self.setup_seconds)}")
        return ", ".join(parts)

    def __repr__(self):
        return f"<Preconditioner {self.description}>"


class _UserPreconditioner(Preconditioner):
    """Wraps what a registered user factory returned, to time it and describe it."""

    kind = "user preconditioner"

    def __init__(self, op, name):
        super().__init__(op.shape[0])
        self.op = op
        self.name = name

    def _apply(self, r):
        return np.asarray(self.op.matvec(r), dtype=np.float64).reshape(-1)

    def _details(self):
        return repr(self.op)


class _Registry(Sequence):
    """The registered names, in registration order; a live, read-only tuple view."""

    def __init__(self):
        self._factories = {}

    def __getitem__(self, index):
        return tuple(self._factories)[index]

    def __len__(self):
        return len(self._factories)

    def __iter__(self):
        return iter(tuple(self._factories))

    def __contains__(self, name):
        return name in self._factories

    def __eq__(self, other):
        if isinstance(other, (_Registry, tuple)):
            return tuple(self) == tuple(other)
        return NotImplemented

    __hash__ = None

    def __repr__(self):
        return repr(tuple(self))


#: Names accepted by :func:`make_preconditioner` (a live view of the registry).
PRECONDITIONERS = _Registry()


def _option_names(factory):
    """Keyword options a factory accepts, or None when it takes ``**options``."""
    params = list(inspect.signature(factory).parameters.values())[1:]
    if any(p.kind is p.VAR_KEYWORD for p in params):
        return None
    return tuple(p.name for p in params
                 if p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD))


def register_preconditioner(name, factory, *, overwrite=False):
    """Register ``factory(A, **options) -> LinearOperator`` under ``name``.

    ``A`` reaches the factory as a checked float64 CSR matrix (or as the
    LinearOperator the caller passed).  The operator must approximate
    ``A^{-1}`` and be symmetric positive definite for CG.  Returns ``factory``.

    Raises
    ------
    InputError
        ``name`` is not a non-empty string, is taken (unless ``overwrite``),
        or ``factory`` is not callable.
    """
    if not isinstance(name, str) or not name.strip():
        raise InputError(f"preconditioner name must be a non-empty string, got {name!r}")
    if not callable(factory):
        raise InputError(f"factory for preconditioner {name!r} must be callable, "
                         f"got {type(factory).__name__}")
    if name in PRECONDITIONERS._factories and not overwrite:
        raise InputError(f"preconditioner {name!r} is already registered; "
                         f"pass overwrite=True to replace it")
    try:
        _option_names(factory)
    except (TypeError, ValueError) as exc:
        raise InputError(f"factory for {name!r} has no inspectable signature ({exc})") from None
    PRECONDITIONERS._factories[name] = factory
    return factory


def make_preconditioner(A, name, **options):
    """Build the preconditioner ``name`` for ``A``; return an SPD LinearOperator.

    Parameters
    ----------
    A : sparse matrix, shape (n, n)
        Symmetric positive definite.  Any scipy sparse format; it is checked
        and converted to float64 CSR once, never modified.  ``"none"`` and
        user factories also accept a LinearOperator.
    name : str
        One of :data:`PRECONDITIONERS`.
    **options
        Passed to the factory; each name must be one it accepts.

    Returns
    -------
    LinearOperator
        float64, shape (n, n); ``repr`` says what it is and what it cost.

    Examples
    --------
    >>> from pyamg.gallery import poisson
    >>> from hatkernels.precond import make_preconditioner
    >>> M = make_preconditioner(poisson((4, 4), format="csr"), "jacobi")
    >>> M.shape, M.dtype
    ((16, 16), dtype('float64'))
    """
    if not isinstance(name, str) or name not in PRECONDITIONERS:
        valid = ", ".join(repr(n) for n in PRECONDITIONERS)
        raise InputError(f"unknown preconditioner {name!r}; valid names: {valid}")
    factory = PRECONDITIONERS._factories[name]
    accepted = _option_names(factory)
    if accepted is not None:
        for key in options:
            if key not in accepted:
                listed = ", ".join(accepted) if accepted else "none"
                raise InputError(f"unknown option {key!r} for preconditioner {name!r}; "
                                 f"its options: {listed}")
    if isinstance(A, np.ndarray) and A.ndim == 2:
        A = sp.csr_array(A)
    if sp.issparse(A):
        A = as_csr(A)
    elif not isinstance(A, LinearOperator):
        raise InputError(f"A must be a scipy sparse matrix or a LinearOperator, "
                         f"got {type(A).__name__}")
    n = A.shape[0]
    start = time.perf_counter()
    op = factory(A, **options)
    seconds = time.perf_counter() - start
    if not isinstance(op, LinearOperator) or op.shape != (n, n):
        raise InputError(f"factory for preconditioner {name!r} returned "
                         f"{type(op).__name__} with shape {getattr(op, 'shape', None)}; "
                         f"expected a LinearOperator of shape ({n}, {n})")
    if not isinstance(op, Preconditioner):
        op = _UserPreconditioner(op, name)
    op.setup_seconds = seconds
    op.requested_name = name
    return op


def require_csr(A, who):
    """``A`` as CSR, or an InputError saying the preconditioner needs a matrix."""
    if not sp.issparse(A):
        raise InputError(f"preconditioner {who!r} needs an assembled sparse matrix, "
                         f"got {type(A).__name__}")
    return as_csr(A)


def checked_diagonal(C, who):
    """The diagonal of CSR ``C``; InputError naming the first row where it is missing or <= 0."""
    n = C.shape[0]
    counts = np.diff(C.indptr)
    rows = np.repeat(np.arange(n, dtype=C.indices.dtype), counts)
    present = np.zeros(n, dtype=bool)
    present[rows[C.indices[: C.indptr[-1]] == rows]] = True
    if not present.all():
        row = int(np.argmin(present))
        raise InputError(f"{who}: row {row} has no diagonal entry; a positive diagonal is "
                         f"needed (A must be symmetric positive definite)")
    d = C.diagonal()
    bad = ~(d > 0)
    if bad.any():
        row = int(np.argmax(bad))
        raise InputError(f"{who}: diagonal entry of row {row} is {d[row]}; it must be > 0 "
                         f"(A is not positive definite)")
    return np.ascontiguousarray(d, dtype=np.float64)
