"""A time series on disk: one VTU file per output time and a VTK collection (``.pvd``).

:func:`write_series` writes a directory holding ``series.pvd`` (the VTK XML
collection format: one ``DataSet`` element per time, with its ``timestep``
and file), the unstructured-grid files it names (``u_000000.vtu``, ...,
through :func:`hatkernels.io.write_vtu`, which needs meshio) and
``summary.json`` (the times, the figures of the solve and the caution).
Viewers that read VTK collections open ``series.pvd`` and step through the
times.  The directory is written whole or not at all
(:func:`hatkernels.io.output_directory`: a temporary directory renamed into
place), and ``force=True`` replaces only an earlier output of hatkernels.
"""

from __future__ import annotations

import os
from importlib import metadata
from xml.sax.saxutils import quoteattr

import numpy as np

from hatkernels.errors import InputError
from hatkernels.io import output_directory, write_json, write_vtu
from hatkernels.results import CAUTION

__all__ = ["write_series"]

COLLECTION = "series.pvd"


def _version():
    try:
        return metadata.version("hatkernels")
    except metadata.PackageNotFoundError:  # pragma: no cover - run from a source tree
        return "unknown"


def _collection(entries):
    """The text of a VTK XML collection of ``(time, file name)`` entries."""
    lines = ['<?xml version="1.0"?>',
             '<VTKFile type="Collection" version="0.1" byte_order="LittleEndian">',
             "  <Collection>"]
    for t, name in entries:
        lines.append(f'    <DataSet timestep={quoteattr(repr(float(t)))} group="" part="0" '
                     f"file={quoteattr(name)}/>")
    lines += ["  </Collection>", "</VTKFile>", ""]
    return "\n".join(lines)


def write_series(path, solution, *, name="u", force=False):
    """Write ``solution`` (a :class:`~hatkernels.transient.TransientSolution`) as a time series.

    Parameters
    ----------
    path : str or path
        The directory to create; it receives ``series.pvd``, one ``.vtu`` file per
        output time and ``summary.json``.
    solution : TransientSolution
    name : str
        The name of the point array in each file (and the prefix of the files).
    force : bool
        Replace ``path`` if it holds an earlier hatkernels output.

    Returns
    -------
    str
        The path of ``series.pvd``.

    Raises
    ------
    InputError
        meshio is not installed, ``name`` is not an identifier, ``path`` exists
        (without ``force``), or its parent directory is missing.

    Examples
    --------
    >>> import os, tempfile, hatkernels
    >>> from hatkernels.transient import solve_transient
    >>> from hatkernels.transient_files import write_series
    >>> sol = solve_transient(hatkernels.mesh.rectangle(4, 4), 1.0, [0.0, 0.1], dt=0.05)
    >>> d = tempfile.mkdtemp()
    >>> pvd = write_series(os.path.join(d, "cooling"), sol)
    >>> sorted(os.listdir(os.path.join(d, "cooling")))
    ['series.pvd', 'summary.json', 'u_000000.vtu', 'u_000001.vtu']
    >>> import shutil; shutil.rmtree(d)
    """
    if not isinstance(name, str) or not name.isidentifier():
        raise InputError(f"name must be an identifier, got {name!r}")
    mesh = solution.mesh
    entries = []
    with output_directory(path, force=force) as tmp:
        for k, t in enumerate(solution.times):
            file = f"{name}_{k:06d}.vtu"
            write_vtu(os.path.join(tmp, file), mesh, {name: np.asarray(solution.u[k])})
            entries.append((float(t), file))
        with open(os.path.join(tmp, COLLECTION), "w", encoding="utf-8") as f:
            f.write(_collection(entries))
        write_json(os.path.join(tmp, "summary.json"), {
            "generator": f"hatkernels {_version()}",
            "kind": "transient time series",
            "caution": CAUTION,
            "collection": COLLECTION,
            "times": [t for t, _ in entries],
            "files": [f for _, f in entries],
            "field": name,
            "points": int(mesh.n_points),
            "cells": int(mesh.n_cells),
            "stats": solution.stats.summary(),
        })
    return os.path.join(os.path.abspath(os.fspath(path)), COLLECTION)
