"""The second built-in scenario of ``hatkernels solve``: a copper heat-spreader block in 3-D.

An invented demonstration, not a product: a copper block 64 mm x 48 mm,
8 mm high, sitting on a liquid-cooled plate, with three heat-producing
regions embedded near its top.  Steady conduction in SI units (metres, W,
degC)::

    -div(k grad T) = q                   in the block
    k dT/dn + h (T - T_c) = 0            on the bottom face z = 0 (convection, Robin)
    k dT/dn = 0                          on the other five faces (insulated)

with ``q = P / (region volume)`` (W/m^3) in each region and 0 elsewhere,
given per tetrahedron (a tetrahedron belongs to a region when its centroid
does) and rescaled per region so that the integrated power is exactly ``P``
on any mesh (:func:`hatkernels.scenarios.source_per_cell`).

Material: pure copper at 300 K, k = 401 W/(m K) (F. P. Incropera and
D. P. DeWitt, Fundamentals of Heat and Mass Transfer, table A.1; value from
memory).  Cooling: a film coefficient h = 5000 W/(m^2 K) to coolant at
25 degC, inside the range that reference gives for forced convection of
liquids, 100 to 20,000 W/(m^2 K) (Incropera and DeWitt, table 1.1; value
from memory).

The mesh is :func:`hatkernels.mesh.cuboid` with 4 mm cubes (16 x 12 x 2,
2,304 tetrahedra) refined ``k`` times (``8^k`` times as many tetrahedra,
nested, as multigrid on refinements needs); ``k = 4`` by default:
9,437,184 tetrahedra of 0.25 mm cubes, 1,636,833 points, on which every
region's faces lie on cell faces.

>>> p = heat_spreader_block(refine=1)
>>> p.mesh.n_cells, round(p.total_power(), 12), p.cooling.sides.shape
(18432, 95.0, (1536, 3))
"""

from __future__ import annotations

import dataclasses

import numpy as np

from hatkernels.checks import integer_option
from hatkernels.mesh.generators3d import cuboid
from hatkernels.scenarios import Cooling, Problem, source_per_cell

__all__ = ["BLOCK", "BLOCK_REFINE", "Block", "HeatSource", "block_mesh", "bottom_faces",
           "coarse_mesh", "heat_spreader_block"]


@dataclasses.dataclass(frozen=True)
class HeatSource:
    """A heat-producing region: a box (metres) ``bounds = (x0, x1, y0, y1, z0, z1)``, power (W)."""

    name: str
    bounds: tuple
    power: float

    def inside(self, centroids):
        """Which of ``centroids`` (n, 3) lie strictly inside the box."""
        x0, x1, y0, y1, z0, z1 = self.bounds
        x, y, z = centroids[:, 0], centroids[:, 1], centroids[:, 2]
        return (x > x0) & (x < x1) & (y > y0) & (y < y1) & (z > z0) & (z < z1)

    @property
    def volume(self):
        x0, x1, y0, y1, z0, z1 = self.bounds
        return (x1 - x0) * (y1 - y0) * (z1 - z0)

    def describe(self):
        x0, x1, y0, y1, z0, z1 = (1e3 * v for v in self.bounds)
        return (f"{self.name}: {x1 - x0:g} mm x {y1 - y0:g} mm x {z1 - z0:g} mm at x {x0:g}..{x1:g}"
                f" mm, y {y0:g}..{y1:g} mm, z {z0:g}..{z1:g} mm, {self.power:g} W")


@dataclasses.dataclass(frozen=True)
class Block:
    """The invented block: size, conductivity, film coefficient, coolant, heat sources."""

    length: float = 0.064
    width: float = 0.048
    height: float = 0.008
    conductivity: float = 401.0
    #: pure copper at 300 K, kg/m^3 and J/(kg K) (Incropera and DeWitt, Fundamentals of Heat
    #: and Mass Transfer, table A.1; values from memory)
    density: float = 8933.0
    specific_heat: float = 385.0
    film: float = 5000.0
    coolant: float = 25.0
    cube: float = 0.004  # edge of the coarse mesh's cubes
    sources: tuple = (
        HeatSource("main die", (0.014, 0.026, 0.022, 0.034, 0.005, 0.007), 60.0),
        HeatSource("second die", (0.042, 0.050, 0.028, 0.036, 0.005, 0.007), 25.0),
        HeatSource("regulator", (0.039, 0.049, 0.010, 0.014, 0.005, 0.007), 10.0),
    )

    @property
    def bounds(self):
        return (0.0, self.length, 0.0, self.width, 0.0, self.height)

    @property
    def coarse_cells(self):
        """Cubes of the coarse mesh along x, y and z."""
        return tuple(round(side / self.cube) for side in (self.length, self.width, self.height))


BLOCK = Block()
#: Refinements of the 4 mm coarse mesh by default: 9,437,184 tetrahedra of 0.25 mm cubes.
BLOCK_REFINE = 4


def bottom_faces(mesh, z=0.0):
    """Boundary faces with all three points at height ``z``, shape (E, 3), int64."""
    faces = mesh.boundary_faces()
    on = (mesh.points[:, 2] == z)[faces].all(axis=1)
    return faces[on].astype(np.int64)


def coarse_mesh(block=BLOCK):
    """The block's coarse mesh: 4 mm cubes, six tetrahedra each."""
    return cuboid(*block.coarse_cells, bounds=block.bounds)


def block_mesh(refine=BLOCK_REFINE, block=BLOCK, progress=None):
    """``(mesh, description)``: the coarse mesh refined ``refine`` times.

    ``progress(text)`` is told of each step.
    """
    k = integer_option(refine, "refine", minimum=0)
    nx, ny, nz = block.coarse_cells
    cube = f"{block.cube * 1e3:g} mm"
    if progress is not None:
        progress(f"mesh: cuboid {nx} x {ny} x {nz} cubes of {cube}")
    mesh = coarse_mesh(block)
    for level in range(k):
        if progress is not None:
            progress(f"mesh: refinement {level + 1} of {k} ({8 * mesh.n_cells:,} tetrahedra)")
        mesh = mesh.refine()
    return mesh, (f"cuboid {nx} x {ny} x {nz} cubes of {cube} refined {k} time"
                  f"{'s' if k != 1 else ''} ({block.cube * 1e3 / 2**k:g} mm cubes)")


def heat_spreader_block(mesh=None, *, refine=None, source=None, conductivity=None, film=None,
                        coolant=None, block=BLOCK, mesh_description=None):
    """The block problem on ``mesh`` (or the coarse mesh refined ``refine`` times, default 4).

    ``source`` (W/m^3, uniform over the whole block, replacing the regions),
    ``conductivity`` (W/(m K)), ``film`` (W/(m^2 K)) and ``coolant`` (degC)
    replace the scenario's values.
    """
    if mesh is None:
        mesh, made = block_mesh(BLOCK_REFINE if refine is None else refine, block)
        mesh_description = mesh_description or made
    kc = block.conductivity if conductivity is None else float(conductivity)
    h = block.film if film is None else float(film)
    tc = block.coolant if coolant is None else float(coolant)
    statement = [
        "built-in scenario (invented demonstration data): heat-spreader block",
        f"copper block {block.length * 1e3:g} mm x {block.width * 1e3:g} mm x "
        f"{block.height * 1e3:g} mm (x, y, z), bottom face at z = 0",
    ]
    if conductivity is None:
        statement.append(f"conductivity k = {kc:g} W/(m K) (pure copper at 300 K; Incropera and "
                         f"DeWitt, Fundamentals of Heat and Mass Transfer, table A.1; value "
                         f"from memory)")
    else:
        statement.append(f"conductivity k = {kc:g} W/(m K) (given by --conductivity)")
    if source is None:
        q = source_per_cell(mesh, block.sources, 1.0, "use a finer mesh (--refine 1 or more)")
        sources = block.sources
        for s in sources:
            statement.append(f"{s.describe()}, q = {s.power / s.volume:.4g} W/m^3")
        statement.append("q is set per tetrahedron and rescaled per region so that the "
                         "integrated power is exact on any mesh")
    else:
        q = float(source)
        sources = ()
        statement.append(f"uniform source q = {q:g} W/m^3 over the whole block (given by "
                         f"--source, replacing the heat sources)")
    film_origin = ("forced convection of a liquid; Incropera and DeWitt, table 1.1 gives 100 to "
                   "20,000 W/(m^2 K); value from memory" if film is None else "given by --film")
    statement.append(f"bottom face cooled by convection: h = {h:g} W/(m^2 K) ({film_origin}) "
                     f"to coolant at {tc:g} degC (Robin: k dT/dn + h (T - {tc:g}) = 0)")
    statement.append("the other five faces insulated; steady conduction -div(k grad T) = q, "
                     "SI units")
    cooling = Cooling(bottom_faces(mesh), h, tc, "the cooled bottom face")
    return Problem(
        name="heat-spreader block", mesh=mesh, source=q, conductivity=kc, dirichlet=None,
        statement=statement, cooling=cooling, components=sources, length_scale=1e3,
        length_unit="mm", quantity="temperature", unit="degC", power_unit="W",
        mesh_description=mesh_description or repr(mesh),
        capacity=block.density * block.specific_heat,
    )
