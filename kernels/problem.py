"""The steady problem ``-div(kappa grad u) + c u = f`` with its boundary conditions, checked once.

:class:`PoissonProblem` parses every datum (coefficients, source, held
points and values, flux and Robin sides) into typed values when it is made;
:func:`hatkernels.discretise.discretise`, the preconditioners and the
distributed solve take those values as they are and never parse again.
"""

from __future__ import annotations

from hatkernels.checks import integer_option
from hatkernels.coefficients import parse_coefficient
from hatkernels.conditions import parse_conditions
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh

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
    dirichlet_on : "boundary", point indices or (k, 2) sides, optional
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

    Attributes
    ----------
    mesh, quadrature
    coefficient, source : Coefficient
    reaction : Coefficient or None
    dirichlet : hatkernels.conditions.Dirichlet
    flux : hatkernels.conditions.Flux or None
    robin : hatkernels.conditions.Robin or None

    Raises
    ------
    InputError
        Bad data, naming the point, cell, side or value; or a problem with no
        held point, reaction or Robin term (its solution would not be unique).

    Examples
    --------
    >>> import hatkernels
    >>> from hatkernels.problem import PoissonProblem
    >>> PoissonProblem(hatkernels.mesh.rectangle(4, 4), 1.0)
    PoissonProblem(25 points, 16 held, source constant, coefficient constant)
    """

    def __init__(self, mesh, f=1.0, *, dirichlet=0.0, dirichlet_on=None, coefficient=None,
                 reaction=None, neumann=None, robin=None, quadrature=2):
        if not isinstance(mesh, Mesh):
            raise InputError(f"expected a hatkernels.Mesh, got {type(mesh).__name__}")
        self.mesh = mesh
        self.quadrature = integer_option(quadrature, "quadrature", minimum=1)
        self.coefficient = parse_coefficient(coefficient, mesh, name="coefficient", tensor=True)
        self.source = parse_coefficient(f, mesh, name="load", sign="any")
        self.reaction = None if reaction is None else parse_coefficient(
            reaction, mesh, name="reaction", sign="nonnegative")
        self.dirichlet, self.flux, self.robin = parse_conditions(
            mesh, dirichlet=dirichlet, dirichlet_on=dirichlet_on, neumann=neumann, robin=robin)
        if (self.dirichlet.points.size == 0 and self.reaction is None
                and not (self.robin is not None and self.robin.active)):
            raise InputError(
                "no Dirichlet points, reaction or Robin term: the solution is defined only up "
                "to a constant; fix u somewhere with dirichlet_on=..."
            )

    @property
    def lower_order(self):
        """True when the problem has a reaction or a Robin term (terms beyond the stiffness)."""
        return self.reaction is not None or self.robin is not None

    def __repr__(self):
        return (f"PoissonProblem({self.mesh.n_points} points, {self.dirichlet.points.size} held, "
                f"source {self.source.kind}, coefficient {self.coefficient.kind})")
