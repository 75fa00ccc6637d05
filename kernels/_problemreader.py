"""The checks of a problem file's content (:mod:`hatkernels.problemfile`), key by key.

:class:`Reader` takes what :func:`tomllib.loads` made of the file, checks every
key, type and value, reads the mesh and resolves the names of regions and
boundary tags against it; the first failure is a :class:`KeyProblem` naming
the key path, to which :func:`hatkernels.problemfile.read_problem` adds the
file and the line.
"""

from __future__ import annotations

import datetime
import math
import os

import numpy as np

from hatkernels._keylines import dotted
from hatkernels.errors import InputError
from hatkernels.meshfiles import mesh_from_arrays, read_mesh_file
from hatkernels.precond import PRECONDITIONERS
from hatkernels.transient_probes import locate
from hatkernels.transient_steps import MAX_STEPS, SCHEMES

__all__ = ["KEYS", "LENGTH_UNITS", "KeyProblem", "Reader"]

#: Metres per unit of the mesh's coordinates, by the name ``length_unit`` takes.
LENGTH_UNITS = {"m": 1.0, "cm": 1e-2, "mm": 1e-3, "um": 1e-6}
#: The keys each table takes.
KEYS = {
    (): ("title", "mesh", "length_unit", "refine", "regions", "boundary", "solver", "output",
         "time"),
    ("regions", "*"): ("tags", "conductivity", "source", "density", "specific_heat"),
    ("boundary", "*"): ("tags", "held", "flux", "film", "ambient"),
    ("solver",): ("preconditioner", "rtol", "maxiter"),
    ("output",): ("directory",),
    ("time",): ("end", "step", "outputs", "scheme", "initial", "probes"),
}

_TYPE_WORDS = ((bool, "a boolean"), (int, "an integer"), (float, "a number"), (str, "a string"),
               (list, "an array"), (dict, "a table"),
               ((datetime.date, datetime.time), "a date or time"))


def _kind(value):
    """A value's TOML type in words, with the value when it is short."""
    word = next((w for types, w in _TYPE_WORDS if isinstance(value, types)),
                type(value).__name__)
    text = repr(value) if not isinstance(value, (list, dict)) else ""
    return f"{word} {text}" if text and len(text) <= 40 else word


class KeyProblem(Exception):
    """What is wrong at ``key`` (a key path); the caller adds the file and the line."""

    def __init__(self, key, message):
        super().__init__(message)
        self.key, self.message = tuple(key), message


class Reader:
    """Checks one parsed problem file (read from ``path``); every failure is a
    :class:`KeyProblem` naming the key.  ``insulated``: accept a boundary with no held or
    cooled tag."""

    def __init__(self, path, insulated=False):
        self.path = path
        self.insulated = insulated

    def fail(self, key, message):
        raise KeyProblem(key, message)

    def table(self, value, key, allowed):
        if not isinstance(value, dict):
            self.fail(key, f"expected a table, got {_kind(value)}")
        for name in value:
            if name not in allowed:
                where = f"[{dotted(key)}]" if key else "the top level"
                self.fail(key + (name,), f"unknown key; {where} takes {', '.join(allowed)}")
        return value

    def number(self, value, key, what, *, positive=False):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(key, f"expected {what}, got {_kind(value)}")
        v = float(value)
        if not math.isfinite(v) or (positive and not v > 0):
            self.fail(key, f"expected {what}, got {value!r}")
        return v

    def text(self, value, key, what):
        if not isinstance(value, str) or not value.strip():
            self.fail(key, f"expected {what}, got {_kind(value)}")
        return value

    # -- the file ---------------------------------------------------------------

    def problem(self, data):
        self.table(data, (), KEYS[()])
        for key, value in data.items():  # the tables, checked before the mesh is read
            if key in ("regions", "boundary"):
                what = "material" if key == "regions" else "condition"
                if not isinstance(value, dict):
                    self.fail((key,), f"expected [{key}.NAME] tables, one per {what}, got "
                                      f"{_kind(value)}")
                for name, inner in value.items():
                    if not isinstance(inner, dict):
                        self.fail((key, name), f"expected a [{key}.NAME] table, one per {what}, "
                                               f"got {_kind(inner)}")
                    self.table(inner, (key, name), KEYS[(key, "*")])
            elif key in ("solver", "output", "time"):
                self.table(value, (key,), KEYS[(key,)])
        probes = data.get("time", {}).get("probes", {})
        if not isinstance(probes, dict):
            self.fail(("time", "probes"), f"expected a [time.probes] table of NAME = [x, y] "
                                          f"points, got {_kind(probes)}")
        title = None
        if "title" in data:
            title = self.text(data["title"], ("title",), "a title (a string)")
        if "mesh" not in data:
            self.fail(("mesh",), "missing; expected the mesh file's path (relative to the "
                                 "problem file's folder)")
        mesh_name = self.text(data["mesh"], ("mesh",), "the mesh file's path (a string)")
        unit = data.get("length_unit", "m")
        if not isinstance(unit, str) or unit not in LENGTH_UNITS:
            self.fail(("length_unit",), f"expected one of {', '.join(map(repr, LENGTH_UNITS))}, "
                                        f"got {_kind(unit)}")
        refine = data.get("refine")
        if refine is not None and (isinstance(refine, bool) or not isinstance(refine, int)
                                   or refine < 0):
            self.fail(("refine",), f"expected an integer >= 0, got {_kind(refine)}")
        if not data.get("regions"):
            self.fail(("regions",), "missing; expected a [regions.NAME] table with the "
                                    "conductivity of each region of the mesh")
        solver = self.solver(data.get("solver", {}))
        output = None
        if "directory" in data.get("output", {}):
            output = self.text(data["output"]["directory"], ("output", "directory"),
                               "the output directory (a string)")
        raw_materials = [(name, self.material(t, ("regions", name)))
                         for name, t in data["regions"].items()]
        time = None
        if "time" in data:
            time = self.time(data["time"])
            for name, (_, _, rho, c) in raw_materials:
                for value, part, what in ((rho, "density", "kg/m^3"),
                                          (c, "specific_heat", "J/(kg K)")):
                    if value is None:
                        self.fail(("regions", name, part),
                                  f"missing; with a [time] table every material needs its "
                                  f"{part} ({what}): the heat capacity rho c = density x "
                                  f"specific_heat")
        raw_conditions = [(name, self.condition(t, ("boundary", name)))
                          for name, t in data.get("boundary", {}).items()]
        mesh_path = os.path.join(os.path.dirname(os.path.abspath(self.path)), mesh_name)
        mesh = self.mesh(mesh_path, unit, data["regions"])
        materials = self.materials(mesh, raw_materials, data["regions"])
        if time is not None:  # in time, the capacity term fixes a body nothing holds or cools
            self.insulated = True
        conditions = self.conditions(mesh, raw_conditions, data.get("boundary", {}))
        if time is not None:
            time["probes"] = self.probes(probes, mesh, unit)
        return {"path": self.path, "title": title or os.path.basename(self.path),
                "mesh_path": mesh_path, "length_unit": unit, "refine": refine, "mesh": mesh,
                "materials": materials, "conditions": conditions, "solver": solver,
                "output": output, "time": time}

    def solver(self, table):
        out = {"preconditioner": None, "rtol": None, "maxiter": None}
        if "preconditioner" in table:
            name = table["preconditioner"]
            if not isinstance(name, str) or name not in PRECONDITIONERS:
                self.fail(("solver", "preconditioner"),
                          f"expected one of {', '.join(PRECONDITIONERS)}, got {_kind(name)}")
            out["preconditioner"] = name
        if "rtol" in table:
            out["rtol"] = self.number(table["rtol"], ("solver", "rtol"),
                                      "a relative tolerance > 0", positive=True)
        if "maxiter" in table:
            n = table["maxiter"]
            if isinstance(n, bool) or not isinstance(n, int) or n < 1:
                self.fail(("solver", "maxiter"), f"expected an integer >= 1, got {_kind(n)}")
            out["maxiter"] = n
        return out

    def material(self, table, key):
        """(conductivity, source, density, specific heat) of one region table, checked but
        for the tensor's size (density and specific heat None where not given)."""
        if "conductivity" not in table:
            self.fail(key + ("conductivity",), "missing; expected the conductivity in W/(m K)")
        k = table["conductivity"]
        what = ("a positive number (W/(m K)) or a symmetric positive definite 2x2 or 3x3 "
                "array")
        if isinstance(k, list):
            k = self.tensor(k, key + ("conductivity",), what)
        else:
            k = self.number(k, key + ("conductivity",), what, positive=True)
        q = self.number(table.get("source", 0.0), key + ("source",),
                        "a source in W/m^3 (a finite number)")
        rho = c = None
        if "density" in table:
            rho = self.number(table["density"], key + ("density",),
                              "a density > 0 in kg/m^3", positive=True)
        if "specific_heat" in table:
            c = self.number(table["specific_heat"], key + ("specific_heat",),
                            "a specific heat > 0 in J/(kg K)", positive=True)
        return k, q, rho, c

    def time(self, table):
        """The ``[time]`` table but its probes (checked against the mesh later), as a dict."""
        key = ("time",)
        what = {"end": "the end time > 0 in s", "step": "the largest time step > 0 in s",
                "initial": "the initial temperature in degC (a finite number)"}
        for name, text in what.items():
            if name not in table:
                self.fail(key + (name,), f"missing; expected {text}")
        end = self.number(table["end"], key + ("end",), what["end"], positive=True)
        step = self.number(table["step"], key + ("step",), what["step"], positive=True)
        if end / step > MAX_STEPS:
            self.fail(key + ("step",), f"end / step = {end / step:.3g} steps, more than "
                                       f"{MAX_STEPS}; choose a longer step")
        initial = self.number(table["initial"], key + ("initial",), what["initial"])
        scheme = table.get("scheme", "crank-nicolson")
        if not isinstance(scheme, str) or scheme not in SCHEMES:
            self.fail(key + ("scheme",), f"expected one of {', '.join(map(repr, SCHEMES))}, "
                                         f"got {_kind(scheme)}")
        outputs = table.get("outputs", 10)
        if isinstance(outputs, list):
            outputs = self.output_times(outputs, end)
        elif isinstance(outputs, bool) or not isinstance(outputs, int) or outputs < 1:
            self.fail(key + ("outputs",), f"expected a count of output times (an integer "
                                          f">= 1) or an array of increasing times in s, got "
                                          f"{_kind(outputs)}")
        return {"end": end, "step": step, "outputs": outputs, "scheme": scheme,
                "initial": initial}

    def output_times(self, values, end):
        key = ("time", "outputs")
        if not values:
            self.fail(key, "expected a count of output times or an array of increasing times "
                           "in s, got an empty array")
        times = [self.number(v, key + (k,), "an output time > 0 in s", positive=True)
                 for k, v in enumerate(values)]
        for k in range(1, len(times)):
            if not times[k] > times[k - 1]:
                self.fail(key + (k,), f"output times must increase: {times[k]:g} s comes after "
                                      f"{times[k - 1]:g} s")
        if times[-1] > end:
            self.fail(key + (len(times) - 1,), f"the output time {times[-1]:g} s is after "
                                               f"end = {end:g} s")
        return tuple(times)

    def probes(self, table, mesh, unit):
        """``((name, point in metres), ...)`` of ``[time.probes]``: each a point of the mesh."""
        out = []
        for name, value in table.items():
            key = ("time", "probes", name)
            axes = "[x, y]" if mesh.dim == 2 else "[x, y, z]"
            if not isinstance(value, list) or len(value) != mesh.dim:
                self.fail(key, f"expected a point {axes} in the mesh's length unit ({unit}), "
                               f"got {_kind(value)}")
            x = [self.number(v, key + (k,), "a coordinate (a finite number)")
                 for k, v in enumerate(value)]
            point = np.array(x) * LENGTH_UNITS[unit]
            try:
                locate(mesh, point[None, :], name=name)
            except InputError:
                self.fail(key, f"the point ({', '.join(f'{v:g}' for v in x)}) {unit} is "
                               f"outside the mesh (in no cell)")
            out.append((name, tuple(float(v) for v in point)))
        return tuple(out)

    def tensor(self, rows, key, what):
        d = len(rows)
        if d not in (2, 3) or not all(isinstance(r, list) and len(r) == d for r in rows):
            self.fail(key, f"expected {what}, got an array that is not 2x2 or 3x3")
        K = np.array([[self.number(v, key + (i, j), "a finite number")
                       for j, v in enumerate(r)] for i, r in enumerate(rows)])
        scale = np.abs(K).max()
        if (np.abs(K - K.T) > 1e-12 * scale).any():
            i, j = np.argwhere(np.abs(K - K.T) > 1e-12 * scale)[0]
            self.fail(key, f"expected {what}; this one is not symmetric ([{i}][{j}] = "
                           f"{K[i, j]:g} but [{j}][{i}] = {K[j, i]:g})")
        low = float(np.linalg.eigvalsh(0.5 * (K + K.T))[0])
        if not low > 1e-12 * scale:
            self.fail(key, f"expected {what}; this one is not positive definite (smallest "
                           f"eigenvalue {low:.4g})")
        return K

    def condition(self, table, key):
        """(kind, value, ambient) of one boundary table."""
        given = [k for k in ("held", "flux", "film") if k in table]
        if len(given) != 1:
            what = ("no condition" if not given
                    else f"two conditions ({' and '.join(given)})")
            self.fail(key + ((given[1],) if len(given) > 1 else ()),
                      f"{what}; a boundary table takes exactly one of held = T, flux = q, "
                      f"or film = h with ambient = T")
        kind = given[0]
        if kind != "film" and "ambient" in table:
            self.fail(key + ("ambient",), f"ambient goes with film (convection), not with "
                                          f"{kind}")
        if kind == "film" and "ambient" not in table:
            self.fail(key + ("film",), "film needs ambient = T, the temperature of the "
                                       "surroundings in degC")
        if kind == "held":
            return "held", self.number(table["held"], key + ("held",),
                                       "a temperature in degC (a finite number)"), None
        if kind == "flux":
            return "flux", self.number(table["flux"], key + ("flux",),
                                       "a heat flux in W/m^2 (a finite number)"), None
        h = self.number(table["film"], key + ("film",), "a film coefficient > 0 in W/(m^2 K)",
                        positive=True)
        ambient = self.number(table["ambient"], key + ("ambient",),
                              "an ambient temperature in degC (a finite number)")
        return "convection", h, ambient

    # -- against the mesh -------------------------------------------------------

    def mesh(self, path, unit, regions):
        key = ("mesh",)
        try:
            points, cells, tags = read_mesh_file(path)
            points = np.asarray(points, dtype=np.float64)
            mesh = mesh_from_arrays(points * LENGTH_UNITS[unit], cells, path, tags)
        except InputError as exc:
            self.fail(key, str(exc))
        t = mesh.tags
        if t is None or t.regions is None:  # one region, named after its only material
            if len(regions) != 1:
                self.fail(("regions", list(regions)[1]),
                          f"the mesh {os.path.basename(path)} has no region tags, so it is "
                          f"one region: give one [regions.NAME] table")
            name = next(iter(regions))
            mesh = mesh.with_tags(
                regions=np.ones(mesh.n_cells, np.int32), region_names={name: 1},
                sides=None if t is None else t.sides,
                side_tags=None if t is None else t.side_tags,
                side_names=None if t is None else dict(t.side_names))
        return mesh

    def tag_list(self, table, key, name, resolve):
        """The tags a table applies to: its ``tags`` array, or its own name."""
        if "tags" not in table:
            try:
                return (resolve(name),)
            except InputError as exc:
                self.fail(key, f"{exc}; name a {'region' if key[0] == 'regions' else 'boundary tag'}"
                               f" of the mesh, or list them in tags = [..]")
        keys = table["tags"]
        if not isinstance(keys, list) or not keys:
            self.fail(key + ("tags",), f"expected a non-empty array of names or tag numbers, "
                                       f"got {_kind(keys)}")
        out = []
        for k, item in enumerate(keys):
            if isinstance(item, bool) or not isinstance(item, (str, int)):
                self.fail(key + ("tags", k), f"expected a name or a tag number, got "
                                             f"{_kind(item)}")
            try:
                t = resolve(item)
            except InputError as exc:
                self.fail(key + ("tags", k), str(exc))
            if t not in out:
                out.append(t)
        return tuple(out)

    def claim(self, owner, key, table, resolve, label, what):
        """The tags of table ``key``, each recorded in ``owner`` (tag -> table name); a tag
        another table has already claimed is refused."""
        mine = self.tag_list(table, key, key[1], resolve)
        for t in mine:
            if t in owner:
                self.fail(key, f"{label(t)} already has {what} (from "
                               f"[{key[0]}.{dotted((owner[t],))}]); it takes one")
            owner[t] = key[1]
        return mine

    def materials(self, mesh, raw, regions):
        tags = mesh.tags
        owner = {}
        out = []
        for name, (k, q, rho, c) in raw:
            key = ("regions", name)
            mine = self.claim(owner, key, regions[name],
                              lambda item: tags.region_tag(item, what="region"),
                              lambda t: f"region {tags.region_label(t)}", "a material")
            if np.ndim(k) == 2 and k.shape != (mesh.dim, mesh.dim):
                self.fail(key + ("conductivity",), f"a {k.shape[0]}x{k.shape[0]} tensor on a "
                          f"{mesh.dim}-D mesh; expected {mesh.dim}x{mesh.dim}")
            out.append((name, mine, k, q, rho, c))
        missing = [int(t) for t in tags.region_tags() if int(t) not in owner]
        if missing:
            self.fail(("regions",), f"region {tags.region_label(missing[0])} of the mesh has no "
                                    f"material ({len(missing)} of {len(tags.region_tags())} "
                                    f"regions lack one); every region needs a [regions.NAME] "
                                    f"table with its conductivity")
        return out

    def conditions(self, mesh, raw, boundary):
        tags = mesh.tags
        owner = {}
        out = []
        for name, (kind, value, ambient) in raw:
            key = ("boundary", name)
            if tags is None or len(tags.sides) == 0:
                self.fail(key, "the mesh has no boundary tags; a condition needs tagged "
                               "boundary sides")
            mine = self.claim(owner, key, boundary[name],
                              lambda item: tags.side_tag(item, what="boundary tag"),
                              lambda t: f"boundary tag {tags.side_label(t)}", "a condition")
            out.append((name, mine, kind, value, ambient))
        if not self.insulated and not any(c[2] in ("held", "convection") for c in out):
            self.fail(("boundary",),
                      "no boundary tag is held or cooled (held = T, or film with ambient): "
                      "the temperature would be fixed only up to a constant")
        return out
