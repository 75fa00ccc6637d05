"""The built-in scenario of ``hatkernels solve``, and problems read from a mesh file.

The heat-spreader plate is an invented demonstration, not a product: a thin
aluminium plate 120 mm x 80 mm, 2 mm thick, under two heat-producing
components, with all four edges held at the coolant temperature.  Steady
in-plane conduction, in SI units (metres, W, degC)::

    -div(k grad T) = q     on the plate
                 T = 25    on its four edges (Dirichlet)

with ``q = P / (footprint area * thickness)`` (W/m^3) under each component
and 0 elsewhere.  ``q`` is given per triangle (a triangle belongs to a
footprint when its centroid does), and the value of each component is
rescaled so that ``sum(q * area) * thickness`` is exactly its power ``P``
on any mesh, aligned with the footprints or not.

Conductivity: 237 W/(m K), pure aluminium at 300 K (F. P. Incropera and
D. P. DeWitt, Fundamentals of Heat and Mass Transfer, table A.1; value from
memory).

A :class:`Problem` is everything :func:`solve_problem` needs; it is built by
:func:`heat_spreader` or :func:`mesh_problem` and knows how to state itself.

>>> p = heat_spreader(rectangle_cells=48)
>>> p.mesh.n_triangles, round(p.total_power(), 12)
(3072, 20.0)
"""

from __future__ import annotations

import dataclasses

import numpy as np

from hatkernels.assembly import assemble_load, assemble_stiffness
from hatkernels.coefficients import per_triangle
from hatkernels.errors import InputError
from hatkernels.mesh.generators import rectangle
from hatkernels.poisson import solve_poisson

__all__ = [
    "CAUTION",
    "COARSE_CELLS",
    "DEFAULT_CELLS",
    "Component",
    "HeatSpreader",
    "PLATE",
    "Problem",
    "heat_spreader",
    "mesh_problem",
    "power_balance",
    "solve_problem",
]

CAUTION = (
    "CAUTION: these results are engineering estimates from a simplified model (steady, "
    "in-plane conduction, idealised boundary conditions). They must be checked by a "
    "qualified person against local codes and licensed practice before any design, "
    "safety or purchasing decision."
)


@dataclasses.dataclass(frozen=True)
class Component:
    """A heat-producing component: footprint (metres), centre (metres), power (W)."""

    name: str
    width: float
    height: float
    center: tuple
    power: float

    @property
    def bounds(self):
        """(x0, x1, y0, y1) of the footprint, metres."""
        cx, cy = self.center
        return (cx - self.width / 2, cx + self.width / 2,
                cy - self.height / 2, cy + self.height / 2)

    def describe(self):
        cx, cy = self.center
        return (f"{self.name}: {self.width * 1e3:g} mm x {self.height * 1e3:g} mm centred at "
                f"({cx * 1e3:g} mm, {cy * 1e3:g} mm), {self.power:g} W")


@dataclasses.dataclass(frozen=True)
class HeatSpreader:
    """The invented plate: size, thickness, conductivity, coolant, components."""

    length: float = 0.120
    width: float = 0.080
    thickness: float = 0.002
    conductivity: float = 237.0
    coolant: float = 25.0
    components: tuple = (
        Component("processor", 0.020, 0.020, (0.040, 0.045), 15.0),
        Component("voltage regulator", 0.015, 0.010, (0.090, 0.025), 5.0),
    )

    @property
    def bounds(self):
        return (0.0, self.length, 0.0, self.width)

    def cells(self, nx):
        """Cells (nx, ny) for ``nx`` along the long side, ny scaled to keep cells square."""
        if isinstance(nx, bool) or not isinstance(nx, (int, np.integer)) or nx < 1:
            raise InputError(f"cells must be a positive integer, got {nx!r}")
        return int(nx), max(1, round(int(nx) * self.width / self.length))


PLATE = HeatSpreader()
#: Cells along the 120 mm side by default: 0.125 mm cells, 1,228,800 triangles.
DEFAULT_CELLS = 960
#: The coarse mesh that ``--refine K`` refines: 8 mm cells.
COARSE_CELLS = 15


@dataclasses.dataclass
class Problem:
    """A steady conduction (or generic Poisson) problem on a mesh, ready to solve.

    ``source`` and ``conductivity`` are numbers or per-triangle arrays;
    ``dirichlet`` is the value on the whole boundary; ``thickness`` (metres)
    turns per-volume quantities into watts (None for a generic problem).
    ``length_scale`` and ``length_unit`` say how to show coordinates
    (1e3 and "mm" for the plate), ``quantity`` and ``unit`` name the solution.
    """

    name: str
    mesh: object
    source: object
    conductivity: object
    dirichlet: float
    statement: list
    thickness: float | None = None
    components: tuple = ()
    length_scale: float = 1.0
    length_unit: str = ""
    quantity: str = "u"
    unit: str = ""
    power_unit: str = ""
    mesh_description: str = ""

    def source_array(self):
        """The source per triangle, shape (n_triangles,)."""
        s = self.source
        return np.full(self.mesh.n_triangles, float(s)) if np.ndim(s) == 0 else np.asarray(s)

    def total_power(self):
        """``integral of q`` times the thickness (W), or the plain integral for a generic problem."""
        total = float(self.source_array() @ self.mesh.areas())
        return total * (self.thickness or 1.0)

    def component_powers(self):
        """Power put in under each component, computed from the per-triangle source (W)."""
        q = self.source_array()
        c = self.mesh.points[self.mesh.triangles].mean(axis=1)
        out = {}
        for comp in self.components:
            inside = _inside(c, comp.bounds)
            out[comp.name] = float(q[inside] @ self.mesh.areas()[inside]) * self.thickness
        return out


def _inside(centroids, bounds):
    x0, x1, y0, y1 = bounds
    x, y = centroids[:, 0], centroids[:, 1]
    return (x > x0) & (x < x1) & (y > y0) & (y < y1)


def component_source(mesh, plate=PLATE):
    """Per-triangle source (W/m^3) of the plate's components, exact total power per component.

    A triangle belongs to a footprint when its centroid lies strictly
    inside.  Each component's value is ``P / (thickness * area it covers)``,
    so the integral is exactly ``P`` whether or not the mesh lines up with the
    footprint (it does on the default mesh, where the value is the nominal
    ``P / (footprint area * thickness)``).

    Raises
    ------
    InputError
        A footprint contains no triangle centroid (the mesh is too coarse).
    """
    c = mesh.points[mesh.triangles].mean(axis=1)
    area = mesh.areas()
    q = np.zeros(mesh.n_triangles)
    for comp in plate.components:
        inside = _inside(c, comp.bounds)
        covered = float(area[inside].sum())
        if covered == 0.0:
            raise InputError(
                f"the mesh is too coarse for the scenario: no triangle centre lies inside the "
                f"{comp.describe()}; use a finer mesh (--cells 24 or more)"
            )
        q[inside] += comp.power / (plate.thickness * covered)
    return q


def heat_spreader(mesh=None, *, rectangle_cells=None, source=None, conductivity=None,
                  coolant=None, plate=PLATE, mesh_description=None):
    """The built-in plate problem on ``mesh`` (or a ``rectangle_cells`` wide grid, default 960).

    ``source`` (W/m^3) and ``conductivity`` (W/(m K)) replace the scenario's
    values by constants; ``coolant`` (degC) the edge temperature.
    """
    if mesh is None:
        nx, ny = plate.cells(DEFAULT_CELLS if rectangle_cells is None else rectangle_cells)
        mesh = rectangle(nx, ny, bounds=plate.bounds)
        mesh_description = mesh_description or (
            f"rectangle {nx} x {ny} cells of {plate.length / nx * 1e3:.4g} mm x "
            f"{plate.width / ny * 1e3:.4g} mm")
    k = plate.conductivity if conductivity is None else float(conductivity)
    g = plate.coolant if coolant is None else float(coolant)
    statement = [
        "built-in scenario (invented demonstration data): heat-spreader plate",
        f"plate {plate.length * 1e3:g} mm x {plate.width * 1e3:g} mm, "
        f"{plate.thickness * 1e3:g} mm thick, aluminium",
    ]
    if conductivity is None:
        statement.append(f"conductivity k = {k:g} W/(m K) (pure aluminium at 300 K; Incropera "
                         f"and DeWitt, Fundamentals of Heat and Mass Transfer, table A.1; value "
                         f"from memory)")
    else:
        statement.append(f"conductivity k = {k:g} W/(m K) (given by --conductivity)")
    if source is None:
        q = component_source(mesh, plate)
        components = plate.components
        for comp in components:
            nominal = comp.power / (comp.width * comp.height * plate.thickness)
            statement.append(f"{comp.describe()}, q = {nominal:.4g} W/m^3")
        statement.append("q is set per triangle and rescaled per component so that the "
                         "integrated power is exact on any mesh")
    else:
        q = float(source)
        components = ()
        statement.append(f"uniform source q = {q:g} W/m^3 over the whole plate (given by "
                         f"--source, replacing the components)")
    statement.append(f"all four edges held at the coolant temperature {g:g} degC (Dirichlet); "
                     f"steady in-plane conduction -div(k grad T) = q, SI units")
    return Problem(
        name="heat-spreader plate", mesh=mesh, source=q, conductivity=k, dirichlet=g,
        statement=statement, thickness=plate.thickness, components=components,
        length_scale=1e3, length_unit="mm", quantity="temperature", unit="degC",
        power_unit="W", mesh_description=mesh_description or repr(mesh),
    )


def mesh_problem(mesh, *, source=None, conductivity=None, dirichlet=None, name="mesh",
                 mesh_description=None):
    """A generic problem ``-div(k grad u) = Q`` on ``mesh``, ``u = G`` on its whole boundary.

    Constants, defaults ``Q = 1``, ``k = 1``, ``G = 0``; units are those of the
    mesh file.
    """
    Q = 1.0 if source is None else float(source)
    k = 1.0 if conductivity is None else float(conductivity)
    G = 0.0 if dirichlet is None else float(dirichlet)
    statement = [
        f"problem on the mesh {name}: -div(k grad u) = Q with u = G on the whole boundary",
        f"k = {k:g}, Q = {Q:g}, G = {G:g} (constants; units those of the mesh file)",
    ]
    return Problem(name=name, mesh=mesh, source=Q, conductivity=k, dirichlet=G,
                   statement=statement, mesh_description=mesh_description or repr(mesh))


def _coefficient(value):
    return value if np.ndim(value) == 0 else per_triangle(value)


def solve_problem(problem, *, preconditioner="amg", rtol=1e-10, maxiter=None, progress=None,
                  monitor=None, solver=solve_poisson, **options):
    """Solve ``problem`` with ``solver`` (``check=True``); return what it returns.

    ``solver`` is :func:`hatkernels.poisson.solve_poisson` by default, or a
    function with its signature (such as
    :func:`hatkernels.distributed.solve_poisson`, which takes ``options`` like
    ``comm``): the problem's source, conductivity and boundary values are put
    into its arguments here only.

    Raises :class:`~hatkernels.errors.ConvergenceError` when the solve does not
    reach ``rtol``.
    """
    return solver(
        problem.mesh,
        _coefficient(problem.source),
        dirichlet=problem.dirichlet,
        dirichlet_on="boundary",
        coefficient=_coefficient(problem.conductivity),
        preconditioner=preconditioner,
        rtol=rtol,
        maxiter=maxiter,
        check=True,
        progress=progress,
        monitor=monitor,
        **options,
    )


def power_balance(problem, u):
    """Heat put in against heat leaving through the Dirichlet boundary.

    The reaction ``A u - b`` on the boundary rows is the discrete flux
    ``integral k dT/dn phi_i`` over the boundary; its sum with the sign
    reversed is the heat leaving (per unit thickness), which conservation
    says equals the integral of the source.  Returns a dict with
    ``power_in``, ``heat_out`` (W for the plate), their ``imbalance`` and the
    ``relative_imbalance``.
    """
    mesh = problem.mesh
    A = assemble_stiffness(mesh, _coefficient(problem.conductivity))
    b = assemble_load(mesh, _coefficient(problem.source))
    reaction = A @ u - b
    t = problem.thickness or 1.0
    heat_out = -float(reaction[mesh.boundary_points()].sum()) * t
    power_in = float(b.sum()) * t
    imbalance = power_in - heat_out
    return {
        "power_in": power_in,
        "heat_out": heat_out,
        "imbalance": imbalance,
        "relative_imbalance": abs(imbalance) / abs(power_in) if power_in else abs(imbalance),
    }
