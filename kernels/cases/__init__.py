"""Problem files shipped with hatkernels, and how their meshes were made.

``heated-insert.toml`` with ``heated-insert.npz`` (``hatkernels solve --scenario
heated-insert``): invented demonstration data, not a product or a measured
part.  The cross-section of a long aluminium plate, 100 mm x 20 mm, with a
stainless steel insert 20 mm x 10 mm that carries a resistive heater; the
bottom face rests on a cold clamp from x = 0 to 25 mm, the top face gives heat
to the air, the rest is insulated.  The mesh was written by
``write_mesh("heated-insert.npz", heated_insert_mesh())``
(:func:`hatkernels.io.write_mesh`); its coordinates are in millimetres (the
problem file says ``length_unit = "mm"``).  Copy both files to start a
problem of your own (:func:`hatkernels.problemfile.case_file` gives the path).

``heated-insert-warmup.toml`` (``hatkernels solve --scenario heated-insert-warmup``):
the same part and mesh in time, with a ``[time]`` table: from 20 degC everywhere,
the heater switched on at t = 0, 10 minutes in steps of 5 s, three probes.
"""

from __future__ import annotations

from hatkernels.mesh.generators import rectangle
from hatkernels.mesh.tags import label_cells, label_sides

__all__ = ["heated_insert_mesh"]


def _in_insert(x, y):
    return (x > 60) & (x < 80) & (y > 5) & (y < 15)


def heated_insert_mesh():
    """The mesh of ``heated-insert.npz``: 0.5 mm squares over 100 mm x 20 mm (in mm), regions
    ``plate`` (1) and ``insert`` (2), boundary tags ``clamp`` (1: the bottom face for
    x < 25 mm), ``top`` (2), ``bottom`` (3: the rest of the bottom face) and ``ends`` (4).

    The insert's sides lie on mesh lines, so each cell is wholly in one material.

    >>> m = heated_insert_mesh()
    >>> m.n_cells, dict(m.tags.region_names), dict(m.tags.side_names)
    (16000, {'plate': 1, 'insert': 2}, {'clamp': 1, 'top': 2, 'bottom': 3, 'ends': 4})
    """
    mesh = rectangle(200, 40, bounds=(0.0, 100.0, 0.0, 20.0))
    mesh = label_cells(mesh, {"plate": lambda x, y: ~_in_insert(x, y), "insert": _in_insert})
    return label_sides(mesh, {"clamp": lambda x, y: (y == 0) & (x < 25),
                              "top": lambda x, y: y == 20,
                              "bottom": lambda x, y: y == 0,
                              "ends": lambda x, y: (x == 0) | (x == 100)})
