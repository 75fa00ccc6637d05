"""Checks of the scattered input path under MPI: run as ``mpiexec -n P python tests/mpi_scatter_checks.py``.

``distributed.solve_poisson(mesh)`` on rank 0 and ``solve_poisson(None)`` on
the other ranks: rank 0 parses, partitions and sends each rank its part.
tests/test_distributed_scatter.py runs this script with 1, 2 and 3 ranks under
a timeout.  A failure on any rank aborts every rank (mpi_checks' hook), so no
rank is left waiting in a collective call; rank 0 prints
``mpi_scatter_checks: all N checks passed on P ranks`` at the end.

References: scipy's direct solver (``scipy.sparse.linalg.spsolve``) on the
serially assembled system, and P1's exactness on linear solutions; each named
beside its check.  The meshes are unstructured (jittered grids built with
``Mesh(points, cells)``), not refinements.  Nothing runs on import.
"""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import mpi_checks  # noqa: E402

CHECKS = []


def check(fn):
    CHECKS.append(fn)
    return fn


def jittered(mesh, amount, seed):
    """``Mesh(points, cells)`` of ``mesh`` with its interior points moved at random by up
    to ``amount`` times the smallest side length in each coordinate; every cell keeps its
    orientation (asserted), so the result is a valid unstructured mesh, not a refinement."""
    import numpy as np

    import hatkernels

    p = mesh.points.copy()
    cells = mesh.cells
    h = min(np.linalg.norm(p[cells[:, i]] - p[cells[:, 0]], axis=1).min()
            for i in range(1, cells.shape[1]))
    inner = np.setdiff1d(np.arange(mesh.n_points), mesh.boundary_points())
    rng = np.random.default_rng(seed)
    p[inner] += rng.uniform(-amount * h, amount * h, size=(inner.size, mesh.dim))

    def signed(points):
        e = points[cells[:, 1:]] - points[cells[:, :1]]
        return np.linalg.det(e)

    assert (np.sign(signed(p)) == np.sign(signed(mesh.points))).all()
    return hatkernels.Mesh(p, cells)


def tagged_square(n=24, seed=5):
    """A jittered unit square with two materials (x < 0.5 and not) and tagged sides."""
    from hatkernels.mesh import rectangle
    from hatkernels.mesh.tags import label_cells, label_sides

    m = jittered(rectangle(n, n), 0.15, seed)
    m = label_cells(m, {"a": lambda x, y: x < 0.5, "b": lambda x, y: x >= 0.5})
    return label_sides(m, {"left": lambda x, y: x == 0, "right": lambda x, y: x == 1,
                           "top": lambda x, y: y == 1})


def tagged_data():
    """Data by region and by boundary tag, with callables that cannot be pickled."""
    return dict(coefficient={"a": 1.0, "b": 8.0}, reaction={"b": lambda x, y: 1 + x},
                dirichlet={"left": lambda x, y: 1 + y, "top": 0.5},
                robin={"right": (2.0, lambda x, y: y)})


def _source(x, y):
    import numpy as np

    return 1 + np.sin(3 * x) * y


def _scipy_reference(comm, mesh, f, **data):
    """scipy's spsolve of the serially assembled, reduced system, on rank 0 (broadcast)."""
    u = None
    if comm.Get_rank() == 0:
        import scipy.sparse.linalg as spla

        from hatkernels.discretise import discretise
        from hatkernels.problem import PoissonProblem

        system = discretise(PoissonProblem(mesh, f, **data))
        u = system.expand(spla.spsolve(system.A.tocsc(), system.b))
    mpi_checks._wait_politely(comm)
    return comm.bcast(u)


def _mine(comm, mesh):
    """The mesh on rank 0, None elsewhere: the scattered input."""
    return mesh if comm.Get_rank() == 0 else None


@check
def scattered_equals_scipy_and_the_replicated_path(comm):
    import numpy as np

    from hatkernels.distributed import solve_poisson

    mesh = tagged_square()
    data = tagged_data()
    # reference library: scipy (spsolve of the serially assembled system, direct)
    ref = _scipy_reference(comm, mesh, _source, **data)
    for coarse in (None, "constants"):
        sc = solve_poisson(_mine(comm, mesh), _source, comm=comm, coarse=coarse, rtol=1e-12,
                           check=True, **data)
        assert np.abs(sc.u - ref).max() <= 1e-8 * np.abs(ref).max(), coarse
        rep = solve_poisson(mesh, _source, comm=comm, coarse=coarse, rtol=1e-12, **data)
        # the same split, rows and preconditioner: the same iterations (and values)
        assert sc.stats.iterations == rep.stats.iterations, (coarse, sc.stats.iterations,
                                                            rep.stats.iterations)
        assert np.abs(sc.u - rep.u).max() <= 1e-12 * np.abs(ref).max()
        expect = "scattered" if comm.Get_size() > 1 else "replicated"
        assert sc.stats.distribution.path == expect, sc.stats.distribution.path
        assert sc.stats.unknowns == rep.stats.unknowns
        assert sc.stats.dirichlet_points == rep.stats.dirichlet_points
        assert sc.stats.distribution.partition == rep.stats.distribution.partition


@check
def other_ranks_data_are_ignored(comm):
    import numpy as np

    from hatkernels.distributed import solve_poisson

    mesh = tagged_square(16, seed=8)
    ref = _scipy_reference(comm, mesh, 2.0, dirichlet_on="left", neumann={"right": 1.0})
    if comm.Get_rank() == 0:
        sol = solve_poisson(mesh, 2.0, comm=comm, dirichlet_on="left",
                            neumann={"right": 1.0}, rtol=1e-12)
    else:  # nonsense that would be refused if it were read
        sol = solve_poisson(None, "no such load", comm=comm, dirichlet_on="nowhere",
                            neumann=object(), coefficient=-1.0, rtol=1e-12)
    # reference library: scipy (spsolve of the serially assembled system, direct)
    assert np.abs(sol.u - ref).max() <= 1e-8 * np.abs(ref).max()


@check
def tetrahedra_reproduce_a_linear_solution(comm):
    import numpy as np

    from hatkernels.distributed import solve_poisson
    from hatkernels.mesh import cuboid

    mesh = jittered(cuboid(5, 5, 5), 0.1, seed=2)
    x, y, z = mesh.points.T
    exact = 1 + x - 2 * y + 3 * z
    sol = solve_poisson(_mine(comm, mesh), 0.0, comm=comm, rtol=1e-12, coarse="constants",
                        dirichlet=lambda x, y, z: 1 + x - 2 * y + 3 * z, check=True)
    # P1 elements reproduce a linear solution exactly at the points (the patch test;
    # common practice, no source): only the solver's tolerance and round-off remain
    assert np.abs(sol.u - exact).max() <= 1e-9 * np.abs(exact).max()
    # and with a load and a reaction, scipy's direct solve of the serial system
    # (reference library: scipy)
    data = dict(reaction=2.0, coefficient=lambda x, y, z: 1 + x * z)
    ref = _scipy_reference(comm, mesh, 1.0, **data)
    sol = solve_poisson(_mine(comm, mesh), 1.0, comm=comm, rtol=1e-12, check=True, **data)
    assert np.abs(sol.u - ref).max() <= 1e-8 * np.abs(ref).max()


@check
def other_ranks_never_hold_the_mesh(comm):
    import numpy as np

    from hatkernels.distributed import solve_poisson
    from hatkernels.mesh.core import Mesh

    mesh = tagged_square(20, seed=3)
    rank, size = comm.Get_rank(), comm.Get_size()
    built = []
    original = Mesh._init
    if rank > 0:  # count every mesh built here: there must be none
        def counting(self, points, cells, *args, **kwargs):
            built.append(len(points))
            return original(self, points, cells, *args, **kwargs)

        Mesh._init = counting
    try:
        sol = solve_poisson(_mine(comm, mesh), 1.0, comm=comm, coarse="constants")
    finally:
        Mesh._init = original
    assert built == [], built
    assert (sol.mesh is None and sol.problem is None) == (rank > 0)
    balance = sol.stats.distribution.balance
    held = [b["owned_points"] + b["ghost_points"] for b in balance]
    if size > 1:
        assert max(held) < mesh.n_points, held
    assert sum(b["owned_points"] for b in balance) == mesh.n_points
    assert len(sol.owned) == balance[rank]["owned_points"]
    assert np.array_equal(sol.owned, np.sort(sol.owned))


@check
def gather_modes(comm):
    import numpy as np

    from hatkernels.distributed import solve_poisson

    mesh = tagged_square(14, seed=4)
    rank = comm.Get_rank()
    full = solve_poisson(_mine(comm, mesh), _source, comm=comm, gather=True)
    root = solve_poisson(_mine(comm, mesh), _source, comm=comm, gather="root")
    none = solve_poisson(_mine(comm, mesh), _source, comm=comm, gather=False)
    assert full.u.shape == (mesh.n_points,)
    assert (root.u is not None) == (rank == 0)
    assert none.u is None
    assert np.array_equal(full.u[full.owned], full.u_owned)  # in the mesh's numbering
    assert np.array_equal(none.u_owned, full.u_owned)
    if rank == 0:
        assert np.array_equal(root.u, full.u)
    everything = comm.allgather((full.owned, full.u_owned))
    owned = np.concatenate([o for o, _ in everything])
    assert np.array_equal(np.sort(owned), np.arange(mesh.n_points))


def _raises_everywhere(comm, fn, *words):
    """``fn()`` raises an InputError on this rank whose message has ``words``."""
    from hatkernels.errors import InputError

    try:
        fn()
    except InputError as exc:
        text = str(exc)
    else:
        raise AssertionError(f"rank {comm.Get_rank()}: no InputError")
    assert all(w in text for w in words), (words, text)
    return text


@check
def bad_input_raises_on_every_rank(comm):
    import numpy as np

    from hatkernels.distributed import partition, solve_poisson
    from hatkernels.mesh import rectangle

    rank, size = comm.Get_rank(), comm.Get_size()
    mesh = tagged_square(12, seed=6)
    mine = _mine(comm, mesh)
    # parsing on rank 0 fails: every rank raises, naming the argument
    _raises_everywhere(comm, lambda: solve_poisson(mine, 1.0, comm=comm, coefficient=-1.0),
                       "coefficient")
    _raises_everywhere(comm, lambda: solve_poisson(mine, 1.0, comm=comm, dirichlet_on="nowhere"),
                       "nowhere")
    # met while cutting the last rank's part (x > 0.9 belongs to the last part of RCB)
    text = _raises_everywhere(comm, lambda: solve_poisson(
        mine, 1.0, comm=comm, coefficient=lambda x, y: np.where(x > 0.9, -1.0, 1.0)),
        "coefficient")
    assert (("rank 0" in text) == (rank > 0)) or size == 1, text
    # a partition made for another mesh, on rank 0
    other = partition(rectangle(3, 3), size) if rank == 0 else None
    _raises_everywhere(comm, lambda: solve_poisson(mine, 1.0, comm=comm, partition=other),
                       "another mesh")
    # refining needs the mesh on every rank
    if size > 1:
        _raises_everywhere(comm, lambda: solve_poisson(mine, 1.0, comm=comm, refine=1),
                           "refine", "every rank")
    # None on rank 0: named
    _raises_everywhere(comm, lambda: solve_poisson(None if rank == 0 else mesh, 1.0,
                                                   comm=comm), "rank 0 was given no mesh")
    if size > 2:  # meshes on ranks 0 and 1, None on 2: rank 2 named
        _raises_everywhere(comm, lambda: solve_poisson(mesh if rank < 2 else None, 1.0,
                                                       comm=comm), "rank 2 was given no mesh")
    if size > 1:  # meshes of different sizes
        _raises_everywhere(comm, lambda: solve_poisson(rectangle(4 + rank, 4), 1.0, comm=comm),
                           "rank 1 was given another mesh")
        # solver options that differ
        _raises_everywhere(comm, lambda: solve_poisson(mine, 1.0, comm=comm,
                                                       gather=True if rank == 0 else "root"),
                           "gather")
    # after all that, a good call still works on every rank (nobody left waiting)
    assert solve_poisson(mine, 1.0, comm=comm).stats.converged


if __name__ == "__main__":
    mpi_checks.run_checks("mpi_scatter_checks", CHECKS)
