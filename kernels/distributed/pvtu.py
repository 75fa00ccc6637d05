"""Each rank writes its part of a distributed solution: VTU pieces and the parallel VTU index.

The output is a directory holding ``piece-0000.vtu`` ... (one per rank, each
the rank's own cells with their points, written by meshio) and
``solution.pvtu``, the index file of the VTK XML format (``PUnstructuredGrid``)
that lists the pieces and their arrays; any VTK-based viewer opens the index
and shows the whole mesh.  The directory is written whole or not at all: rank
0 makes a temporary directory next to the target, every rank writes into it,
and rank 0 renames it into place only when every rank succeeded
(:func:`hatkernels.io.output_directory`).  No rank ever holds the whole mesh.

>>> print(pvtu_index(["piece-0000.vtu"], {"u": "Float64"}, {"region": "Int32"}))
... # doctest: +NORMALIZE_WHITESPACE
<?xml version="1.0"?>
<VTKFile type="PUnstructuredGrid" version="0.1" byte_order="LittleEndian">
<PUnstructuredGrid GhostLevel="0">
<PPoints>
<PDataArray type="Float64" Name="Points" NumberOfComponents="3"/>
</PPoints>
<PPointData>
<PDataArray type="Float64" Name="u"/>
</PPointData>
<PCellData>
<PDataArray type="Int32" Name="region"/>
</PCellData>
<Piece Source="piece-0000.vtu"/>
</PUnstructuredGrid>
</VTKFile>
"""

from __future__ import annotations

import os
from xml.sax.saxutils import quoteattr

import numpy as np

from hatkernels.errors import InputError

__all__ = ["pvtu_index", "write_pvtu"]

#: VTK XML type names of the numpy dtypes the pieces use.
_VTK_TYPES = {"float64": "Float64", "float32": "Float32", "int32": "Int32", "int64": "Int64"}


def pvtu_index(pieces, point_types, cell_types):
    """The text of a ``.pvtu`` index listing ``pieces`` (file names) with the given point and
    cell arrays (name -> VTK type name)."""
    lines = ['<?xml version="1.0"?>',
             '<VTKFile type="PUnstructuredGrid" version="0.1" byte_order="LittleEndian">',
             '<PUnstructuredGrid GhostLevel="0">', "<PPoints>",
             '<PDataArray type="Float64" Name="Points" NumberOfComponents="3"/>', "</PPoints>"]
    for tag, arrays in (("PPointData", point_types), ("PCellData", cell_types)):
        lines.append(f"<{tag}>")
        lines += [f"<PDataArray type={quoteattr(t)} Name={quoteattr(n)}/>"
                  for n, t in arrays.items()]
        lines.append(f"</{tag}>")
    lines += [f"<Piece Source={quoteattr(p)}/>" for p in pieces]
    lines += ["</PUnstructuredGrid>", "</VTKFile>"]
    return "\n".join(lines) + "\n"


def _types(arrays):
    out = {}
    for name, a in arrays.items():
        t = _VTK_TYPES.get(np.asarray(a).dtype.name)
        if t is None:
            raise InputError(f"array {name!r} has dtype {np.asarray(a).dtype}; pieces take "
                             f"{', '.join(_VTK_TYPES)}")
        out[name] = t
    return out


def write_pvtu(path, solution, *, comm=None, force=False):
    """Write ``solution`` (a :class:`~hatkernels.distributed.DistributedPoissonSolution` of the
    partitioned path, which carries each rank's piece) as VTU pieces plus ``solution.pvtu``
    in the directory ``path``; collective; returns the index file's path.

    Point data: ``u``; cell data: ``region`` when the mesh has region tags.  Raises
    InputError on every rank when a rank has no piece (a solve of the replicated
    path: gather it and use :func:`hatkernels.io.write_vtu`) or the output exists
    without ``force``.
    """
    from hatkernels.distributed.launch import as_comm
    from hatkernels.distributed.outcome import _together
    from hatkernels.io import output_directory, write_vtu

    comm = as_comm(comm)
    rank, size = comm.Get_rank(), comm.Get_size()

    def check():
        if getattr(solution, "piece", None) is None:
            raise InputError("write_pvtu needs a solution of the partitioned path "
                             "(distributed.solve_poisson with refine=k and gmg)")
        if solution.size != size:
            raise InputError(f"the solution was computed on {solution.size} ranks, the "
                             f"communicator has {size}")

    _together(comm, "write_pvtu", check)
    mesh, point_data, cell_data = solution.piece
    name = f"piece-{rank:04d}.vtu"
    created, context = None, None
    if rank == 0:
        try:
            context = output_directory(os.fspath(path), force=force)
            tmp = context.__enter__()
        except Exception as exc:  # told to every rank below
            created = exc
            tmp = None
    tmp, why = comm.bcast((tmp, None if created is None else str(created)) if rank == 0
                          else None, root=0)
    if tmp is None:
        if rank == 0:
            raise created
        raise InputError(why)
    failure = None
    try:
        write_vtu(os.path.join(tmp, name), mesh, point_data, cell_data)
    except Exception as exc:  # agreed on below, so that no rank waits
        failure = exc
    notes = comm.allgather(None if failure is None else f"{type(failure).__name__}: {failure}")
    bad = [(r, n) for r, n in enumerate(notes) if n is not None]
    err = None
    if bad:
        err = failure or InputError(f"writing the pieces failed on rank {bad[0][0]}: "
                                    f"{bad[0][1]}")
    if rank == 0:
        if err is None:
            try:
                index = pvtu_index([f"piece-{r:04d}.vtu" for r in range(size)],
                                   _types(point_data), _types(cell_data))
                with open(os.path.join(tmp, "solution.pvtu"), "w") as fh:
                    fh.write(index)
            except Exception as exc:
                err = exc
        if err is None:
            context.__exit__(None, None, None)  # renamed into place: complete
        else:
            context.__exit__(type(err), err, None)  # removed: nothing written
    done = comm.bcast(err is None if rank == 0 else None, root=0)
    if err is not None:
        raise err
    if not done:
        raise InputError("rank 0 could not finish the output directory")
    return os.path.join(os.fspath(path), "solution.pvtu")
