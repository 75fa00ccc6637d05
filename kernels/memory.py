"""How much memory a solve will take, checked before it allocates.

A problem whose mesh fits but whose solve does not used to run for a while
and then die of ``MemoryError`` in the middle of a phase (or be killed by the
operating system with no message at all).  :func:`check_solve_memory`
estimates the peak from per-point figures the benchmark suite measured and
refuses, with the estimate and what is available, before anything large is
allocated.

The figures are whole-solve peaks beyond the mesh, per point, on 2-D meshes
with int32 indices at about 10^6 unknowns (``peak B/point`` in
docs/performance.md); each preconditioner class carries its own as
``solve_bytes_per_point``.  Beyond 2^31 incidences the indices are int64 and
the index part of every array doubles: the estimate then grows by half.

On tetrahedra a point has about 15 matrix entries instead of 7: measured on
``cuboid(10, 10, 10)`` refined three times (531,441 points, int32), the
assembled pipelines peak at 942 to 967 bytes per point beyond the mesh
(amg-native, amg-sa, ic0 and jacobi alike: the assembly's peak dominates)
and gmg at 241 (1.5 times its 2-D 160).  The 3-D estimate is therefore
``max(1.5 x the 2-D figure, THREE_D_ASSEMBLED)`` for a preconditioner that
needs the matrix and 1.5 x the 2-D figure for a matrix-free one; a sparse
direct factorisation fills in far more in 3-D (SuperLU on 103,823 unknowns:
2.5e8 entries, about 29,000 bytes per point, growing with the size): a
preconditioner whose 3-D figure does not follow its 2-D one states it as
``solve_bytes_per_point_3d``.

Refining a mesh ``k`` times (``solve_poisson(..., refine=k)`` on the stored
mesh, the march and the modes likewise, the command's ``--refine``, a patch
solution's ``mesh``, and the distributed solve's replicated path, where every
rank on a node builds the meshes) is checked the same way before the first
refinement: :func:`check_refine_memory` against a peak measured per cell of
the finest mesh (:data:`REFINE_BYTES_PER_CELL`).  A refinement of 1e9
triangles needs about 110 GiB that way; the patch path solves it in 24.
"""

from __future__ import annotations

import os
import resource

from hatkernels.errors import InputError
from hatkernels.precond import PRECONDITIONERS, SparseDirect, capabilities

__all__ = ["available_bytes", "solve_bytes", "check_solve_memory", "transient_bytes",
           "check_transient_memory", "eigen_bytes", "check_eigen_memory", "refine_bytes",
           "check_refine_memory"]

#: A registered preconditioner that states no figure (a user's): the plain
#: assembled pipeline's (matrix, CG vectors, right-hand side), as a floor.
UNKNOWN_BYTES_PER_POINT = 400

#: Tetrahedra: the floor of an assembled pipeline's peak per point (see the
#: module docstring).
THREE_D_ASSEMBLED = 950

#: What a march (hatkernels.solve_transient) holds beyond a steady solve's peak, per
#: point: the mass matrix and ``dt K`` (values sharing the stiffness's indices), a few
#: more vectors, the start spaces' eight per kept system (64 bytes each, up to two
#: systems) and the first-tried smoother's inverse diagonal and work vector (16 bytes per
#: system).  Measured with amg and one system: 871 to 885 bytes per point against the
#: steady solve's 640 (docs/transient.md), 945 with the smoother.  The outputs come on
#: top (8 bytes per point each).
TRANSIENT_EXTRA = 360

#: lobpcg (hatkernels.eigenmodes) per point: the assembled K and M and the multigrid, and
#: per vector of its block (``m``, the modes asked for and a few more) the block's eleven
#: buffers (88 bytes, hatkernels.eigenblock).  The measured peak beyond the mesh at
#: 1,046,529 unknowns, ``m = 13``: 1,873 MiB, about 1,880 bytes per point
#: (docs/eigenmodes.md); the figures leave about 9 % above it: 750 + 100 m.
EIGEN_BASE, EIGEN_PER_VECTOR = 750, 100

#: Refining a mesh ``k`` times (``Mesh.refine`` repeated: every coarser level stays
#: referenced by the finer one's ``refinement``), peak bytes per cell of the finest
#: mesh, by dimension and by index width (int64 once the finest mesh's incidences pass
#: 2^31).  Measured in fresh processes, the peak over the start (2026-12-04):
#: ``rectangle(125, 125)`` refined 4 and 5 times, 65 and 59 bytes per triangle (int32),
#: 4 times with int64 forced 110; ``cuboid(10, 10, 10)`` refined 4 times and
#: ``cuboid(20, 20, 20)`` 3 times, 52 bytes per tetrahedron (int32), 77 with int64.
REFINE_BYTES_PER_CELL = {(2, False): 70, (2, True): 115, (3, False): 58, (3, True): 85}
#: The estimate's margin: measured peaks vary by a few per cent between runs
#: and meshes; refuse only when the estimate clearly does not fit.
MARGIN = 1.1
_INT32_MAX = 2**31 - 1


def _meminfo_available():
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def _address_space_left():
    soft, _ = resource.getrlimit(resource.RLIMIT_AS)
    if soft == resource.RLIM_INFINITY:
        return None
    try:
        with open("/proc/self/statm") as f:
            size = int(f.read().split()[0]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError):
        return None
    return max(soft - size, 0)


def available_bytes():
    """Memory this process can still take: the smaller of the system's available
    memory (``MemAvailable``) and what its address-space limit leaves; None when
    neither can be read (then nothing is refused)."""
    found = [v for v in (_meminfo_available(), _address_space_left()) if v is not None]
    return min(found) if found else None


#: How much a classical AMG's second splitting pass (``second_pass=True``) may grow the
#: estimate: the hierarchy of a 1e6-point jittered Delaunay mesh grew 1.6 times, of a
#: ball of tetrahedra 2.2 times (docs/solvers.md).
SECOND_PASS_FACTOR = 2.2


def solve_bytes(mesh, preconditioner, options=None):
    """Estimated peak bytes of a ``solve_poisson`` on ``mesh`` beyond the mesh itself
    (``options``: the preconditioner's, when they change the figure)."""
    per_point = UNKNOWN_BYTES_PER_POINT
    needs_matrix, stated_3d = True, 0
    if isinstance(preconditioner, str) and preconditioner in PRECONDITIONERS:
        caps = capabilities(preconditioner)
        per_point = caps.solve_bytes_per_point or per_point
        needs_matrix = caps.needs_matrix and not caps.prefers_matrix_free
        stated_3d = caps.solve_bytes_per_point_3d
    if mesh.dim == 3:
        per_point = stated_3d or 1.5 * per_point
        if needs_matrix and not stated_3d:
            per_point = max(per_point, THREE_D_ASSEMBLED)
    if options and options.get("second_pass") is True:
        per_point *= SECOND_PASS_FACTOR
    wide = mesh.cells.size >= 2**31 or mesh.cells.dtype.itemsize > 4
    return int(mesh.n_points * per_point * (1.5 if wide else 1.0))


def check_solve_memory(mesh, preconditioner, *, share=1.0, options=None):
    """Refuse (InputError) a solve whose estimated peak does not fit in what is available.

    ``share``: the part of the solve this process holds (over MPI, the ranks on
    this node over all ranks: they share the node's memory); ``options``: the
    preconditioner's (:func:`solve_bytes`).
    """
    _refuse_short(int(solve_bytes(mesh, preconditioner, options) * share), "solving", mesh,
                  preconditioner)


def transient_bytes(mesh, preconditioner, n_outputs):
    """Estimated peak bytes of a ``solve_transient`` on ``mesh`` beyond the mesh itself,
    keeping ``n_outputs`` fields.  A march always assembles its matrices, so a
    matrix-free preconditioner's smaller steady figure does not apply."""
    assembled = mesh.n_points * UNKNOWN_BYTES_PER_POINT
    steady = max(solve_bytes(mesh, preconditioner), assembled)
    return int(steady + mesh.n_points * (TRANSIENT_EXTRA + 8 * n_outputs))


def check_transient_memory(mesh, preconditioner, n_outputs):
    """Refuse (InputError) a march whose estimated peak does not fit in what is available."""
    _refuse_short(transient_bytes(mesh, preconditioner, n_outputs),
                  f"marching ({n_outputs} output times)", mesh, preconditioner)


def eigen_bytes(mesh, method, m):
    """Estimated peak bytes of ``eigenmodes`` on ``mesh`` beyond the mesh itself, with a block
    of ``m`` vectors: shift-invert's sparse factorisation (the sparse direct figures, far
    larger on tetrahedra), or lobpcg's :data:`EIGEN_BASE` + :data:`EIGEN_PER_VECTOR` m per
    point (half as much again on tetrahedra)."""
    if method == "shift-invert":
        return solve_bytes(mesh, SparseDirect.name)
    per_point = EIGEN_BASE + EIGEN_PER_VECTOR * m
    return int(mesh.n_points * per_point * (1.5 if mesh.dim == 3 else 1.0))


def check_eigen_memory(mesh, method, m):
    """Refuse (InputError) an eigenmodes call whose estimated peak does not fit."""
    _refuse_short(eigen_bytes(mesh, method, m), f"finding modes by {method}", mesh,
                  "shift-invert's factorisation" if method == "shift-invert" else "lobpcg")


def refine_bytes(mesh, times):
    """``(cells, bytes)``: the cells of ``mesh`` refined ``times`` times (each cell into
    4 triangles or 8 tetrahedra per refinement) and the estimated peak bytes of building
    that chain of meshes (:data:`REFINE_BYTES_PER_CELL`)."""
    cells = mesh.n_cells * (2**mesh.dim) ** int(times)
    wide = (mesh.dim + 1) * cells > _INT32_MAX
    return cells, int(cells * REFINE_BYTES_PER_CELL[(mesh.dim, wide)])


def check_refine_memory(mesh, times, advice, copies=1):
    """Refuse (InputError) to refine ``mesh`` ``times`` times when the refined meshes would
    not fit in what is available; ``advice`` says what to do instead; ``copies``: the
    processes on this machine that each build them (MPI ranks on one node)."""
    cells, need = refine_bytes(mesh, times)
    need *= int(copies)
    have = available_bytes()
    if have is not None and need * MARGIN > have:
        words = "triangles" if mesh.dim == 2 else "tetrahedra"
        each = f", {int(copies)} ranks on this node building them each" if copies > 1 else ""
        raise InputError(
            f"not enough memory: refining the mesh ({mesh.n_cells:,} {words}) {int(times)} "
            f"times gives {cells:,} {words}, whose meshes need about {need / 2**30:.1f} GiB "
            f"(measured per cell{each}), but {have / 2**30:.1f} GiB are available; {advice}")


def _refuse_short(need, doing, mesh, preconditioner):
    have = available_bytes()
    if have is not None and need * MARGIN > have:
        name = preconditioner if isinstance(preconditioner, str) else "the given preconditioner"
        raise InputError(
            f"not enough memory: {doing} on {mesh.n_points:,} points with {name} needs about "
            f"{need / 2**30:.1f} GiB beyond the mesh (measured per point), but "
            f"{have / 2**30:.1f} GiB are available; use a smaller mesh, a preconditioner "
            f"that needs less (see docs/performance.md), or pass memory_check=False "
            f"(--no-memory-check) to try anyway")
