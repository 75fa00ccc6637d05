r"""Problem files: a steady conduction problem written in TOML, read and checked once.

A problem file names a mesh file with region tags on its cells and tags on
its boundary sides (:func:`hatkernels.io.read_mesh`), gives a material to
every region and a condition to boundary tags; the rest of the boundary is
insulated.  ``docs/problem-files.md`` describes every key; in short::

    title = "bracket"              # optional
    mesh = "bracket.npz"           # relative to the problem file's folder
    length_unit = "mm"             # m (default), cm, mm, um: the mesh's coordinates
    refine = 1                     # optional: refine the mesh this many times

    [regions.steel]                # a region name or tag of the mesh; tags = [..] for several
    conductivity = 14.9            # W/(m K), or a symmetric positive definite d x d array
    source = 2e6                   # W/m^3, default 0

    [boundary.clamp]               # a boundary tag's name or number; tags = [..] for several
    held = 20.0                    # degC; or flux = q (W/m^2 into the body);
                                   # or film = h (W/(m^2 K)) with ambient = T (degC)
    density = 7900.0               # kg/m^3 and J/(kg K): needed with a [time] table
    specific_heat = 477.0

    [solver]                       # optional: preconditioner, rtol, maxiter
    [output]                       # optional: directory
    [time]                         # optional, a transient problem: end, step, initial
    end = 600.0                    # (s, s, degC), outputs (a count or times in s), scheme
    step = 5.0
    initial = 20.0
    [time.probes]                  # optional: points recorded every step (length_unit)
    centre = [70.0, 10.0]

Lengths are scaled to metres when the mesh is read; every other quantity is
in SI units, temperatures in degC, times in s.  A mesh without region tags is one region:
give it one ``[regions.NAME]`` table.

Everything wrong with a file (TOML syntax, an unknown key, a wrong type or
value, a missing key, a name the mesh does not have, two conditions on one
tag) raises :class:`ProblemFileError`, an :class:`~hatkernels.errors.InputError`
whose message names the file, the line, the key (a dotted path) and what was
expected.  The line of a key is found by scanning the text
(:mod:`hatkernels._keylines`): :mod:`tomllib` gives no positions.

>>> import os, tempfile
>>> from hatkernels.io import write_mesh
>>> from hatkernels.mesh import rectangle
>>> from hatkernels.mesh.tags import label_sides
>>> folder = tempfile.mkdtemp()
>>> bar = label_sides(rectangle(8, 1), {"cold": lambda x, y: x == 0, "warm": lambda x, y: x == 1})
>>> _ = write_mesh(os.path.join(folder, "bar.npz"), bar)
>>> def write(text):
...     with open(os.path.join(folder, "bar.toml"), "w") as f:
...         _ = f.write(text)
>>> write('mesh = "bar.npz"\n[regions.copper]\nconductivity = 400\n'
...       '[boundary.cold]\nheld = 0\n[boundary.warm]\nheld = 10\n')
>>> problem = read_problem(os.path.join(folder, "bar.toml"))
>>> problem.materials[0].describe(), [c.describe() for c in problem.conditions]
('400 W/(m K)', ['held at 0 degC', 'held at 10 degC'])
>>> write('mesh = "bar.npz"\n[regions.copper]\nconductivity = -400\n')
>>> try:
...     read_problem(os.path.join(folder, "bar.toml"))
... except ProblemFileError as exc:
...     print(exc.line, exc.key)
3 regions.copper.conductivity
"""

from __future__ import annotations

import dataclasses
import importlib.resources
import os
import re
import tomllib

import numpy as np

from hatkernels._keylines import dotted, key_lines, line_of
from hatkernels._problemreader import LENGTH_UNITS, KeyProblem, Reader
from hatkernels.errors import InputError
from hatkernels.poisson import solve_poisson

__all__ = ["CASES", "LENGTH_UNITS", "BoundaryCondition", "Material", "ProblemFile",
           "ProblemFileError", "TimeSettings", "case_file", "read_problem"]

#: The problem files shipped with the package (in :mod:`hatkernels.cases`), by name.
CASES = {"heated-insert": "heated-insert.toml",
         "heated-insert-warmup": "heated-insert-warmup.toml"}

class ProblemFileError(InputError):
    """A problem file that cannot be used: ``file, line N: key: what was expected``.

    Attributes ``path``, ``line`` and ``key`` (a dotted path; empty for a
    syntax error) say where.
    """

    def __init__(self, path, line, key, message):
        self.path, self.line, self.key = path, line, key
        super().__init__(f"{path}, line {line}: {key + ': ' if key else ''}{message}")


@dataclasses.dataclass(frozen=True)
class Material:
    """One ``[regions.NAME]`` table: the region tags it covers, conductivity (W/(m K), a float
    or a (d, d) array), source (W/m^3), density (kg/m^3) and specific heat (J/(kg K)); the
    last two None where the file does not give them."""

    name: str
    tags: tuple
    conductivity: object
    source: float
    density: float | None = None
    specific_heat: float | None = None

    @property
    def capacity(self):
        """The volumetric heat capacity ``density x specific_heat`` (J/(m^3 K)), or None."""
        if self.density is None or self.specific_heat is None:
            return None
        return self.density * self.specific_heat

    def describe(self):
        k = self.conductivity
        return (f"{k:g} W/(m K)" if np.ndim(k) == 0
                else f"tensor {np.asarray(k).tolist()} W/(m K)")


@dataclasses.dataclass(frozen=True)
class BoundaryCondition:
    """One ``[boundary.NAME]`` table: ``kind`` "held" (``value`` in degC), "flux" (W/m^2 into
    the body) or "convection" (``value`` the film coefficient, ``ambient`` degC) on ``tags``."""

    name: str
    tags: tuple
    kind: str
    value: float
    ambient: float | None = None

    def describe(self):
        if self.kind == "held":
            return f"held at {self.value:g} degC"
        if self.kind == "flux":
            return f"flux {self.value:g} W/m^2 into the body"
        return f"convection, h = {self.value:g} W/(m^2 K) to {self.ambient:g} degC"


@dataclasses.dataclass(frozen=True)
class TimeSettings:
    """The ``[time]`` table: march from ``initial`` (degC, everywhere) at t = 0 to ``end``
    (s) in steps of at most ``step`` (s) by ``scheme`` (a key of
    :data:`hatkernels.transient.SCHEMES`).

    ``outputs`` is a count (that many evenly spaced output times) or a tuple of
    increasing times in s; ``probes`` holds ``(name, point)`` pairs, the points in
    metres (the file gives them in its ``length_unit``).
    """

    end: float
    step: float
    initial: float
    outputs: int | tuple = 10
    scheme: str = "crank-nicolson"
    probes: tuple = ()

    def output_times(self):
        """The output times after t = 0, in s: ``outputs`` evenly spaced ones ending at
        ``end``, or the given times with ``end`` added when they stop before it.

        >>> TimeSettings(end=60.0, step=1.0, initial=20.0, outputs=3).output_times().tolist()
        [20.0, 40.0, 60.0]
        >>> TimeSettings(60.0, 1.0, 20.0, outputs=(5.0, 30.0)).output_times().tolist()
        [5.0, 30.0, 60.0]
        """
        if isinstance(self.outputs, tuple):
            times = list(self.outputs)
            if times[-1] < self.end:
                times.append(self.end)
            return np.array(times, dtype=np.float64)
        n = int(self.outputs)
        times = self.end * np.arange(1, n + 1) / n
        times[-1] = self.end  # exactly
        return times


@dataclasses.dataclass(frozen=True)
class ProblemFile:
    """A checked problem file.

    ``mesh`` is the file's mesh in metres (unrefined; ``refine`` says how many
    times to refine it, None when the file does not say), with region tags
    (one region named after the only material when the file's mesh had
    none); ``materials`` and ``conditions`` in the file's order;
    ``solver`` holds ``preconditioner``, ``rtol`` and ``maxiter`` (None where
    the file is silent); ``output`` the output directory or None; ``time`` the
    ``[time]`` table (a :class:`TimeSettings`), or None for a steady problem.
    """

    path: str
    title: str
    mesh_path: str
    length_unit: str
    refine: int | None
    mesh: object
    materials: tuple
    conditions: tuple
    solver: dict
    output: str | None
    time: TimeSettings | None = None

    @property
    def scale(self):
        """Metres per unit of the mesh file's coordinates."""
        return LENGTH_UNITS[self.length_unit]

    def insulated_tags(self):
        """The mesh's boundary tags no condition names (zero flux), sorted."""
        named = {t for c in self.conditions for t in c.tags}
        return [int(t) for t in self.mesh.tags.boundary_tags() if int(t) not in named]

    def source_per_cell(self, mesh=None):
        """The source (W/m^3) of each cell of ``mesh`` (default: the file's; a refinement of
        it carries the regions)."""
        mesh = self.mesh if mesh is None else mesh
        q = np.zeros(mesh.n_cells)
        for m in self.materials:
            q[np.isin(mesh.regions, m.tags)] = m.source
        return q

    def capacity_per_cell(self, mesh=None):
        """The volumetric heat capacity ``density x specific_heat`` (J/(m^3 K)) of each cell
        of ``mesh`` (default: the file's; a refinement of it carries the regions).

        Raises
        ------
        InputError
            A material without a density or a specific heat (naming its region table).
        """
        mesh = self.mesh if mesh is None else mesh
        c = np.zeros(mesh.n_cells)
        for m in self.materials:
            if m.capacity is None:
                missing = " and ".join(k for k in ("density", "specific_heat")
                                       if getattr(m, k) is None)
                raise InputError(f"{self.path}: [regions.{dotted((m.name,))}] has no {missing}: "
                                 f"the heat capacity rho c needs density (kg/m^3) and "
                                 f"specific_heat (J/(kg K))")
            c[np.isin(mesh.regions, m.tags)] = m.capacity
        return c

    def solve_arguments(self):
        """The problem as keyword arguments of :func:`hatkernels.solve_poisson`, by tag."""
        k = {t: m.conductivity for m in self.materials for t in m.tags}
        q = {t: m.source for m in self.materials for t in m.tags}
        out = {"f": q, "coefficient": k}
        kinds = {"held": {}, "flux": {}, "convection": {}}
        for c in self.conditions:
            for t in c.tags:
                kinds[c.kind][t] = (c.value if c.kind != "convection"
                                    else (c.value, c.value * c.ambient))
        for kind, arg in (("held", "dirichlet"), ("flux", "neumann"), ("convection", "robin")):
            if kinds[kind]:
                out[arg] = kinds[kind]
        return out

    def solve(self, **options):
        """:func:`hatkernels.solve_poisson` of this problem on the mesh refined ``refine``
        times; ``options`` (``preconditioner``, ``rtol``, ...) override the file's."""
        settings = {k: v for k, v in self.solver.items() if v is not None}
        return solve_poisson(self.mesh, refine=self.refine or 0, **self.solve_arguments(),
                             **{**settings, **options})


def case_file(name):
    """The path of the packaged problem file ``name`` (a key of :data:`CASES`); its mesh
    lies beside it."""
    if name not in CASES:
        raise InputError(f"no packaged problem file {name!r}; there are: {', '.join(CASES)}")
    return str(importlib.resources.files("hatkernels.cases").joinpath(CASES[name]))


def read_problem(path, *, insulated=False):
    """Read and check the problem file at ``path`` and the mesh it names.

    A file must hold or cool some boundary tag (a steady temperature is fixed
    only up to a constant otherwise) unless ``insulated`` is true (the modes of
    a wholly insulated body are well defined: the first is the steady one).

    Returns
    -------
    ProblemFile

    Raises
    ------
    ProblemFileError
        Naming the file, the line and the key (see the module's notes).
    InputError
        The file cannot be read.
    """
    path = os.fspath(path)
    try:
        with open(path, "rb") as f:
            raw = f.read()
    except FileNotFoundError:
        raise InputError(f"problem file {path} not found") from None
    except IsADirectoryError:
        raise InputError(f"problem file {path} is a directory") from None
    except OSError as exc:
        raise InputError(f"problem file {path}: cannot read it ({exc.strerror})") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[:exc.start].count(b"\n") + 1
        raise ProblemFileError(path, line, "", "not UTF-8 text (TOML files are UTF-8)") from None
    text = text.removeprefix("\ufeff")  # a byte-order mark some editors write first
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        message = str(exc)
        found = re.search(r"\s*\(at line (\d+), column (\d+)\)$", message)
        line = int(found.group(1)) if found else text.count("\n") + 1
        if found:
            message = f"{message[:found.start()]} (column {found.group(2)})"
        raise ProblemFileError(path, line, "", f"TOML syntax: {message}") from None
    try:
        fields = Reader(path, insulated).problem(data)
    except KeyProblem as exc:
        lines = key_lines(text)
        raise ProblemFileError(path, line_of(lines, exc.key), dotted(exc.key),
                               exc.message) from None
    fields["materials"] = tuple(Material(*m) for m in fields["materials"])
    fields["conditions"] = tuple(BoundaryCondition(*c) for c in fields["conditions"])
    if fields["time"] is not None:
        fields["time"] = TimeSettings(**fields["time"])
    return ProblemFile(**fields)
