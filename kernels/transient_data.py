"""The data of a transient problem, checked once: time-dependent values, u0, output times.

Data that change in time are marked with :func:`in_time`: ``in_time(g)`` is
called as ``g(x, y, t)`` (``g(x, y, z, t)`` on tetrahedra), the coordinates
arrays and ``t`` a float, the time always the last argument.  Nothing else is
taken as a function of time: a plain callable is a function of position, and
one that needs one argument more than the mesh has coordinates is refused with
a message saying to wrap it (it would fail when called anyway).

Marked data are bound to a :class:`Clock` before the problem is parsed: each
becomes a plain callable of position that reads the clock's time, so the
problem (:class:`TransientProblem`, a :class:`~hatkernels.problem.PoissonProblem`)
is checked once and later evaluations at another time need no parsing; the
drivers set ``clock.t`` and assemble again only what depends on it
(:class:`TimeData`).
"""

from __future__ import annotations

import inspect
import time

import numpy as np

from hatkernels.assembly import assemble_load
from hatkernels.assembly.boundary_terms import side_load
from hatkernels.coefficients import parse_coefficient
from hatkernels.conditions import parse_conditions
from hatkernels.errors import InputError
from hatkernels.problem import PoissonProblem

__all__ = ["Clock", "InTime", "TimeData", "TransientProblem", "bind", "checked_times",
           "in_time", "initial_values"]


class InTime:
    """Data that depend on position and time (made by :func:`in_time`)."""

    def __init__(self, fn):
        if not callable(fn):
            raise InputError(f"in_time needs a callable g(x, y[, z], t), got {type(fn).__name__}")
        self.fn = fn

    def __repr__(self):
        return f"in_time({getattr(self.fn, '__name__', type(self.fn).__name__)})"


def in_time(fn):
    """Mark ``fn`` as data that change in time: called as ``fn(x, y, t)`` (``fn(x, y, z, t)``
    on tetrahedra), ``t`` a float, the coordinates arrays; it returns one value per point
    (or one number for all).

    Accepted for the source ``f``, the held values ``dirichlet``, the flux of ``neumann``
    and the load ``s`` of ``robin`` (alone, with sides, or per tag or region in a dict).
    Coefficients (conductivity, reaction, capacity, the Robin ``r``) stay constant in time:
    the system matrix is assembled once.

    >>> from hatkernels.transient import in_time
    >>> in_time(lambda x, y, t: 20.0 + 5.0 * t)
    in_time(<lambda>)
    """
    return InTime(fn)


class Clock:
    """The time at which bound data are evaluated (set by the driver before each evaluation)."""

    def __init__(self, t=0.0):
        self.t = float(t)


class _Bound:
    """A callable of position that calls ``fn(*coords, clock.t)``; errors name the time."""

    def __init__(self, fn, clock, name):
        self.fn, self.clock, self.name = fn, clock, name

    def __call__(self, *coords):
        t = self.clock.t
        try:
            v = self.fn(*coords, t)
        except InputError:
            raise
        except Exception as exc:
            raise InputError(f"{self.name} at t = {t!r}: {type(exc).__name__}: {exc}") from exc
        a = np.asarray(v)
        if a.dtype.kind in "fiu":
            bad = ~np.isfinite(np.broadcast_to(a, coords[0].shape))
            if bad.any():
                k = int(np.flatnonzero(bad)[0])
                at = ", ".join(repr(float(np.asarray(c).ravel()[k])) for c in coords)
                value = float(np.broadcast_to(a, coords[0].shape).ravel()[k])
                raise InputError(f"{self.name} is {value!r} at ({at}) at t = {t!r}; it must "
                                 f"be finite")
        return v


def _check_plain(value, name, dim):
    """Refuse a plain callable that needs the time: its required positional parameters
    number one more than the mesh's coordinates."""
    if not callable(value) or isinstance(value, InTime):
        return
    try:
        params = inspect.signature(value).parameters.values()
    except (TypeError, ValueError):
        return  # no signature to read (a builtin, a ufunc): it is called as given
    required = [p for p in params if p.default is p.empty
                and p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)]
    if len(required) == dim + 1:
        args = ", ".join("xyz"[:dim])
        raise InputError(f"{name} takes {dim + 1} arguments, but data of position are called "
                         f"as {name}({args}); wrap data that change in time with "
                         f"hatkernels.transient.in_time({name}), called as {name}({args}, t)")


def _walk(value, clock, name, dim, timed):
    """``value`` with every :class:`InTime` inside (dict values, tuple items) bound to
    ``clock``; ``timed`` collects the names bound."""
    if isinstance(value, InTime):
        timed.append(name)
        return _Bound(value.fn, clock, name)
    if isinstance(value, dict):
        return {k: _walk(v, clock, f"{name}[{k!r}]", dim, timed) for k, v in value.items()}
    if isinstance(value, tuple):
        return tuple(_walk(v, clock, name, dim, timed) for v in value)
    _check_plain(value, name, dim)
    return value


def _refuse_timed(value, name):
    if isinstance(value, InTime):
        raise InputError(f"{name} cannot change in time (the system matrix is assembled "
                         f"once); only f, dirichlet, the neumann flux and the robin load s "
                         f"may be given with in_time")
    if isinstance(value, dict):
        for k, v in value.items():
            _refuse_timed(v, f"{name}[{k!r}]")
    if isinstance(value, (tuple, list)):
        for v in value:
            _refuse_timed(v, name)


def _robin_parts(robin):
    """``(r values, s values)`` of a robin argument, whatever its form (for the checks)."""
    if isinstance(robin, dict):
        pairs = [v for v in robin.values() if isinstance(v, tuple) and len(v) == 2]
        return [p[0] for p in pairs], [p[1] for p in pairs]
    if isinstance(robin, tuple) and len(robin) in (2, 3):
        return [robin[-2]], [robin[-1]]
    return [], []


def bind(clock, dim, *, f, dirichlet, neumann, robin, coefficient, reaction, capacity):
    """The arguments with their :func:`in_time` data bound to ``clock``.

    Returns ``(f, dirichlet, neumann, robin, timed)``: ``timed`` is the set of
    what depends on time among "f", "dirichlet", "neumann", "robin".
    """
    for value, name in ((coefficient, "coefficient"), (reaction, "reaction"),
                        (capacity, "capacity")):
        _refuse_timed(value, name)
        _walk(value, clock, name, dim, [])  # plain callables that need t are refused
    r_parts, _ = _robin_parts(robin)
    for r in r_parts:
        _refuse_timed(r, "robin r (the film coefficient)")
    timed = set()
    out = []
    for value, name in ((f, "f"), (dirichlet, "dirichlet"), (neumann, "neumann"),
                        (robin, "robin")):
        found = []
        out.append(_walk(value, clock, name, dim, found))
        if found:
            timed.add(name)
    return (*out, timed)


class TransientProblem(PoissonProblem):
    """``capacity du/dt - div(kappa grad u) + c u = f`` with the boundary conditions of
    :class:`~hatkernels.problem.PoissonProblem`, checked once.

    The capacity term holds every part of the mesh, so a body with no held point,
    reaction or Robin term (insulated, or with imposed fluxes only) is a valid
    problem here, unlike in the steady case.

    Attributes
    ----------
    capacity : Coefficient
        ``rho c_p``, positive: a number, per cell or per point, a callable of
        position, or per region (a dict).
    (and those of :class:`~hatkernels.problem.PoissonProblem`)
    """

    def __init__(self, mesh, f=0.0, *, capacity=1.0, **conditions):
        super().__init__(mesh, f, **conditions)
        self.capacity = parse_coefficient(capacity, mesh, name="capacity", sign="positive")

    def _held_parts(self, count, labels):
        return np.ones(count, dtype=bool)  # the capacity term makes every part definite


def initial_array(u0, n, where):
    """``u0`` given as a number or one value per point (``n`` of them, the points
    ``where``) as an (n,) array; InputError for anything else.  Not checked finite."""
    if isinstance(u0, bool):
        raise InputError(f"u0 must be a number, an array or a callable, got {u0!r}")
    v = np.asarray(u0)
    if v.dtype.kind not in "fiu":
        raise InputError(f"u0 must be real numbers, got dtype {v.dtype}")
    if v.ndim == 0:
        return np.full(n, float(v))
    if v.shape != (n,):
        raise InputError(f"u0 has shape {v.shape}; expected a number, a callable or one value "
                         f"per point ({n},) {where}")
    return v


def initial_values(u0, mesh):
    """``u0`` as a new (n_points,) float64 array: a number, one value per point, or a
    callable of position ``u0(x, y[, z])``; InputError naming the bad point."""
    _refuse_timed(u0, "u0")
    n = mesh.n_points
    if callable(u0):
        _check_plain(u0, "u0", mesh.dim)
        args = ", ".join("xyz"[: mesh.dim])
        try:
            v = np.asarray(u0(*mesh.points.T))
        except Exception as exc:
            raise InputError(f"u0({args}) raised {type(exc).__name__}: {exc}") from exc
        if v.dtype.kind not in "fiu":
            raise InputError(f"u0({args}) must return real numbers, got dtype {v.dtype}")
        if v.ndim == 0:
            v = np.full(n, float(v))
        if v.shape != (n,):
            raise InputError(f"u0({args}) returned shape {v.shape} for {n} points")
        what = f"u0({args})"
    else:
        v = initial_array(u0, n, "of the mesh solved on")
        what = "u0"
    v = np.array(v, dtype=np.float64)  # a copy: the caller's array is never touched
    bad = ~np.isfinite(v)
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        at = ", ".join(f"{c:.6g}" for c in mesh.points[k])
        raise InputError(f"{what} is {float(v[k])!r} at point {k} ({at}); it must be finite")
    return v


def checked_times(times):
    """Output times as a new float64 array: non-empty, finite, >= 0, strictly increasing."""
    if isinstance(times, (str, bytes)) or isinstance(times, bool):
        raise InputError(f"times must be a sequence of numbers, got {times!r}")
    t = np.asarray(times)
    if t.dtype.kind not in "fiu":
        raise InputError(f"times must be real numbers, got dtype {t.dtype}")
    t = np.array(np.atleast_1d(t), dtype=np.float64)
    if t.ndim != 1 or t.size == 0:
        raise InputError(f"times must be a non-empty 1-D sequence, got shape {t.shape}")
    bad = ~np.isfinite(t)
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise InputError(f"times[{k}] is {float(t[k])!r}; times must be finite")
    if t[0] < 0:
        raise InputError(f"times[0] is {float(t[0])!r}; the solve starts at t = 0, so times "
                         f"must be >= 0")
    back = np.flatnonzero(np.diff(t) <= 0)
    if back.size:
        k = int(back[0])
        raise InputError(f"times must increase strictly: times[{k + 1}] = {float(t[k + 1])!r} "
                         f"does not come after times[{k}] = {float(t[k])!r}")
    return t


class TimeData:
    """The loads and held values of a :class:`TransientProblem` at any time.

    ``load(t)`` is the full load vector ``int f phi_i + int h phi_i + int s phi_i``
    (n_points,) with the totals of its three parts; ``held(t)`` the held values.
    What does not depend on time is assembled once; what does is assembled again
    at each call (its cost accumulates in ``seconds``).
    """

    def __init__(self, problem, clock, timed, dirichlet):
        self.problem, self.clock, self.timed = problem, clock, timed
        self._dirichlet = dirichlet
        self.seconds = 0.0
        self._static = np.zeros(problem.mesh.n_points)
        self._totals = {}
        for key in _LOADS:
            if key not in timed:
                part = self._assemble(key)
                self._totals[key] = 0.0 if part is None else float(np.sum(part))
                if part is not None:
                    self._static += part

    @property
    def steady_load(self):
        """True when nothing in the load depends on time."""
        return not (set(_LOADS) & self.timed)

    @property
    def steady_held(self):
        return "dirichlet" not in self.timed

    def _assemble(self, key):
        p = self.problem
        mesh, q = p.mesh, p.quadrature
        if key == "f":
            return assemble_load(mesh, p.source, quadrature=q)
        if key == "neumann":
            return None if p.flux is None else side_load(mesh, p.flux.flux, p.flux.sides, q)
        return None if p.robin is None else side_load(mesh, p.robin.s, p.robin.sides, q)

    def load(self, t):
        """``(b, totals)``: the load vector at ``t`` (not to be modified: without time-dependent
        loads it is the same array at every call) and the sums of its parts by name
        ("f", "neumann", "robin")."""
        if self.steady_load:
            return self._static, dict(self._totals)
        start = time.perf_counter()
        self.clock.t = float(t)
        b = self._static.copy()
        totals = dict(self._totals)
        for key in self.timed & set(_LOADS):
            part = self._assemble(key)
            totals[key] = 0.0 if part is None else float(np.sum(part))
            if part is not None:
                b += part
        self.seconds += time.perf_counter() - start
        return b, totals

    def held(self, t):
        """Held values at ``t`` (in the order of ``problem.dirichlet.points``)."""
        p = self.problem
        if self.steady_held:
            return p.dirichlet.values
        start = time.perf_counter()
        self.clock.t = float(t)
        on = None if isinstance(self._dirichlet, dict) else p.dirichlet.points
        fixed = parse_conditions(p.mesh, dirichlet=self._dirichlet, dirichlet_on=on)[0]
        self.seconds += time.perf_counter() - start
        return fixed.values


#: The parts of the load, by the argument that gives them.
_LOADS = ("f", "neumann", "robin")
