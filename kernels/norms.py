"""Error norms against exact solutions, and convergence studies over refinements.

All integrals use a triangle rule (degree 5 by default, see
:mod:`hatkernels.quadrature`), evaluated in chunks of triangles so that memory
stays bounded on large meshes.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from hatkernels.checks import integer_option
from hatkernels.coefficients import parse_coefficient
from hatkernels.errors import InputError
from hatkernels.geometry import element_gradients
from hatkernels.mesh.core import Mesh
from hatkernels.quadrature import triangle_rule

__all__ = [
    "ConvergenceStudy",
    "convergence_study",
    "energy_error",
    "h1_seminorm_error",
    "l2_error",
    "observed_rates",
]

_CHUNK = 1 << 17


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
        bad[mesh.unused_points()] = False  # values at points in no triangle are never read
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise InputError(f"u[{k}] = {float(u[k])!r} is not finite")
    return u


def _call(fn, x, y, name, first, components=1):
    """``fn(x, y)`` at the quadrature points (m, Q) of triangles ``first .. first + m - 1``,
    checked: real, the right shape, finite (else the point and triangle are named)."""
    try:
        v = fn(x, y)
    except Exception as exc:
        raise InputError(f"{name}(x, y) raised {type(exc).__name__}: {exc}") from exc
    if isinstance(v, tuple | list):
        v = [np.asarray(c) for c in v]
        kinds = {c.dtype.kind for c in v}
    else:
        v = np.asarray(v)
        kinds = {v.dtype.kind}
    if not kinds <= set("fiu"):
        raise InputError(f"{name}(x, y) must return real numbers, got dtype(s) {sorted(kinds)}")
    try:
        v = np.asarray(v, dtype=np.float64)
    except ValueError:  # components of different shapes
        raise InputError(
            f"{name}(x, y) returned {components} components of different shapes: "
            f"{[np.shape(c) for c in v]}"
        ) from None
    want = x.shape if components == 1 else (components,) + x.shape
    if v.shape != want:
        v = np.broadcast_to(v, want) if v.ndim == 0 else v
    if v.shape != want:
        raise InputError(f"{name}(x, y) returned shape {v.shape}, expected {want}")
    if not np.isfinite(v).all():
        c, t, q = np.unravel_index(
            int(np.flatnonzero(~np.isfinite(v))[0]), (components,) + x.shape
        )
        what = name if components == 1 else f"component {c} of {name}"
        raise InputError(
            f"{what}(x, y) is {float(v.reshape(components, *x.shape)[c, t, q])!r} at "
            f"({float(x[t, q])!r}, {float(y[t, q])!r}), a quadrature point of triangle "
            f"{first + t}; it must be finite"
        )
    return v


def _chunks(mesh, degree):
    """Yield (triangle slice, area, physical quadrature points x, y, weights, barycentric)."""
    lam, w = triangle_rule(degree)
    p = mesh.points
    area = mesh.areas()
    for start in range(0, mesh.n_triangles, _CHUNK):
        sl = slice(start, min(mesh.n_triangles, start + _CHUNK))
        tri = mesh.triangles[sl]
        x = p[tri, 0] @ lam.T
        y = p[tri, 1] @ lam.T
        yield sl, area[sl], x, y, w, lam


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

    def add_weighted(self, area, density_parts, w):
        """Add ``area @ (sum_k c_k e_k**2) @ w`` given ``[(c_k or None, e_k), ...]``, scaled."""
        big_e = max(float(np.abs(e).max(initial=0.0)) for _, e in density_parts)
        big_a = float(area.max(initial=0.0))
        if big_e == 0.0 or big_a == 0.0:
            return
        big_c = max((float(np.abs(c).max(initial=0.0)) for c, _ in density_parts
                     if c is not None), default=1.0) or 1.0
        dens = sum((1.0 if c is None else c / big_c) * (e / big_e) ** 2
                   for c, e in density_parts)
        self.add(float(np.sqrt(big_a * big_c)) * big_e, float((area / big_a) @ (dens @ w)))

    def root(self):
        return self.scale * float(np.sqrt(self.ssq))


def l2_error(mesh, u, exact, *, quadrature=5):
    """``||u_h - u||_L2`` for nodal values ``u`` of the P1 function ``u_h``.

    ``exact(x, y)`` takes and returns arrays.

    >>> import numpy as np, hatkernels
    >>> m = hatkernels.mesh.rectangle(4, 4)
    >>> f = lambda x, y: 1 + 2 * x - y
    >>> bool(hatkernels.norms.l2_error(m, f(*m.points.T), f) < 1e-15)     # linear: exact
    True
    """
    u = _nodal(mesh, u)
    total = _RootSumOfSquares()  # values near 1e200 or 1e-200 neither overflow nor vanish
    for sl, area, x, y, w, lam in _chunks(mesh, quadrature):
        uh = u[mesh.triangles[sl]] @ lam.T
        e = uh - _call(exact, x, y, "exact", sl.start)
        total.add_weighted(area, [(None, e)], w)
    return total.root()


def _gradient_error(mesh, u, grad_exact, quadrature, coef=None):
    u = _nodal(mesh, u)
    total = _RootSumOfSquares()
    for sl, area, x, y, w, lam in _chunks(mesh, quadrature):
        tri = mesh.triangles[sl]
        _, G = element_gradients(mesh.points, tri)
        gh = np.einsum("ma,mai->mi", u[tri], G)  # constant gradient per triangle
        g = _call(grad_exact, x, y, "grad_exact", sl.start, components=2)  # (2, m, Q)
        ex = gh[:, 0, None] - g[0]
        ey = gh[:, 1, None] - g[1]
        if coef is None:
            parts = [(None, ex), (None, ey)]
        elif coef.kind == "tensor":
            K = coef.value if coef.value.ndim == 2 else coef.value[sl]
            K = np.broadcast_to(K, (len(tri), 2, 2))
            # e.K e = k00 ex^2 + 2 k01 ex ey + k11 ey^2, with ex ey = ((ex + ey)^2 - ex^2 - ey^2) / 2
            k01 = K[:, 0, 1, None]
            parts = [(K[:, 0, 0, None] - k01, ex), (K[:, 1, 1, None] - k01, ey),
                     (np.broadcast_to(k01, ex.shape), ex + ey)]
        else:
            kq = np.broadcast_to(_coefficient_at(coef, mesh, sl, x, y, lam), ex.shape)
            parts = [(kq, ex), (kq, ey)]
        total.add_weighted(area, parts, w)
    return total.root()


def _coefficient_at(coef, mesh, sl, x, y, lam):
    if coef.kind == "constant":
        return coef.value
    if coef.kind == "cell":
        return coef.value[sl][:, None]
    if coef.kind == "point":
        return coef.value[mesh.triangles[sl]] @ lam.T
    owners = np.repeat(np.arange(sl.start, sl.stop), x.shape[1])
    return coef.evaluate((x.ravel(), y.ravel()), owners).reshape(x.shape)


def h1_seminorm_error(mesh, u, grad_exact, *, quadrature=5):
    """``|u_h - u|_H1 = ||grad u_h - grad u||_L2``; ``grad_exact(x, y) -> (ux, uy)``."""
    return _gradient_error(mesh, u, grad_exact, quadrature)


def energy_error(mesh, u, grad_exact, coefficient=None, *, quadrature=5):
    """``(int kappa |grad(u_h - u)|^2)^(1/2)``, with a coefficient of any kind."""
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
        The coarsest mesh.
    solver : callable
        ``solver(mesh) -> nodal values`` (an array, or an object with ``.u``).
    exact, grad_exact : callable
        The exact solution and its gradient ``(ux, uy)``; without
        ``grad_exact`` only the L2 error is measured.

    Returns
    -------
    ConvergenceStudy
        ``h`` (longest edge), ``n_points``, ``errors`` and ``rates`` keyed by
        ``"L2"`` and ``"H1"``.
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
