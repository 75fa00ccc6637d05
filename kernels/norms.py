"""Error norms against exact solutions, and convergence studies over refinements.

On triangles and on tetrahedra alike.  All integrals use a rule of the
cell's kind (degree 5 by default: seven points on a triangle, fifteen on a
tetrahedron, see :mod:`hatkernels.quadrature`), evaluated in chunks of cells
so that memory stays bounded on large meshes.

Exact solutions and gradients are callables taking the coordinates of the
quadrature points as separate arrays, as coefficients and loads are called
elsewhere in the library: ``exact(x, y)`` in 2-D and ``exact(x, y, z)`` in
3-D, each argument of shape ``(cells in the chunk, points per cell)``.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from hatkernels.checks import integer_option
from hatkernels.coefficients import parse_coefficient
from hatkernels.errors import InputError
from hatkernels.geometry import element_gradients
from hatkernels.mesh.core import Mesh
from hatkernels.quadrature import tetrahedron_rule, triangle_rule

__all__ = [
    "ConvergenceStudy",
    "convergence_study",
    "energy_error",
    "h1_seminorm_error",
    "l2_error",
    "observed_rates",
]

#: Cells per chunk: triangles in 2-D; tetrahedra take half as many (a degree-5 rule
#: has 15 points on a tetrahedron against 7 on a triangle), so that the temporaries
#: hold about the same number of values (a few million) in both.
_CHUNK = 1 << 17

_CELL = {2: "triangle", 3: "tetrahedron"}
_ARGS = {2: "x, y", 3: "x, y, z"}
_GRADIENT = {2: "(ux, uy)", 3: "(ux, uy, uz)"}


def _nodal(mesh, u):
    if not isinstance(mesh, Mesh):
        raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
    u = np.asarray(u)
    if u.shape != (mesh.n_points,) or u.dtype.kind not in "fiu":
        raise InputError(
            f"u must be real nodal values of shape ({mesh.n_points},), got {u.dtype} {u.shape}"
        )
    u = u.astype(np.float64, copy=False)
    bad = ~np.isfinite(u)
    if bad.any():
        bad[mesh.unused_points()] = False  # values at points in no cell are never read
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise InputError(f"u[{k}] = {float(u[k])!r} is not finite")
    return u


def _call(fn, coords, name, first, cell, components=1):
    """``fn(*coords)`` at the quadrature points, each coordinate (m, Q), of cells
    ``first .. first + m - 1`` (``cell`` names their kind), checked: real, the right
    shape, finite (else the point and the cell are named)."""
    call = f"{name}({_ARGS[len(coords)]})"
    try:
        v = fn(*coords)
    except Exception as exc:
        raise InputError(f"{call} raised {type(exc).__name__}: {exc}") from exc
    if isinstance(v, tuple | list):
        v = [np.asarray(c) for c in v]
        kinds = {c.dtype.kind for c in v}
    else:
        v = np.asarray(v)
        kinds = {v.dtype.kind}
    if not kinds <= set("fiu"):
        raise InputError(f"{call} must return real numbers, got dtype(s) {sorted(kinds)}")
    try:
        v = np.asarray(v, dtype=np.float64)
    except ValueError:  # components of different shapes
        raise InputError(
            f"{call} returned {len(v)} components of different shapes: "
            f"{[np.shape(c) for c in v]}"
        ) from None
    shape = coords[0].shape
    want = shape if components == 1 else (components,) + shape
    if v.shape != want:
        v = np.broadcast_to(v, want) if v.ndim == 0 else v
    if v.shape != want:
        what = (f"one value per point, {want}" if components == 1
                else f"{components} components {_GRADIENT[components]} of shape {shape}, {want}")
        raise InputError(f"{call} returned shape {v.shape}, expected {what}")
    if not np.isfinite(v).all():
        c, t, q = np.unravel_index(int(np.flatnonzero(~np.isfinite(v))[0]), (components,) + shape)
        what = call if components == 1 else f"component {c} of {call}"
        at = ", ".join(repr(float(x[t, q])) for x in coords)
        raise InputError(
            f"{what} is {float(v.reshape(components, *shape)[c, t, q])!r} at ({at}), a "
            f"quadrature point of {cell} {first + t}; it must be finite"
        )
    return v


def _chunks(mesh, degree):
    """Yield (cell slice, measures, quadrature point coordinates (dim arrays (m, Q)),
    weights, barycentric points)."""
    lam, w = (triangle_rule if mesh.dim == 2 else tetrahedron_rule)(degree)
    p = mesh.points
    measure = mesh.measures()
    step = _CHUNK if mesh.dim == 2 else max(1, _CHUNK // 2)
    for start in range(0, mesh.n_cells, step):
        sl = slice(start, min(mesh.n_cells, start + step))
        cells = mesh.cells[sl]
        coords = tuple(p[cells, i] @ lam.T for i in range(mesh.dim))
        yield sl, measure[sl], coords, w, lam


class _RootSumOfSquares:
    """``sqrt(sum of terms)``, each term given as ``scale**2 * ssq`` with ``ssq`` of order
    one, accumulated without overflow or underflow (the scaled sum of LAPACK's ``dlassq``:
    C. L. Lawson et al., Basic Linear Algebra Subprograms for Fortran Usage, 1979)."""

    def __init__(self):
        self.scale, self.ssq = 0.0, 1.0

    def add(self, scale, ssq):
        if scale == 0.0 or ssq == 0.0:
            return
        if scale > self.scale:
            self.ssq = ssq + self.ssq * (self.scale / scale) ** 2
            self.scale = scale
        else:
            self.ssq += ssq * (scale / self.scale) ** 2

    def add_weighted(self, measure, density_parts, w):
        """Add ``measure @ (sum_k c_k e_k**2) @ w`` given ``[(c_k or None, e_k), ...]``, scaled."""
        big_e = max(float(np.abs(e).max(initial=0.0)) for _, e in density_parts)
        big_a = float(measure.max(initial=0.0))
        if big_e == 0.0 or big_a == 0.0:
            return
        big_c = max((float(np.abs(c).max(initial=0.0)) for c, _ in density_parts
                     if c is not None), default=1.0) or 1.0
        dens = sum((1.0 if c is None else c / big_c) * (e / big_e) ** 2
                   for c, e in density_parts)
        self.add(float(np.sqrt(big_a * big_c)) * big_e, float((measure / big_a) @ (dens @ w)))

    def root(self):
        return self.scale * float(np.sqrt(self.ssq))


def l2_error(mesh, u, exact, *, quadrature=5):
    """``||u_h - u||_L2`` for nodal values ``u`` of the P1 function ``u_h``.

    Parameters
    ----------
    mesh : Mesh
        Triangles or tetrahedra.
    u : array_like, shape (n_points,)
        Nodal values of ``u_h``; not modified.
    exact : callable
        ``exact(x, y)`` on triangles, ``exact(x, y, z)`` on tetrahedra: takes
        arrays of quadrature point coordinates and returns the values there
        (an array of the same shape, or a number).
    quadrature : int
        Degree of the rule (1 to 5).

    Raises
    ------
    InputError
        ``u`` of the wrong shape or not finite (naming the point); ``exact``
        raising, returning the wrong shape, or a non-finite value (naming the
        quadrature point and the cell).

    Examples
    --------
    >>> import numpy as np, hatkernels
    >>> m = hatkernels.mesh.rectangle(4, 4)
    >>> f = lambda x, y: 1 + 2 * x - y
    >>> bool(hatkernels.norms.l2_error(m, f(*m.points.T), f) < 1e-15)     # linear: exact
    True
    >>> c = hatkernels.mesh.cuboid(2, 2, 2)
    >>> g = lambda x, y, z: x * y * z               # int over the unit cube of g^2 = 1/27
    >>> round(hatkernels.norms.l2_error(c, np.zeros(c.n_points), g) ** 2 * 27, 12)
    1.0
    """
    u = _nodal(mesh, u)
    cell = _CELL[mesh.dim]
    total = _RootSumOfSquares()  # values near 1e200 or 1e-200 neither overflow nor vanish
    for sl, measure, coords, w, lam in _chunks(mesh, quadrature):
        uh = u[mesh.cells[sl]] @ lam.T
        e = uh - _call(exact, coords, "exact", sl.start, cell)
        total.add_weighted(measure, [(None, e)], w)
    return total.root()


def _gradient_error(mesh, u, grad_exact, quadrature, coef=None):
    u = _nodal(mesh, u)
    d, cell = mesh.dim, _CELL[mesh.dim]
    total = _RootSumOfSquares()
    for sl, measure, coords, w, lam in _chunks(mesh, quadrature):
        cells = mesh.cells[sl]
        _, G = element_gradients(mesh.points, cells)
        gh = np.einsum("ma,mai->mi", u[cells], G)  # constant gradient per cell
        g = _call(grad_exact, coords, "grad_exact", sl.start, cell, components=d)  # (d, m, Q)
        e = [gh[:, i, None] - g[i] for i in range(d)]
        if coef is None:
            parts = [(None, ei) for ei in e]
        elif coef.kind == "tensor":
            parts = _tensor_parts(coef.value if coef.value.ndim == 2 else coef.value[sl], e)
        else:
            kq = np.broadcast_to(_coefficient_at(coef, mesh, sl, coords, lam), e[0].shape)
            parts = [(kq, ei) for ei in e]
        total.add_weighted(measure, parts, w)
    return total.root()


def _tensor_parts(K, e):
    """``e.K e`` as weighted squares, for ``_RootSumOfSquares.add_weighted``:
    ``sum_i (k_ii - sum_{j != i} k_ij) e_i^2 + sum_{i < j} k_ij (e_i + e_j)^2``
    (expand ``(e_i + e_j)^2``), with ``k_ij`` read above the diagonal."""
    d = len(e)
    K = np.broadcast_to(K, (len(e[0]), d, d))
    pairs = [(i, j) for i in range(d) for j in range(i + 1, d)]
    parts = []
    for i in range(d):
        kii = K[:, i, i, None]
        for j in range(d):
            if j != i:
                kii = kii - K[:, min(i, j), max(i, j), None]
        parts.append((kii, e[i]))
    for i, j in pairs:
        parts.append((np.broadcast_to(K[:, i, j, None], e[i].shape), e[i] + e[j]))
    return parts


def _coefficient_at(coef, mesh, sl, coords, lam):
    if coef.kind == "constant":
        return coef.value
    if coef.kind == "cell":
        return coef.value[sl][:, None]
    if coef.kind == "point":
        return coef.value[mesh.cells[sl]] @ lam.T
    shape = coords[0].shape
    owners = np.repeat(np.arange(sl.start, sl.stop), shape[1])
    flat = tuple(c.ravel() for c in coords)
    return coef.evaluate(flat, owners, owner=_CELL[mesh.dim]).reshape(shape)


def h1_seminorm_error(mesh, u, grad_exact, *, quadrature=5):
    """``|u_h - u|_H1 = ||grad u_h - grad u||_L2``.

    ``grad_exact(x, y) -> (ux, uy)`` on triangles, ``grad_exact(x, y, z) -> (ux, uy, uz)``
    on tetrahedra (a tuple of arrays, or one array of shape ``(dim,) + x.shape``);
    otherwise as :func:`l2_error`.

    >>> import numpy as np, hatkernels
    >>> c = hatkernels.mesh.cuboid(2, 2, 2)
    >>> grad = lambda x, y, z: (0 * x, 0 * x, 0 * x)
    >>> hatkernels.norms.h1_seminorm_error(c, 2 * c.points[:, 2], grad)   # |(0, 0, 2)| on volume 1
    2.0
    """
    return _gradient_error(mesh, u, grad_exact, quadrature)


def energy_error(mesh, u, grad_exact, coefficient=None, *, quadrature=5):
    """``(int kappa |grad(u_h - u)|^2)^(1/2)``, with a coefficient of any kind.

    ``coefficient`` as for :func:`hatkernels.solve_poisson`: a number, one value
    per point or per cell, a symmetric positive definite ``dim x dim`` tensor
    (one, or one per cell; then the integrand is ``e . K e``, ``e`` the gradient
    error), or a callable of the coordinates; ``grad_exact`` as for
    :func:`h1_seminorm_error`.

    >>> import numpy as np, hatkernels
    >>> c = hatkernels.mesh.cuboid(2, 2, 2)
    >>> grad = lambda x, y, z: (0 * x, 0 * x, 0 * x)
    >>> K = np.array([[2.0, 0.0, 1.0], [0.0, 1.0, 0.0], [1.0, 0.0, 3.0]])
    >>> round(hatkernels.norms.energy_error(c, c.points[:, 0] + c.points[:, 2], grad, K), 12)
    2.645751311065
    """
    coef = parse_coefficient(coefficient, mesh, name="coefficient", tensor=True)
    return _gradient_error(mesh, u, grad_exact, quadrature, coef)


def observed_rates(h, errors):
    """``log(e_k-1 / e_k) / log(h_k-1 / h_k)`` between successive levels."""
    h = np.asarray(h, dtype=float)
    e = np.asarray(errors, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.log(e[:-1] / e[1:]) / np.log(h[:-1] / h[1:])


@dataclasses.dataclass
class ConvergenceStudy:
    """Errors over successive uniform refinements and the observed rates."""

    h: np.ndarray
    n_points: np.ndarray
    errors: dict
    rates: dict

    def table(self):
        """A plain-text table: h, unknowns, each error and its rate."""
        names = list(self.errors)
        head = f"{'h':>10} {'points':>9}" + "".join(
            f" {n + ' error':>13} {'rate':>6}" for n in names
        )
        rows = [head]
        for k in range(len(self.h)):
            line = f"{self.h[k]:10.4g} {self.n_points[k]:9d}"
            for n in names:
                r = "" if k == 0 else f"{self.rates[n][k - 1]:6.2f}"
                line += f" {self.errors[n][k]:13.4e} {r:>6}"
            rows.append(line)
        return "\n".join(rows)


def convergence_study(mesh, solver, exact, grad_exact=None, *, levels=4, quadrature=5):
    """Solve on ``mesh`` and ``levels - 1`` uniform refinements of it; measure the errors.

    Parameters
    ----------
    mesh : Mesh
        The coarsest mesh, triangles or tetrahedra; refined by
        :meth:`Mesh.refine` (1 -> 4 triangles, 1 -> 8 tetrahedra).
    solver : callable
        ``solver(mesh) -> nodal values`` (an array, or an object with ``.u``).
    exact, grad_exact : callable
        The exact solution and its gradient, called with the coordinates
        ``(x, y)`` on triangles and ``(x, y, z)`` on tetrahedra, as in
        :func:`l2_error` and :func:`h1_seminorm_error`; without ``grad_exact``
        only the L2 error is measured.
    levels : int
        Number of meshes, at least 2.
    quadrature : int
        Degree of the rule for the errors.

    Returns
    -------
    ConvergenceStudy
        ``h`` (longest edge), ``n_points``, ``errors`` and ``rates`` keyed by
        ``"L2"`` and ``"H1"``.

    Examples
    --------
    ``u = x y z (1 - x)`` on the unit cube, ``-lap u = 2 y z``, ``u`` given on
    the boundary:

    >>> import numpy as np, hatkernels
    >>> u = lambda x, y, z: x * y * z * (1 - x)
    >>> grad = lambda x, y, z: ((1 - 2 * x) * y * z, x * (1 - x) * z, x * (1 - x) * y)
    >>> def solver(m):
    ...     return hatkernels.solve_poisson(m, lambda x, y, z: 2 * y * z, dirichlet=u)
    >>> study = hatkernels.norms.convergence_study(
    ...     hatkernels.mesh.cuboid(2, 2, 2), solver, u, grad, levels=3)
    >>> [int(n) for n in study.n_points]
    [27, 125, 729]
    >>> bool(study.rates["L2"][-1] > 1.5 and study.rates["H1"][-1] > 0.8)
    True
    """
    levels = integer_option(levels, "levels", minimum=2)
    h, n, e2, e1 = [], [], [], []
    m = mesh
    for k in range(levels):
        if k:
            m = m.refine()
        u = solver(m)
        u = getattr(u, "u", u)
        h.append(m.h())
        n.append(m.n_points)
        e2.append(l2_error(m, u, exact, quadrature=quadrature))
        if grad_exact is not None:
            e1.append(h1_seminorm_error(m, u, grad_exact, quadrature=quadrature))
    errors = {"L2": np.array(e2)}
    if grad_exact is not None:
        errors["H1"] = np.array(e1)
    return ConvergenceStudy(
        h=np.array(h),
        n_points=np.array(n),
        errors=errors,
        rates={k: observed_rates(h, v) for k, v in errors.items()},
    )
