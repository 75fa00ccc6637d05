"""The steady problem ``-div(kappa grad u) + c u = f`` with its boundary conditions, checked once.

:class:`PoissonProblem` parses every datum (coefficients, source, held
points and values, flux and Robin sides) into typed values when it is made;
:func:`hatkernels.discretise.discretise`, the preconditioners and the
distributed solve take those values as they are and never parse again.
"""

from __future__ import annotations

import numpy as np

from hatkernels.assembly import assemble_load
from hatkernels.assembly.boundary_terms import side_load
from hatkernels.checks import integer_option
from hatkernels.coefficients import parse_coefficient
from hatkernels.conditions import Dirichlet, parse_conditions
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh

#: Relative size (against the sum of ``|load|``) below which a floating part's
#: sources and boundary flux count as balanced.  Not round-off alone: callable
#: data are integrated by quadrature, whose error leaves an imbalance of the
#: order of the rule's error even for data that balance exactly; discretise
#: removes what remains by subtracting a constant from that part's source.
BALANCE_TOL = 1e-6

__all__ = ["PoissonProblem"]


class PoissonProblem:
    """``-div(kappa grad u) + c u = f`` on a mesh, with its boundary conditions.

    Parameters
    ----------
    mesh : Mesh
    f : number, array or callable
        The source (any kind of :mod:`hatkernels.coefficients`).
    dirichlet : number, (n_points,) array or callable ``g(x, y)``
        The held value on the Dirichlet points.
    dirichlet_on : "boundary", point indices, or sides ((k, 2) edges or (k, 3) faces), optional
        Where ``u = g``.  By default the whole boundary, unless ``neumann``
        or ``robin`` is given, in which case no point is held unless named.
    coefficient : kappa, any kind (tensors allowed); positive.
    reaction : c, scalar kind, non-negative.
    neumann : h, or ``(sides, h)``
        ``kappa du/dn = h``.  Plain ``h`` applies on every boundary side that
        is not held (a side is held when both its ends are).
    robin : ``(r, s)`` or ``(sides, r, s)``
        ``kappa du/dn + r u = s`` with ``r >= 0``.
    quadrature : int
        Degree of the rule for callable data.
    zero_mean : bool
        What to do with a connected part of the mesh that nothing holds (no
        Dirichlet point, reaction or Robin term in it: a pure Neumann part,
        whose solution is defined up to a constant).  False (default): refuse
        the problem, naming the part.  True: solve for the solution whose mean
        over that part is zero, provided the part's data balance (its sources
        integrate to minus its boundary flux, to :data:`BALANCE_TOL` relative:
        what quadrature leaves is removed by a constant in the source); a part
        whose data do not balance has no solution and is refused with the
        imbalance.

    Attributes
    ----------
    mesh, quadrature
    coefficient, source : Coefficient
    reaction : Coefficient or None
    dirichlet : hatkernels.conditions.Dirichlet
    flux : hatkernels.conditions.Flux or None
    robin : hatkernels.conditions.Robin or None
    floating : ndarray
        The parts (labels of :meth:`Mesh.components`) solved with zero mean;
        empty unless ``zero_mean``.  For each, one point is held at 0 in
        ``dirichlet`` and the solution is shifted afterwards.
    part_labels : ndarray or None
        Each point's connected part (:meth:`Mesh.components`) when there are
        floating parts, else None.

    Raises
    ------
    InputError
        Bad data, naming the point, cell, side or value; a part of the mesh
        with no held point, reaction or Robin term (its solution would not be
        unique), naming the part's size and one point of it; with
        ``zero_mean``, a floating part whose data do not balance.

    Examples
    --------
    >>> import hatkernels
    >>> from hatkernels.problem import PoissonProblem
    >>> PoissonProblem(hatkernels.mesh.rectangle(4, 4), 1.0)
    PoissonProblem(25 points, 16 held, source constant, coefficient constant)
    """

    def __init__(self, mesh, f=1.0, *, dirichlet=0.0, dirichlet_on=None, coefficient=None,
                 reaction=None, neumann=None, robin=None, quadrature=2, zero_mean=False):
        if not isinstance(mesh, Mesh):
            raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
        self.mesh = mesh
        self.quadrature = integer_option(quadrature, "quadrature", minimum=1)
        self.coefficient = parse_coefficient(coefficient, mesh, name="coefficient", tensor=True)
        self.source = parse_coefficient(f, mesh, name="load", sign="any")
        self.reaction = None if reaction is None else parse_coefficient(
            reaction, mesh, name="reaction", sign="nonnegative")
        self.dirichlet, self.flux, self.robin, self.pieces = parse_conditions(
            mesh, dirichlet=dirichlet, dirichlet_on=dirichlet_on, neumann=neumann, robin=robin)
        if not isinstance(zero_mean, bool):
            raise InputError(f"zero_mean must be True or False, got {zero_mean!r}")
        self.floating = np.empty(0, dtype=np.int64)
        self.part_labels = None
        c = self.reaction
        if self.dirichlet.whole_boundary or c is not None and c.kind == "constant" and c.value > 0:
            return  # every part of the mesh is held: no need to find the parts
        count, labels = mesh.components()
        loose = np.flatnonzero(~self._held_parts(count, labels))
        if loose.size and not zero_mean:
            raise InputError(self._loose_message(count, labels, int(loose[0])))
        if loose.size:
            self._balance(labels, loose)
            self.floating = loose
            self.part_labels = labels  # kept: discretise and expand need them again
            pins = _pins(mesh, loose)
            points = np.concatenate([self.dirichlet.points, pins])
            values = np.concatenate([self.dirichlet.values, np.zeros(pins.size)])
            order = np.argsort(points, kind="stable")
            self.dirichlet = Dirichlet(points[order], values[order])

    def _held_parts(self, count, labels):
        """Which parts something holds: a Dirichlet point, a reaction or a Robin term in it."""
        held = np.zeros(count, dtype=bool)
        cells = self.mesh.cells

        def mark(points):
            lab = labels[np.asarray(points, dtype=np.int64)]
            held[lab[lab >= 0]] = True

        mark(self.dirichlet.points)
        c = self.reaction
        if c is not None:
            if c.kind in ("constant",) and c.value > 0 or c.kind in ("callable", "tensor"):
                held[:] = True  # a callable is assumed to act where it is given
            elif c.kind == "cell":
                mark(cells[c.value > 0, 0])
            elif c.kind == "point":
                mark(np.flatnonzero(c.value > 0))
        rb = self.robin
        if rb is not None and len(rb.sides):
            r = rb.r
            if r.kind == "callable" or r.kind == "constant" and r.value > 0:
                mark(rb.sides[:, 0])
            elif r.kind == "edge":
                mark(rb.sides[r.value > 0, 0])
            elif r.kind == "point":
                mark(rb.sides[(r.value[rb.sides] > 0).any(axis=1), 0])
        return held

    def _loose_message(self, count, labels, part):
        members = np.flatnonzero(labels == part)
        first = int(members[0])
        at = ", ".join(f"{v:.6g}" for v in self.mesh.points[first])
        where = "the mesh" if count == 1 else f"part {part} of the mesh ({count} parts)"
        return (f"no Dirichlet points, reaction or Robin term in {where}: {members.size} "
                f"points, the first point {first} at ({at}); the solution is defined only "
                f"up to a constant there. Hold u at a point of it (dirichlet_on=...), add a "
                f"reaction or Robin term, or pass zero_mean=True for the solution with mean 0")

    def _balance(self, labels, loose):
        """Refuse a floating part whose sources do not balance its boundary flux."""
        mesh = self.mesh
        b = assemble_load(mesh, self.source, quadrature=self.quadrature)
        load_abs = np.abs(b)
        if self.flux is not None:
            h = side_load(mesh, self.flux.flux, self.flux.sides, self.quadrature)
            b += h
            load_abs += np.abs(h)
        keep = labels >= 0
        total = np.bincount(labels[keep], weights=b[keep], minlength=labels.max() + 1)
        scale = np.bincount(labels[keep], weights=load_abs[keep], minlength=labels.max() + 1)
        for part in loose:
            if abs(total[part]) > BALANCE_TOL * max(scale[part], np.finfo(float).tiny):
                raise InputError(
                    f"zero_mean: the data of {'the mesh' if labels.max() == 0 else f'part {part}'}"
                    f" do not balance: its sources and boundary flux add up to "
                    f"{total[part]:.6g} (relative {total[part] / scale[part]:.2e}), so "
                    f"no solution exists; make the source integrate to minus the flux")

    @property
    def lower_order(self):
        """True when the problem has a reaction or a Robin term (terms beyond the stiffness)."""
        return self.reaction is not None or self.robin is not None

    def __repr__(self):
        return (f"PoissonProblem({self.mesh.n_points} points, {self.dirichlet.points.size} held, "
                f"source {self.source.kind}, coefficient {self.coefficient.kind})")


def _pins(mesh, parts):
    """One point per part to hold at 0: the part's first point on the coarsest mesh, so that
    every level of a refinement history holds it (multigrid's coarse levels stay definite)."""
    levels = mesh.levels()
    _, coarse_labels = levels[0].components()
    pins = np.array([np.flatnonzero(coarse_labels == p)[0] for p in parts], dtype=np.int64)
    for fine in levels[1:]:
        pins = fine.refinement.coarse_points[pins].astype(np.int64)
    return pins
