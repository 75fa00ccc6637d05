"""Reading meshes and writing results: whole files or nothing.

Meshes are read from ``.npz`` archives (arrays ``points`` (n_points, 2) and
``triangles`` (n_triangles, 3), or ``points`` (n_points, 3) and
``tetrahedra`` (n_tetrahedra, 4)), always, and from any format meshio reads
when the ``io`` extra is installed.  Results are written to ``.npz`` (always)
and ``.vtu`` (with meshio).

Every writer goes through :func:`atomic_file` (a temporary file in the same
directory, then :func:`os.replace`), and a command's set of output files
through :func:`output_directory` (a temporary directory next to the target,
renamed into place), so that a failure or an interrupt never leaves a
half-written file behind (both live in :mod:`hatkernels._output`).

>>> import os, tempfile, numpy as np, hatkernels
>>> d = tempfile.mkdtemp()
>>> m = hatkernels.mesh.rectangle(2, 2)
>>> path = write_solution(os.path.join(d, "s.npz"), m, {"u": np.arange(9.0)}, {"note": "demo"})
>>> sol = read_solution(path)
>>> sol.mesh.n_triangles, float(sol.point_data["u"][-1]), sol.metadata["note"]
(8, 8.0, 'demo')
>>> import shutil; shutil.rmtree(d)
"""

from __future__ import annotations

import dataclasses
import json
import os
import zipfile
import zlib

import numpy as np

from hatkernels._output import (
    MARKER_FILES,
    OutputError,
    OutputNotWritable,
    atomic_file,
    check_output_directory,
    check_output_file,
    output_directory,
    write_json,
)
from hatkernels.errors import InputError
from hatkernels.mesh.core import Mesh
from hatkernels.meshfiles import (  # noqa: F401  (re-exported)
    MeshArrays,
    _cells_name,
    _mesh_from_arrays,
    mesh_from_arrays,
    meshio_available,
    read_mesh,
    read_mesh_arrays,
    read_mesh_file,
    write_mesh,
)

__all__ = [
    "MARKER_FILES",
    "OutputError",
    "OutputNotWritable",
    "Solution",
    "atomic_file",
    "check_output_directory",
    "check_output_file",
    "meshio_available",
    "mesh_from_arrays",
    "output_directory",
    "read_mesh",
    "read_mesh_arrays",
    "read_mesh_file",
    "MeshArrays",
    "write_mesh",
    "read_solution",
    "write_json",
    "write_solution",
    "write_vtu",
]

# -- solutions --------------------------------------------------------------------


@dataclasses.dataclass
class Solution:
    """What :func:`read_solution` found: the mesh, named point and cell arrays, metadata."""

    mesh: Mesh
    point_data: dict
    cell_data: dict
    metadata: dict


_RESERVED = ("points", "triangles", "tetrahedra", "metadata", "fields")


def _checked_fields(mesh, point_data, cell_data):
    """Check field shapes against the mesh; return (point arrays, cell arrays)."""
    out = ({}, {})
    for slot, kind, data, n in ((0, "point", point_data, mesh.n_points),
                                (1, "cell", cell_data, mesh.n_cells)):
        for name, values in (data or {}).items():
            if not isinstance(name, str) or not name.isidentifier() or name in _RESERVED:
                raise InputError(f"{kind} array name {name!r} is reserved or not an identifier "
                                 f"(reserved: {', '.join(_RESERVED)})")
            if name in out[0] or name in out[1]:
                raise InputError(f"array name {name!r} is used for both points and cells")
            a = np.asarray(values)
            if a.shape[:1] != (n,):
                raise InputError(f"{kind} array {name!r} has shape {a.shape}; expected ({n}, ...) "
                                 f"for the mesh's {n} {kind}s")
            out[slot][name] = a
    return out


_CELL_KEY = {2: "triangles", 3: "tetrahedra"}


def write_solution(path, mesh, point_data=None, metadata=None, cell_data=None):
    """Write a mesh and fields to an ``.npz`` archive, atomically; return ``path``.

    The archive holds ``points`` (n_points, 2), ``triangles`` (n_triangles, 3)
    (in 3-D: ``points`` (n_points, 3), ``tetrahedra`` (n_tetrahedra, 4)),
    one array per field under its own name (for example ``u``, one value per
    point), ``fields`` (a JSON string mapping each field name to "point" or
    "cell") and ``metadata`` (a JSON string).  It loads with
    ``numpy.load(path)`` (no pickles), and as a mesh with :func:`read_mesh`.
    """
    points, cells = _checked_fields(mesh, point_data, cell_data)
    meta = json.dumps(metadata or {}, allow_nan=False)
    fields = json.dumps({**{k: "point" for k in points}, **{k: "cell" for k in cells}})
    with atomic_file(path) as tmp, open(tmp, "wb") as f:
        np.savez_compressed(f, points=mesh.points, **{_CELL_KEY[mesh.dim]: mesh.cells},
                            metadata=np.array(meta), fields=np.array(fields), **points, **cells)
    return path


def _open_archive(path, where):
    """The open :class:`numpy.lib.npyio.NpzFile` at ``path``; InputError naming ``where`` if not one."""
    if not os.path.exists(path):
        raise InputError(f"{where} not found")
    if os.path.isdir(path):
        raise InputError(f"{where} is a directory")
    with open(path, "rb") as f:
        head = f.read(4)
    if head[:2] != b"PK":  # an .npz is a zip archive of .npy arrays
        raise InputError(f"{where}: not an .npz archive (not a zip file; it starts with {head!r})")
    try:
        archive = np.load(path, allow_pickle=False)
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as exc:
        raise InputError(f"{where}: not a readable .npz archive, truncated or damaged "
                         f"({exc})") from None
    if not isinstance(archive, np.lib.npyio.NpzFile):
        raise InputError(f"{where}: holds a single array, not an .npz archive")
    return archive


def _read_members(archive, where):
    """Every array of ``archive``, read now, so that a damaged member is named here."""
    out = {}
    for name in archive.files:
        try:
            out[name] = archive[name]
        except (OSError, ValueError, EOFError, KeyError, zipfile.BadZipFile, zlib.error) as exc:
            raise InputError(f"{where}: cannot read array {name!r}, the file is truncated or "
                             f"damaged ({exc})") from None
        if not isinstance(out[name], np.ndarray):  # numpy hands back a non-.npy member's bytes
            raise InputError(f"{where}: member {name!r} is not a .npy array; not an archive "
                             f"written by numpy")
    return out


def _json_member(arrays, name, where):
    if name not in arrays:
        return {}
    a = arrays[name]
    if a.shape != () or a.dtype.kind != "U":
        raise InputError(f"{where}: array {name!r} must be one JSON text (a 0-d string array), "
                         f"got dtype {a.dtype} and shape {a.shape}")
    try:
        value = json.loads(str(a))
    except ValueError as exc:
        raise InputError(f"{where}: array {name!r} is not valid JSON ({exc})") from None
    if not isinstance(value, dict):
        raise InputError(f"{where}: array {name!r} must hold a JSON object")
    return value


def read_solution(path):
    """Read an archive written by :func:`write_solution`; returns :class:`Solution`.

    Without a ``fields`` entry, arrays of length n_points are taken as point
    data and of length n_triangles as cell data.

    Raises
    ------
    InputError
        The file is missing, not an ``.npz`` archive, truncated or damaged;
        ``points`` or ``triangles`` (``tetrahedra``) is missing; ``metadata`` or ``fields`` is
        not a JSON object; ``fields`` names an array the archive lacks or a
        kind other than "point" and "cell"; a field is not a real numeric
        array or its length is not the count of points (or cells).  The
        message starts with ``solution file PATH`` and names the array.
    MeshError
        ``points`` and ``triangles`` do not make a valid mesh (wrong shape or
        dtype, a bad index): the message starts with the file name.
    """
    path = os.fspath(path)
    where = f"solution file {path}"
    with _open_archive(path, where) as archive:
        arrays = _read_members(archive, where)
    cells = _cells_name(arrays)
    missing = [k for k in ("points", cells) if k not in arrays]
    if missing:
        have = ", ".join(arrays) or "nothing"
        raise InputError(f"{where}: no array {missing[0]!r} (it has: {have})")
    metadata = _json_member(arrays, "metadata", where)
    fields = _json_member(arrays, "fields", where)
    for name, kind in fields.items():
        if name not in arrays or name in _RESERVED:
            raise InputError(f"{where}: 'fields' names an array {name!r} that it does not hold")
        if kind not in ("point", "cell"):
            raise InputError(f"{where}: 'fields' says {name!r} is {kind!r}; expected 'point' "
                             f"or 'cell'")
    mesh = _mesh_from_arrays(arrays["points"], arrays[cells], where)
    point_data, cell_data = {}, {}
    for name in (k for k in arrays if k not in _RESERVED):
        a = arrays[name]
        if a.dtype.kind not in "biuf" or a.ndim == 0:
            raise InputError(f"{where}: array {name!r} must be a real numeric array with one "
                             f"row per point or cell, got dtype {a.dtype} and shape {a.shape}")
        kind = fields.get(name)
        if kind is None:
            if mesh.n_points == mesh.n_cells:
                raise InputError(f"{where}: cannot tell whether {name!r} is per point or per "
                                 f"cell (no 'fields' entry, and the counts are equal)")
            counts = {mesh.n_points: "point", mesh.n_cells: "cell"}
            if len(a) not in counts:
                raise InputError(f"{where}: array {name!r} has {len(a)} rows, but the mesh has "
                                 f"{mesh.n_points} points and {mesh.n_cells} cells")
            kind = counts[len(a)]
        (point_data if kind == "point" else cell_data)[name] = a
    try:
        _checked_fields(mesh, point_data, cell_data)
    except InputError as exc:
        raise InputError(f"{where}: {exc}") from None
    return Solution(mesh, point_data, cell_data, metadata)


#: VTK's name, through meshio, of a mesh's cells by dimension (VTK XML types 5 and 10).
_VTK_CELLS = {2: "triangle", 3: "tetra"}


def write_vtu(path, mesh, point_data=None, cell_data=None):
    """Write a VTK unstructured grid (``.vtu``) through meshio, atomically; return ``path``.

    Triangles (VTK cell type 5) get a zero z coordinate (VTK is 3-D);
    tetrahedra are written as VTK type 10.  Raises :class:`InputError` when
    meshio is not installed.
    """
    if not meshio_available():
        raise InputError("writing .vtu needs meshio; install the io extra "
                         "(pip install 'hatkernels[io]')")
    import meshio

    point_arrays, cell_arrays = _checked_fields(mesh, point_data, cell_data)
    points = mesh.points
    if mesh.dim == 2:
        points = np.column_stack([points, np.zeros(mesh.n_points)])
    out = meshio.Mesh(
        points,
        [(_VTK_CELLS[mesh.dim], np.asarray(mesh.cells))],
        point_data=point_arrays,
        cell_data={k: [v] for k, v in cell_arrays.items()},
    )
    with atomic_file(path, suffix=".vtu") as tmp:
        meshio.write(tmp, out, file_format="vtu")
    return path
