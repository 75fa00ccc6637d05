"""The preconditioner registry, the common base class, the context and shared checks.

A preconditioner is built once from a matrix or operator (setup) and applied
many times (a scipy ``LinearOperator`` approximating ``A^{-1}``, symmetric
positive definite so that conjugate gradients can use it).  Factories are
registered by name and called as ``factory(A, context, **options)``:
:class:`PreconditionerContext` carries what the system came from (the mesh
with its refinement history, the coefficient, the held points), so that a
preconditioner that needs more than the matrix takes it from there and no
other layer has to know it by name.  :func:`make_preconditioner` looks the
name up, checks the options against the factory's keyword parameters, times
the setup and returns the operator.

What a factory can work with and what it builds is said by attributes on the
class or function, each defaulting to the common case: ``needs_matrix``
(True: ``A`` must be an assembled sparse matrix; False: any operator will
do), ``prefers_matrix_free`` (a driver that can choose should hand it a
matrix-free operator), ``needs_mesh`` (it needs the context's mesh, so it
cannot act on a bare block of rows), ``is_identity`` and ``is_diagonal``
(what it builds is the identity, or a diagonal that CG can fuse into its
vector update); ``solve_bytes_per_point`` is the measured peak of a whole
solve with it, per point beyond the mesh (:mod:`hatkernels.memory`), and
``solve_bytes_per_point_3d`` the same on tetrahedra where it does not follow
the 2-D figure (0: it does).  :func:`capabilities` reads them, so that callers decide by
what a preconditioner is, never by its name.
"""

import dataclasses
import inspect
import time
from collections.abc import Sequence

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import LinearOperator

from hatkernels._text import format_seconds
from hatkernels.checks import into_vectors
from hatkernels.errors import InputError
from hatkernels.sparse import as_csr

__all__ = [
    "PRECONDITIONERS",
    "Capabilities",
    "Preconditioner",
    "PreconditionerContext",
    "capabilities",
    "make_preconditioner",
    "register_preconditioner",
    "require_csr",
    "checked_diagonal",
]


@dataclasses.dataclass(frozen=True)
class PreconditionerContext:
    """Where a system came from, for preconditioners that use more than its matrix.

    Attributes
    ----------
    mesh : Mesh or None
        The mesh of the system (its refinement history is ``mesh.levels()``).
    coefficient : Coefficient or None
        The parsed diffusion coefficient of the stiffness term.
    fixed : ndarray or None
        The held (Dirichlet) points, sorted, in the mesh's numbering.  When
        the system has fewer rows than the mesh has points, these are the
        points it was reduced by.
    variant : str or None
        The matrix-free variant for operators built on the mesh.
    quadrature : int
        Degree of the rule for callable coefficients.
    mass : ndarray or None
        A lumped mass term of the system, one value per point of the mesh
        (reaction, Robin sides, a time step's capacity over its length), for
        preconditioners that build their own operators (``gmg``).
    """

    mesh: object = None
    coefficient: object = None
    fixed: object = None
    variant: object = None
    quadrature: int = 2
    mass: object = None


@dataclasses.dataclass(frozen=True)
class Capabilities:
    """What a registered preconditioner works with and builds (see the module notes)."""

    needs_matrix: bool = True
    prefers_matrix_free: bool = False
    needs_mesh: bool = False
    is_identity: bool = False
    is_diagonal: bool = False
    solve_bytes_per_point: int = 0
    solve_bytes_per_point_3d: int = 0


class Preconditioner(LinearOperator):
    """Base of the built-in preconditioners: a float64 symmetric LinearOperator that
    follows the preconditioner protocol of :mod:`hatkernels.krylov` (``apply_into``,
    ``description``/``describe()``, ``nbytes``).

    Subclasses set ``name`` and ``kind`` (what it is, in words), implement
    ``_apply(r)`` on a contiguous float64 vector (and ``apply_into`` when they
    can write into a given vector), and may override ``memory_bytes`` and
    ``_details()`` (what it costs, in words).
    """

    name = "?"
    kind = "?"
    needs_matrix = True
    prefers_matrix_free = False
    needs_mesh = False
    is_diagonal = False

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

    def apply_into(self, r, z):
        """``z = M r`` (the protocol of :mod:`hatkernels.krylov`); returns ``z``.

        ``r`` is read only: any real vector of length n (copied unless it is a
        writable C-contiguous float64 one).  ``z`` must be a writable C-contiguous
        float64 ndarray of shape (n,) sharing no memory with ``r``; else an InputError
        names the argument (``hatkernels.checks.into_vectors``, which every
        overriding subclass calls too).  Subclasses that can write into ``z`` directly
        override it to allocate nothing.
        """
        r, = into_vectors(f"{type(self).__name__}.apply_into", self.shape[0], {"r": r},
                          {"z": z})
        z[:] = self._apply(r)
        return z

    def describe(self):
        """One line: what it is and what it costs (:attr:`description`)."""
        return self.description

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
            parts.append(f"setup {format_seconds(self.setup_seconds)}")
        return ", ".join(parts)

    def __repr__(self):
        return f"<Preconditioner {self.description}>"

    @property
    def nbytes(self):
        """Bytes held by the preconditioner's arrays (as :attr:`memory_bytes`)."""
        return self.memory_bytes

    @classmethod
    def from_context(cls, A, context, **options):
        """Build from ``A`` and a :class:`PreconditionerContext`; most ignore the context."""
        return cls(A, **options)


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


def _is_class(factory):
    return isinstance(factory, type) and issubclass(factory, Preconditioner)


def _option_names(factory):
    """Keyword options a factory accepts, or None when it takes ``**options``."""
    if _is_class(factory):  # options of the constructor, after A
        params = list(inspect.signature(factory.__init__).parameters.values())[2:]
    else:  # options after (A, context)
        params = list(inspect.signature(factory).parameters.values())[2:]
    if any(p.kind is p.VAR_KEYWORD for p in params):
        return None
    return tuple(p.name for p in params
                 if p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD))


def register_preconditioner(name, factory, *, overwrite=False):
    """Register ``factory(A, context, **options) -> LinearOperator`` under ``name``.

    ``A`` reaches the factory as a checked float64 CSR matrix (or as the
    LinearOperator the caller passed); ``context`` is a
    :class:`PreconditionerContext` (empty when the caller gave none).  A
    :class:`Preconditioner` subclass may be registered as it is: it is built
    by its :meth:`~Preconditioner.from_context`.  The operator must
    approximate ``A^{-1}`` and be symmetric positive definite for CG.  Set
    ``needs_matrix = False`` on the factory when it works on any operator.
    Returns ``factory``.

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
        if not _is_class(factory):
            inspect.signature(factory).bind(None, None)
    except (TypeError, ValueError) as exc:
        raise InputError(f"factory for {name!r} must take (A, context, **options): "
                         f"{exc}") from None
    PRECONDITIONERS._factories[name] = factory
    return factory


def _factory(name):
    if not isinstance(name, str) or name not in PRECONDITIONERS:
        valid = ", ".join(repr(n) for n in PRECONDITIONERS)
        raise InputError(f"unknown preconditioner {name!r}; valid names: {valid}")
    return PRECONDITIONERS._factories[name]


def capabilities(name):
    """The :class:`Capabilities` of the registered preconditioner ``name``.

    >>> capabilities("jacobi")
    Capabilities(needs_matrix=True, prefers_matrix_free=False, needs_mesh=False, \
is_identity=False, is_diagonal=True, solve_bytes_per_point=400, solve_bytes_per_point_3d=0)
    """
    factory = _factory(name)
    flags = [getattr(factory, f.name, f.default) is True
             for f in dataclasses.fields(Capabilities) if f.type in (bool, "bool")]
    return Capabilities(*flags, int(getattr(factory, "solve_bytes_per_point", 0) or 0),
                        int(getattr(factory, "solve_bytes_per_point_3d", 0) or 0))


def make_preconditioner(A, name, *, context=None, **options):
    """Build the preconditioner ``name`` for ``A``; return an SPD LinearOperator.

    Parameters
    ----------
    A : sparse matrix or LinearOperator, shape (n, n)
        Symmetric positive definite.  Any scipy sparse format; it is checked
        and converted to float64 CSR once, never modified.  Preconditioners
        whose ``needs_matrix`` is False also accept a LinearOperator.
    name : str
        One of :data:`PRECONDITIONERS`.
    context : PreconditionerContext, optional
        What the system came from; preconditioners that need it (``gmg``:
        the refined mesh) say so in their error when it is missing.
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
    factory = _factory(name)
    if context is None:
        context = PreconditionerContext()
    elif not isinstance(context, PreconditionerContext):
        raise InputError(f"context must be a PreconditionerContext, got {type(context).__name__}")
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
    elif capabilities(name).needs_matrix:
        takes = [n for n in PRECONDITIONERS if not capabilities(n).needs_matrix]
        raise InputError(f"preconditioner {name!r} needs an assembled sparse matrix, got "
                         f"{type(A).__name__}; on an operator use one of {takes}")
    n = A.shape[0]
    start = time.perf_counter()
    op = factory.from_context(A, context, **options) if _is_class(factory) else \
        factory(A, context, **options)
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
