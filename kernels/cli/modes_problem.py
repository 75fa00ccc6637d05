"""The problem of ``hatkernels modes``: a scenario, a mesh file or a problem file, as the
arguments of :func:`hatkernels.eigen.eigenmodes` and the words that state it.

The mesh and the scenario's data come from :mod:`hatkernels.cli.problem`
(as ``solve`` builds them) or :func:`hatkernels.problemfile.read_problem`;
here they become the homogeneous eigenproblem: held sides keep a
disturbance at 0, convection sides take ``k dT/dn + h T = 0`` (the film
``h`` alone: :func:`~hatkernels.eigen.eigenmodes` ignores the coolant's
part), sources drop out.
"""

from __future__ import annotations

import dataclasses
import math
import os

import numpy as np

from hatkernels.block import BLOCK
from hatkernels.cli.problem import build_mesh, make_problem, refined
from hatkernels.cli.summary import file_record, problem_record
from hatkernels.coefficients import per_cell
from hatkernels.conditions import tagged
from hatkernels.scenarios import COARSE_CELLS, PLATE

__all__ = ["ModalProblem", "PLATE_REFINE", "BLOCK_REFINE", "kind", "from_options",
           "from_file"]

#: Refinements of the plate's 8 mm coarse mesh by default (307,200 triangles): a few seconds
#: on 2 cores, with the multigrid's levels.
PLATE_REFINE = 5
#: Refinements of the block's 4 mm cubes by default (1,179,648 tetrahedra, 0.5 mm cubes).
BLOCK_REFINE = 3
#: The default meshes' cells (triangles of the plate, tetrahedra of the block).
PLATE_CELLS = 2 * math.prod(PLATE.cells(COARSE_CELLS)) * 4**PLATE_REFINE
BLOCK_CELLS = 6 * math.prod(BLOCK.coarse_cells) * 8**BLOCK_REFINE
#: The units of a problem in SI units, and of a mesh file's problem.
SI_UNITS = {"eigenvalue": "1/s", "decay_time": "s", "length": "m",
            "conductivity": "W/(m K)", "capacity": "J/(m^3 K)"}
FILE_UNITS = {"eigenvalue": "k / (capacity x length^2), the mesh file's units",
              "decay_time": "capacity x length^2 / k, the mesh file's units",
              "length": "mesh units", "conductivity": "given", "capacity": "given"}


@dataclasses.dataclass
class ModalProblem:
    """What ``modes`` solves and how it says so.

    ``arguments``: the problem's keyword arguments of ``eigenmodes``
    (coefficient, density, dirichlet_on, robin); ``statement``: lines for the
    report; ``record``: the problem for summary.json; ``units``: the units of
    the results (:data:`SI_UNITS` or :data:`FILE_UNITS`); ``note``: whether
    the report explains the first decay time (a physical problem).
    """

    name: str
    mesh: object
    description: str
    arguments: dict
    statement: list
    record: dict
    units: dict
    length_scale: float = 1.0
    length_unit: str = ""
    note: bool = True


def kind(args, pf):
    """``(dimension, cooled)`` of the problem the options ask for, before any mesh is built
    (a ``--mesh`` file's dimension is read from its arrays by the caller)."""
    if pf is not None:
        return pf.mesh.dim, any(c.kind == "convection" for c in pf.conditions)
    if args.mesh is not None:
        return 2, False
    block = args.scenario == "block"
    return (3 if block else 2), block


def _coefficient(value):
    return value if np.ndim(value) == 0 else per_cell(value)


def from_options(args, progress, arrays=None):
    """The plate, the block or a ``--mesh`` file's problem (``arrays``: the file's, read);
    ``args.refine`` holds the default refinements (:func:`hatkernels.cli.modes.check`)."""
    mesh, description = build_mesh(args, progress, arrays)
    problem = make_problem(args, mesh, description)
    physical = problem.capacity is not None
    if args.capacity is not None:
        capacity, origin = args.capacity, "given by --capacity"
    elif args.scenario == "block":
        capacity, origin = problem.capacity, _origin("copper", BLOCK)
    elif physical:
        capacity, origin = problem.capacity, _origin("aluminium", PLATE)
    else:
        capacity, origin = 1.0, "the default with --mesh"
    arguments = {"coefficient": _coefficient(problem.conductivity), "density": capacity}
    record = problem_record(problem, mesh.dim)
    record["capacity"] = capacity
    statement = list(problem.statement)
    if physical:
        statement.append(f"modes: -div(k grad T) = lambda (rho c) T, rho c = {capacity:.6g} "
                         f"J/(m^3 K) ({origin})")
    else:
        statement.append(f"modes: -div(k grad u) = lambda c u with c = {capacity:g} ({origin}); "
                         f"lambda in the units of k / (c length^2) of the file")
    if problem.cooling is None:
        arguments["dirichlet_on"] = "boundary"
        statement.append("in the modes the held boundary keeps a disturbance at 0; the "
                         "sources and held values set the steady state, not the modes")
    else:
        c = problem.cooling
        arguments["robin"] = (c.sides, c.film, c.film * c.coolant)
        arguments["dirichlet_on"] = ()
        record["cooling"] = {"where": c.where, "film": c.film, "coolant": c.coolant,
                             "sides": int(len(c.sides))}
        statement.append(f"in the modes {c.where} takes k dT/dn + h T = 0 for a disturbance "
                         f"T (h = {c.film:g} W/(m^2 K)), the rest insulated; the sources and "
                         f"the coolant's temperature set the steady state, not the modes")
    return ModalProblem(
        name=problem.name, mesh=mesh, description=description, arguments=arguments,
        statement=statement, record=record, units=SI_UNITS if physical else FILE_UNITS,
        length_scale=problem.length_scale, length_unit=problem.length_unit, note=physical)


def _origin(material, body):
    return (f"{material}: {body.density:g} kg/m^3 x {body.specific_heat:g} J/(kg K), Incropera "
            f"and DeWitt, table A.1; values from memory")


def from_file(args, pf, progress):
    """A problem file's modes (``pf``: a :class:`hatkernels.problemfile.ProblemFile`) on its
    mesh refined ``args.refine`` times; its materials need density and specific heat."""
    mesh = refined(pf.mesh, args.refine, progress, getattr(args, "memory_check", True))
    tags = mesh.tags
    capacity = pf.capacity_per_cell(mesh)  # an InputError naming a material without them
    held = [t for c in pf.conditions if c.kind == "held" for t in c.tags]
    cooled = {t: (c.value, c.value * c.ambient) for c in pf.conditions
              if c.kind == "convection" for t in c.tags}
    arguments = {"coefficient": {t: m.conductivity for m in pf.materials for t in m.tags},
                 "density": per_cell(capacity),
                 "dirichlet_on": tagged(*held) if held else ()}
    if cooled:
        arguments["robin"] = cooled
    times = f", refined {args.refine} time{'s' if args.refine != 1 else ''}" if args.refine else ""
    description = (f"{os.path.basename(pf.mesh_path)} (lengths in {pf.length_unit}, scaled "
                   f"to metres){times}")
    record = file_record(pf, mesh, args.refine,
                         equation="natural thermal modes -div(k grad T) = lambda (rho c) T")
    statement = record["statement"]
    for m, entry in zip(pf.materials, record["materials"], strict=True):
        statement.append(f"{m.name}: k = {m.describe()}, rho c = {m.density:g} kg/m^3 x "
                         f"{m.specific_heat:g} J/(kg K) = {m.capacity:.6g} J/(m^3 K)")
        entry.update(density=m.density, specific_heat=m.specific_heat, capacity=m.capacity)
    for c in pf.conditions:
        where = ", ".join(tags.side_label(t) for t in c.tags)
        modal = {"held": "a disturbance held at 0",
                 "convection": f"k dT/dn + h T = 0 (h = {c.value:g} W/(m^2 K))",
                 "flux": "insulated (the imposed flux sets the steady state only)"}[c.kind]
        statement.append(f"boundary tag {where}: {c.describe()}; in the modes {modal}")
    statement.append("sources set the steady state, not the modes"
                     + ("; nothing is held or cooled: the first mode is the steady (uniform) "
                        "one, lambda = 0" if not held and not cooled else ""))
    return ModalProblem(name=pf.title, mesh=mesh, description=description, arguments=arguments,
                        statement=statement, record=record, units=SI_UNITS,
                        length_scale=1.0 / pf.scale, length_unit=pf.length_unit)
