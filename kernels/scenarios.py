"""The built-in plate scenario of ``hatkernels solve``, problems read from a mesh file, and
what every scenario shares (``Problem``, ``Cooling``, ``solve_problem``,
``power_balance``); the 3-D block is in :mod:`hatkernels.block`.

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
:func:`heat_spreader`, :func:`hatkernels.block.heat_spreader_block` or
:func:`mesh_problem` and knows how to state itself.

>>> p = heat_spreader(rectangle_cells=48)
>>> p.mesh.n_triangles, round(p.total_power(), 12)
(3072, 20.0)
"""

from __future__ import annotations

import dataclasses

import numpy as np

from hatkernels.assembly import assemble_load, assemble_stiffness
from hatkernels.coefficients import per_cell
from hatkernels.errors import InputError
from hatkernels.mesh.generators import rectangle
from hatkernels.poisson import solve_poisson

__all__ = [
    "CAUTION",
    "COARSE_CELLS",
    "DEFAULT_CELLS",
    "Component",
    "Cooling",
    "HeatSpreader",
    "PLATE",
    "Problem",
    "heat_spreader",
    "mesh_problem",
    "power_balance",
    "solve_problem",
    "source_per_cell",
]

CAUTION = (
    "CAUTION: these results are engineering estimates from a simplified model (steady "
    "conduction, constant properties, idealised boundary conditions). They must be checked by a "
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

    def inside(self, centroids):
        """Which of ``centroids`` (n, 2) lie strictly inside the footprint."""
        return _inside(centroids, self.bounds)


@dataclasses.dataclass(frozen=True)
class HeatSpreader:
    """The invented plate: size, thickness, conductivity, coolant, components."""

    length: float = 0.120
    width: float = 0.080
    thickness: float = 0.002
    conductivity: float = 237.0
    #: pure aluminium at 300 K, kg/m^3 and J/(kg K) (Incropera and DeWitt, Fundamentals of
    #: Heat and Mass Transfer, table A.1; values from memory)
    density: float = 2702.0
    specific_heat: float = 903.0
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


@dataclasses.dataclass(frozen=True)
class Cooling:
    """Convection on some boundary sides: ``k dT/dn + film (T - coolant) = 0`` (Robin).

    ``sides``: (E, 2) edges or (E, 3) faces; ``film``: the film coefficient
    h in W/(m^2 K); ``coolant``: its temperature (degC); ``where``: the sides
    in words, for the report.
    """

    sides: np.ndarray
    film: float
    coolant: float
    where: str

    def heat_out(self, mesh, u):
        """``integral of film (u - coolant)`` over the sides (W, or W/m in 2-D).

        Newton's law of cooling integrated exactly for the P1 field: each side
        contributes its measure times the mean of ``u - coolant`` at its points.
        """
        x = mesh.points[self.sides]
        if self.sides.shape[1] == 3:
            size = 0.5 * np.linalg.norm(np.cross(x[:, 1] - x[:, 0], x[:, 2] - x[:, 0]), axis=1)
        else:
            size = np.linalg.norm(x[:, 1] - x[:, 0], axis=1)
        return self.film * float(size @ (u[self.sides].mean(axis=1) - self.coolant))


@dataclasses.dataclass
class Problem:
    """A steady conduction (or generic Poisson) problem on a mesh, ready to solve.

    ``source`` and ``conductivity`` are numbers or per-cell arrays;
    ``dirichlet`` is the value on the whole boundary, or None when
    ``cooling`` (a :class:`Cooling`) is the only condition and the rest of the
    boundary is insulated; ``thickness`` (metres) turns the per-volume
    quantities of a plate into watts (None for a solid or a generic problem).
    ``capacity`` is the volumetric heat capacity ``rho c`` in J/(m^3 K) (None:
    a generic problem, capacity 1).  ``length_scale`` and ``length_unit`` say how to show coordinates
    (1e3 and "mm" for the plate), ``quantity`` and ``unit`` name the solution.
    """

    name: str
    mesh: object
    source: object
    conductivity: object
    dirichlet: float | None
    statement: list
    thickness: float | None = None
    cooling: Cooling | None = None
    components: tuple = ()
    length_scale: float = 1.0
    length_unit: str = ""
    quantity: str = "u"
    unit: str = ""
    power_unit: str = ""
    mesh_description: str = ""
    #: volumetric heat capacity rho c (J/(m^3 K)) for transient and modal runs; None for a
    #: generic problem (capacity 1 in the mesh file's units)
    capacity: float | None = None

    def source_array(self):
        """The source per cell, shape (n_cells,)."""
        s = self.source
        return np.full(self.mesh.n_cells, float(s)) if np.ndim(s) == 0 else np.asarray(s)

    def total_power(self):
        """``integral of q`` (times the thickness of a plate) in W, or the plain integral for a
        generic problem."""
        total = float(self.source_array() @ self.mesh.measures())
        return total * (self.thickness or 1.0)

    def component_powers(self):
        """Power put in inside each component (or heat source), from the per-cell source (W)."""
        q = self.source_array()
        c = self.mesh.points[self.mesh.cells].mean(axis=1)
        size = self.mesh.measures()
        out = {}
        for comp in self.components:
            inside = comp.inside(c)
            out[comp.name] = float(q[inside] @ size[inside]) * (self.thickness or 1.0)
        return out


def _inside(centroids, bounds):
    inside = np.ones(len(centroids), dtype=bool)
    for axis in range(len(bounds) // 2):  # (x0, x1, y0, y1) or (x0, x1, y0, y1, z0, z1)
        x = centroids[:, axis]
        inside &= (x > bounds[2 * axis]) & (x < bounds[2 * axis + 1])
    return inside


def source_per_cell(mesh, components, depth=1.0, hint=""):
    """Per-cell source (W/m^3) that puts exactly each component's power into its region.

    A cell belongs to a region when its centroid lies strictly inside
    (``component.inside``).  Each region's value is ``P / (depth * measure it
    covers)`` (``depth``: a plate's thickness; 1 for a solid), so the integral
    is exactly ``P`` whether or not the mesh lines up with the region.

    Raises
    ------
    InputError
        A region contains no cell centroid (the mesh is too coarse); ``hint``
        says how to ask for a finer one.
    """
    c = mesh.points[mesh.cells].mean(axis=1)
    size = mesh.measures()
    q = np.zeros(mesh.n_cells)
    word = "triangle" if mesh.dim == 2 else "tetrahedron"
    for comp in components:
        inside = comp.inside(c)
        covered = float(size[inside].sum())
        if covered == 0.0:
            raise InputError(
                f"the mesh is too coarse for the scenario: no {word} centre lies inside the "
                f"{comp.describe()}; {hint}"
            )
        q[inside] += comp.power / (depth * covered)
    return q


def component_source(mesh, plate=PLATE):
    """Per-triangle source (W/m^3) of the plate's components, exact total power per component
    (:func:`source_per_cell`; on the default mesh the footprints line up with the cells and
    the value is the nominal ``P / (footprint area * thickness)``).

    Raises
    ------
    InputError
        A footprint contains no triangle centroid (the mesh is too coarse).
    """
    return source_per_cell(mesh, plate.components, plate.thickness,
                           "use a finer mesh (--cells 24 or more)")


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
        capacity=plate.density * plate.specific_heat,
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
    return value if np.ndim(value) == 0 else per_cell(value)


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
    if problem.cooling is None:
        conditions = {"dirichlet": problem.dirichlet, "dirichlet_on": "boundary"}
    else:  # convection on its sides, the rest insulated (no Dirichlet point)
        c = problem.cooling
        conditions = {"robin": (c.sides, c.film, c.film * c.coolant)}
    return solver(
        problem.mesh,
        _coefficient(problem.source),
        coefficient=_coefficient(problem.conductivity),
        preconditioner=preconditioner,
        rtol=rtol,
        maxiter=maxiter,
        check=True,
        progress=progress,
        monitor=monitor,
        **conditions,
        **options,
    )


def power_balance(problem, u):
    """Heat put in against heat leaving through the held or the cooled boundary.

    Held boundary (Dirichlet): the reaction ``A u - b`` on the boundary rows
    is the discrete flux ``integral k dT/dn phi_i`` over the boundary; its sum
    with the sign reversed is the heat leaving (per unit thickness of a
    plate).  Cooled sides (:class:`Cooling`): the heat leaving is Newton's
    law of cooling, ``integral h (T - coolant)`` over those sides, computed
    from the solution alone.  Conservation says either equals the integral
    of the source, to the solver's tolerance.  Returns a dict with
    ``power_in``, ``heat_out`` (W for the scenarios), their ``imbalance`` and
    the ``relative_imbalance``.
    """
    mesh = problem.mesh
    t = problem.thickness or 1.0
    if problem.cooling is not None:
        power_in = problem.total_power()
        heat_out = problem.cooling.heat_out(mesh, u) * t
    else:
        A = assemble_stiffness(mesh, _coefficient(problem.conductivity))
        b = assemble_load(mesh, _coefficient(problem.source))
        reaction = A @ u - b
        heat_out = -float(reaction[mesh.boundary_points()].sum()) * t
        power_in = float(b.sum()) * t
    imbalance = power_in - heat_out
    return {
        "power_in": power_in,
        "heat_out": heat_out,
        "imbalance": imbalance,
        "relative_imbalance": abs(imbalance) / abs(power_in) if power_in else abs(imbalance),
    }
