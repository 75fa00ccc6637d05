"""Mesh files: ``.npz`` archives (always) and any format meshio reads (the ``io`` extra),
with their region and boundary tags; written whole or not at all.

:mod:`hatkernels.io` re-exports everything here.
"""

from __future__ import annotations

import contextlib
import io as io_module
import json
import os
import warnings
import zipfile
from typing import NamedTuple

import numpy as np

from hatkernels._output import atomic_file
from hatkernels.errors import InputError, MeshError
from hatkernels.mesh.core import Mesh
from hatkernels.mesh.tags import boundary_rows

__all__ = ["MeshArrays", "meshio_available", "mesh_from_arrays", "read_mesh", "read_mesh_arrays",
           "read_mesh_file", "write_mesh"]

_CELL_KEY = {2: "triangles", 3: "tetrahedra"}


def meshio_available():
    """True when meshio (the ``io`` extra) can be imported."""
    try:
        import meshio  # noqa: F401
    except ImportError:
        return False
    return True


# -- meshes -----------------------------------------------------------------------


def _mesh_from_arrays(points, triangles, source):
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            mesh = Mesh(points, triangles)
    except MeshError as exc:
        raise MeshError(f"{source}: {exc}") from None
    for w in caught:  # say which file the warning is about
        warnings.warn(f"{source}: {w.message}", w.category, stacklevel=3)
    return mesh


def _read_npz_mesh(path):
    with open(path, "rb") as f:
        head = f.read(4)
    if head[:2] != b"PK":  # an .npz is a zip archive of .npy arrays
        raise InputError(f"mesh file {path}: not an .npz archive (not a zip file; it starts "
                         f"with {head!r})")
    try:
        archive = np.load(path, allow_pickle=False)
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as exc:
        raise InputError(f"mesh file {path}: not a readable .npz archive ({exc})") from None
    if not isinstance(archive, np.lib.npyio.NpzFile):
        raise InputError(f"mesh file {path}: holds a single array, not an .npz archive with "
                         f"'points' and 'triangles'")
    with archive:
        cells = _cells_name(archive.files)
        missing = [k for k in ("points", cells) if k not in archive.files]
        if missing:
            have = ", ".join(archive.files) or "nothing"
            raise InputError(f"mesh file {path}: no array {missing[0]!r} (it has: {have})")
        try:
            points, cells = archive["points"], archive[cells]
            tags = {k: archive[k] for k in _TAG_ARRAYS if k in archive.files}
        except (OSError, ValueError, zipfile.BadZipFile) as exc:
            raise InputError(f"mesh file {path}: cannot read its arrays ({exc})") from None
    return MeshArrays(points, cells, _npz_tags(tags, path) if tags else None)


#: The optional arrays of a tagged mesh archive (see :func:`write_mesh`).
_TAG_ARRAYS = ("regions", "sides", "side_tags", "region_names", "side_names")


def _npz_tags(arrays, path):
    """The keyword arguments of :meth:`Mesh.with_tags` from an archive's tag arrays."""
    out = {k: arrays[k] for k in ("regions", "sides", "side_tags") if k in arrays}
    for key in ("region_names", "side_names"):
        if key not in arrays:
            continue
        a = arrays[key]
        try:
            names = json.loads(str(a[()])) if a.ndim == 0 and a.dtype.kind == "U" else None
        except json.JSONDecodeError:
            names = None
        if not isinstance(names, dict):
            raise InputError(f"mesh file {path}: {key!r} must be a JSON object of name -> tag "
                             f"stored as a string")
        out[key] = names
    if ("sides" in out) != ("side_tags" in out):
        have, lack = ("sides", "side_tags") if "sides" in out else ("side_tags", "sides")
        raise InputError(f"mesh file {path}: has {have!r} but no {lack!r}")
    return out


def _cells_name(names):
    """The archive's cell array: ``tetrahedra`` when it has one (and no ``triangles``)."""
    return "tetrahedra" if "tetrahedra" in names and "triangles" not in names else "triangles"


def _read_meshio_mesh(path):
    if not meshio_available():
        raise InputError(f"mesh file {path}: only .npz meshes can be read without meshio; "
                         f"install the io extra (pip install 'hatkernels[io]')")
    import meshio

    # meshio prints its complaints and may call sys.exit for a file it cannot
    # parse: keep its output and turn both into one InputError.
    said = io_module.StringIO()
    try:
        with contextlib.redirect_stdout(said), contextlib.redirect_stderr(said):
            m = meshio.read(path)
    except (Exception, SystemExit) as exc:
        text = [line.strip() for line in (str(exc) + "\n" + said.getvalue()).splitlines()]
        text = [line for line in text if line and not line.isdigit()]
        why = " ".join(text) if text else type(exc).__name__
        raise InputError(f"mesh file {path}: meshio cannot read it ({why})") from None
    points = np.asarray(m.points)
    if points.ndim != 2 or points.shape[1] not in (2, 3):
        raise InputError(f"mesh file {path}: points have shape {points.shape}, expected 2-D or 3-D")
    tetra = [c for c in m.cells if c.type == "tetra"]
    if tetra:
        # a tetrahedral mesh: its triangle, line and vertex cells are boundary parts
        others = sorted({c.type for c in m.cells} - {"tetra", "triangle", "line", "vertex"})
        if others:
            raise InputError(f"mesh file {path}: has {', '.join(others)} cells besides "
                             f"tetrahedra; only linear tetrahedra are supported")
        if points.shape[1] != 3:
            raise InputError(f"mesh file {path}: tetrahedra need 3-D points, got shape "
                             f"{points.shape}")
        return MeshArrays(points, np.concatenate([np.asarray(c.data) for c in tetra]),
                          _meshio_tags(m, "tetra", "triangle", 3))
    if points.shape[1] == 3:
        z = points[:, 2]
        finite = np.isfinite(z)
        if finite.any() and np.ptp(z[finite]) > 1e-12 * max(1.0, np.abs(points[:, :2]).max()):
            k = int(np.argmax(np.abs(z - z[finite][0]) > 0))
            raise InputError(f"mesh file {path}: not a plane mesh (point {k} has z = {z[k]!r}, "
                             f"point 0 has z = {z[0]!r})")
        points = points[:, :2]
    blocks = [c for c in m.cells if c.type == "triangle"]
    others = sorted({c.type for c in m.cells} - {"triangle", "line", "vertex"})
    if others:
        raise InputError(f"mesh file {path}: has {', '.join(others)} cells; only linear "
                         f"triangles (with optional line and vertex cells) are supported")
    if not blocks:
        raise InputError(f"mesh file {path}: has no triangle cells")
    triangles = np.concatenate([np.asarray(c.data) for c in blocks])
    return MeshArrays(points, triangles, _meshio_tags(m, "triangle", "line", 2))


def _integer_tags(arrays):
    """The blocks' arrays as int64 if every one holds whole numbers (one value per cell), else None."""
    out = []
    for a in arrays:
        a = np.asarray(a)
        if a.ndim == 2 and a.shape[1] == 1:
            a = a[:, 0]
        if a.ndim != 1 or a.dtype.kind not in "iuf":
            return None
        if a.dtype.kind == "f" and not (np.isfinite(a).all() and (a == np.round(a)).all()):
            return None
        out.append(a.astype(np.int64))
    return out


def _meshio_tags(m, cell_type, side_type, dim):
    """Region and boundary tags of a meshio mesh: the first integer cell-data array in the
    file's order (one value per cell of every block), names from its field data.

    Returns the keyword arguments of :meth:`Mesh.with_tags` (without the check that the
    sides are on the boundary: :func:`read_mesh` keeps the boundary ones), or None.
    """
    found = [(k, v) for k, v in ((k, _integer_tags(a) if len(a) == len(m.cells) else None)
                                 for k, a in m.cell_data.items()) if v is not None]
    if not found:
        return None
    key, values = found[0]
    cells = [v for v, c in zip(values, m.cells, strict=True) if c.type == cell_type]
    sides = [(np.asarray(c.data), v) for v, c in zip(values, m.cells, strict=True) if c.type == side_type]
    out = {"regions": np.concatenate(cells), "tag_key": key}
    if sides:
        out["sides"] = np.concatenate([s for s, _ in sides])
        out["side_tags"] = np.concatenate([v for _, v in sides])
    names = {dim: {}, dim - 1: {}}
    for name, value in (getattr(m, "field_data", None) or {}).items():
        v = np.asarray(value).ravel()
        if v.size == 2 and v.dtype.kind in "iu" and int(v[1]) in names:
            names[int(v[1])][str(name)] = int(v[0])
    if names[dim]:
        out["region_names"] = names[dim]
    if names[dim - 1]:
        out["side_names"] = names[dim - 1]
    return out


class MeshArrays(NamedTuple):
    """What a mesh file holds, read but not yet checked: points, cells and the tags
    (keyword arguments of :meth:`Mesh.with_tags`, or None)."""

    points: np.ndarray
    cells: np.ndarray
    tags: dict | None


def read_mesh_file(path):
    """The :class:`MeshArrays` of a mesh file (formats as in :func:`read_mesh_arrays`)."""
    path = os.fspath(path)
    if not os.path.exists(path):
        raise InputError(f"mesh file {path} not found")
    if os.path.isdir(path):
        raise InputError(f"mesh file {path} is a directory")
    if path.lower().endswith(".npz"):
        return _read_npz_mesh(path)
    return _read_meshio_mesh(path)


def read_mesh_arrays(path):
    """The ``points`` and ``triangles`` arrays of a mesh file, read but not yet checked.

    ``.npz``: arrays ``points`` and ``triangles`` (or ``tetrahedra``).  Any other extension is
    handed to meshio (if installed): its tetrahedra when it has any (a 3-D
    mesh; triangle, line and vertex cells ignored), else its triangle cells
    (line and vertex cells ignored, a z coordinate dropped when it is constant).
    Raises :class:`InputError` when the file is missing, unreadable or lacks
    the arrays.  :func:`read_mesh` also builds and checks the :class:`Mesh`
    (and keeps the file's tags, which this function leaves out).
    """
    points, cells, _ = read_mesh_file(path)
    return points, cells


def mesh_from_arrays(points, triangles, path, tags=None):
    """The checked :class:`Mesh` of arrays read from ``path`` (named in errors and warnings),
    with ``tags`` (as :attr:`MeshArrays.tags`) when given."""
    where = f"mesh file {os.fspath(path)}"
    mesh = _mesh_from_arrays(points, triangles, where)
    if not tags:
        return mesh
    tags = dict(tags)
    from_file = tags.pop("tag_key", None)
    if from_file is not None and "sides" in tags:
        # a mesher's file may tag interior lines or faces too (interfaces): keep the
        # boundary ones, which are all that boundary conditions can name
        keep = boundary_rows(mesh, tags["sides"])
        tags["sides"], tags["side_tags"] = tags["sides"][keep], tags["side_tags"][keep]
    try:
        return mesh.with_tags(**tags)
    except MeshError as exc:
        raise MeshError(f"{where}: {exc}") from None


def read_mesh(path):
    """Read a :class:`Mesh` from ``path``, with its region and boundary tags.

    Formats as in :func:`read_mesh_arrays`.  Tags: an ``.npz`` archive's arrays
    ``regions`` (one integer per cell), ``sides`` and ``side_tags`` (tagged boundary
    sides), ``region_names`` and ``side_names`` (JSON objects of name -> tag; see
    :func:`write_mesh`); from meshio, the first integer cell-data array of the
    file (one value per cell and per side), with names from its field data
    (``{name: [tag, dimension]}``).  Tagged sides inside the mesh (interfaces)
    are dropped: only boundary sides carry conditions.

    Raises
    ------
    InputError
        The file is missing, unreadable, or lacks the arrays.
    MeshError
        The arrays do not make a valid mesh; the message starts with the file
        name and names the point, cell or side.
    """
    points, cells, tags = read_mesh_file(path)
    return mesh_from_arrays(points, cells, path, tags)


def write_mesh(path, mesh):
    """Write a mesh and its tags to an ``.npz`` archive, atomically; return ``path``.

    Arrays: ``points``, ``triangles`` or ``tetrahedra``, and when the mesh has
    tags ``regions``, ``sides``, ``side_tags``, ``region_names`` and ``side_names``
    (names as JSON strings).  :func:`read_mesh` reads it back with the tags.

    >>> import os, tempfile, hatkernels
    >>> from hatkernels.mesh.tags import label_cells
    >>> m = label_cells(hatkernels.mesh.rectangle(2, 1), {"a": lambda x, y: x < 0.5,
    ...                                                  "b": lambda x, y: x >= 0.5})
    >>> path = write_mesh(os.path.join(tempfile.mkdtemp(), "m.npz"), m)
    >>> read_mesh(path).regions.tolist(), dict(read_mesh(path).tags.region_names)
    ([1, 1, 2, 2], {'a': 1, 'b': 2})
    """
    arrays = {"points": mesh.points, _CELL_KEY[mesh.dim]: mesh.cells}
    t = mesh.tags
    if t is not None:
        if t.regions is not None:
            arrays["regions"] = t.regions
        arrays["sides"], arrays["side_tags"] = t.sides, t.side_tags
        arrays["region_names"] = np.array(json.dumps(dict(t.region_names)))
        arrays["side_names"] = np.array(json.dumps(dict(t.side_names)))
    with atomic_file(path) as tmp, open(tmp, "wb") as f:
        np.savez_compressed(f, **arrays)
    return path
