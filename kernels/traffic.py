"""Bytes an assembly must move: the floors that ``bench/`` and ``hatkernels bench`` judge times by.

A floor is the least traffic a result needs (read the mesh, write the
matrix); divided by the memory bandwidth measured in the same run it gives
the least time any implementation could take (docs/architecture.md, the
performance model).  Both the benchmark suite and the command compute it
here, so that their figures stay comparable.
"""

from __future__ import annotations

__all__ = ["assembly_floors"]

#: Bytes of one triangle's element values as the csr numeric phase stores them: 3 diagonal
#: and 3 off-diagonal float64 entries of its symmetric 3 x 3 matrix.
_ELEMENT_VALUES = 48


def assembly_floors(mesh, plan):
    """Bytes moved by the assembly of ``mesh`` into the CSR pattern ``plan``.

    Parameters
    ----------
    mesh : Mesh
        Its ``points`` and ``cells`` (triangles or tetrahedra) arrays are read once.
    plan : object
        The symbolic phase (``StiffnessAssembler(mesh).plan``; on tetrahedra
        its ``.plan``), or anything with ``nnz`` and the ``indices`` array of
        the pattern.

    Returns
    -------
    dict
        ``"first"``: a first call, which writes the whole matrix (data,
        indices, indptr); ``"numeric"``: a re-assembly, which writes the values
        only; ``"csr_data"``: the csr numeric phase as written (element values
        out and back, incidences and slots, the output values), a model of
        that implementation rather than a floor (triangles only).

    Examples
    --------
    >>> from hatkernels import StiffnessAssembler
    >>> from hatkernels.mesh import rectangle
    >>> mesh = rectangle(2, 2)
    >>> plan = StiffnessAssembler(mesh).plan
    >>> f = assembly_floors(mesh, plan)
    >>> f["first"] - f["numeric"] == plan.indices.itemsize * (plan.nnz + mesh.n_points + 1)
    True
    """
    n, m, nnz = mesh.n_points, mesh.n_cells, int(plan.nnz)
    index = plan.indices.dtype.itemsize
    mesh_bytes = mesh.cells.nbytes + mesh.points.nbytes
    floors = {
        "first": mesh_bytes + (8 + index) * nnz + index * (n + 1),
        "numeric": mesh_bytes + 8 * nnz,
    }
    if mesh.dim == 2:  # the model of the triangles' numeric phase
        floors["csr_data"] = mesh_bytes + m * (2 * _ELEMENT_VALUES + 6 * 3 * index) + 8 * nnz
    return floors
