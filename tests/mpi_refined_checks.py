"""Checks of the partitioned refinement and distributed multigrid under MPI: run as
``mpiexec -n P python tests/mpi_refined_checks.py``.

tests/test_refined_parts.py runs it with 1 to 4 ranks under a timeout.  The
reference of each check is the serial solve on the serially refined mesh with
the serial ``gmg`` (the library's own, checked against analytic solutions in
test_multigrid.py): here the check is that the distributed path reproduces it
(common practice, no source).  A failure on any rank aborts every rank
(mpi_checks' hook).  Nothing runs on import.
"""

import sys
import time
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import mpi_checks  # noqa: E402

CHECKS = []


def check(fn):
    CHECKS.append(fn)
    return fn


def _refined(mesh, k):
    for _ in range(k):
        mesh = mesh.refine()
    return mesh


def _same_as_serial(comm, coarse, k, f, rtol=1e-12, **data):
    import numpy as np

    import hatkernels
    from hatkernels import distributed

    dist = distributed.solve_poisson(coarse, f, refine=k, preconditioner="gmg", rtol=rtol,
                                     comm=comm, **data)
    # the serial reference on rank 0 only, the others waiting without spinning
    serial = None
    if comm.Get_rank() == 0:
        serial = hatkernels.solve_poisson(_refined(coarse, k), f, preconditioner="gmg",
                                          rtol=rtol, **data)
    mpi_checks._wait_politely(comm)
    if serial is not None:
        from hatkernels.results import balance

        totals = balance(serial)
        totals = {"sources": totals.sources, "absorbed": totals.absorbed,
                  "outflow": totals.outflow}
    u, iterations, totals = comm.bcast(None if serial is None else (
        serial.u, serial.stats.iterations, totals))
    flows = dist.flows
    # conservation (common practice, no source): what the sources put in is absorbed or
    # flows out, up to the solver's residual; the totals are those of the serial balance
    outflow = flows["outflow_held"] + flows["outflow_flux"] + flows["outflow_convection"]
    scale = abs(flows["sources"]) + abs(outflow) + abs(flows["absorbed"])
    assert abs(flows["sources"] - flows["absorbed"] - outflow - flows["imbalance"]) < 1e-12 * scale
    assert abs(flows["imbalance"]) < 1e-8 * scale, flows
    for key, value in (("sources", flows["sources"]), ("absorbed", flows["absorbed"]),
                       ("outflow", outflow)):
        assert abs(value - totals[key]) < 1e-9 * scale, (key, value, totals[key])
    rel = np.abs(dist.u - u).max() / np.abs(u).max()
    assert rel < 1e-10, rel
    assert abs(dist.stats.iterations - iterations) <= 1, (dist.stats.iterations, iterations)
    owned = np.concatenate(comm.allgather(dist.owned))
    assert np.array_equal(np.sort(owned), np.arange(u.size))  # each point once
    assert np.array_equal(dist.u_owned, dist.u[dist.owned])
    return dist


@check
def triangles_match_the_serial_solve(comm):
    from hatkernels.mesh import rectangle

    dist = _same_as_serial(comm, rectangle(4, 3), 3, lambda x, y: 1 + x * y)
    assert dist.stats.preconditioner.startswith("distributed gmg")
    # int (1 + x y) over the unit square = 5/4, exact for the degree-2 rule (common practice)
    assert abs(dist.flows["sources"] - 1.25) < 1e-13, dist.flows


@check
def tetrahedra_match_the_serial_solve(comm):
    from hatkernels.mesh import cuboid

    _same_as_serial(comm, cuboid(2), 2, lambda x, y, z: 1 + x * y * z)


@check
def tagged_materials_and_conditions_match(comm):
    from hatkernels.mesh import rectangle
    from hatkernels.mesh.tags import label_cells, label_sides

    m = label_sides(label_cells(rectangle(6, 4), {"a": lambda x, y: x < 0.5,
                                                  "b": lambda x, y: x >= 0}),
                    {"left": lambda x, y: x == 0, "right": lambda x, y: x == 1,
                     "top": lambda x, y: y == 1})
    _same_as_serial(comm, m, 2, {"a": lambda x, y: x * y},
                    coefficient={"a": 1.0, "b": 4.0}, reaction={"b": lambda x, y: 1 + x},
                    dirichlet={"left": lambda x, y: 1 + y, "top": 0.5},
                    robin={"right": (2.0, lambda x, y: y)})
    _same_as_serial(comm, m, 2, 1.0, dirichlet_on="left", neumann=1.0)


@check
def level_operators_matrix_free_or_assembled(comm):
    import numpy as np

    from hatkernels import distributed
    from hatkernels.mesh import ball, rectangle

    # a tensor in 2-D, a callable on the ball (cells with obtuse angle pairs) in 3-D: the
    # matrix-free levels (the default) give the serial answer
    T = [[2.0, 0.3], [0.3, 1.0]]
    free = _same_as_serial(comm, rectangle(4, 3), 2, 1.0, coefficient=T)
    _same_as_serial(comm, ball(2), 1, 1.0, coefficient=lambda x, y, z: 1.0 + x * x)
    # the assembled levels: the same rows, so the same iterations and solution
    assembled = distributed.solve_poisson(rectangle(4, 3), 1.0, refine=2,
                                          preconditioner="gmg", rtol=1e-12, comm=comm,
                                          coefficient=T, matrix_free=False)
    assert "level operators matrix-free (geometry)" in free.stats.preconditioner
    assert "level operators assembled" in assembled.stats.preconditioner
    assert free.stats.iterations == assembled.stats.iterations
    assert np.abs(free.u - assembled.u).max() < 1e-12 * np.abs(assembled.u).max()
    assert free.stats.matrix_free and free.stats.nnz == 0  # nothing stored for the CG
    assert not assembled.stats.matrix_free and assembled.stats.nnz > 0
    assert free.stats.stored_bytes < assembled.stats.stored_bytes / 2  # no stored rows


@check
def halos_round_trip_on_every_level(comm):
    import numpy as np

    from hatkernels.distributed.finenumbers import partition_coarse_cells
    from hatkernels.distributed.halo import CommStats, Halo
    from hatkernels.distributed.refined import _ReverseAdd, build_level
    from hatkernels.mesh import disk

    coarse = disk(4)
    size, rank = comm.Get_size(), comm.Get_rank()
    owner = partition_coarse_cells(coarse, size, 3)
    for level in (1, 2, 3):
        part = build_level(coarse, level, owner, rank, comm)
        x = np.full(part.n_local, -1.0)
        x[: part.n_owned] = part.points[: part.n_owned]
        Halo(part.pattern, comm).exchange(x)
        assert np.array_equal(x, part.points.astype(float))  # every ghost got its number
        ones = np.zeros(part.n_local)
        ones[part.n_owned:] = 1.0
        _ReverseAdd(part.pattern, comm, CommStats()).add(ones)
        # each owned point now counts the ranks holding it as a ghost
        held = np.zeros(part.numbering.n_fine)
        np.add.at(held, part.points[part.n_owned:], 1.0)
        from mpi4py import MPI

        comm.Allreduce(MPI.IN_PLACE, held)
        assert np.array_equal(ones[: part.n_owned], held[part.points[: part.n_owned]])


@check
def memory_per_rank_falls(comm):
    from hatkernels import distributed
    from hatkernels.mesh import rectangle

    dist = distributed.solve_poisson(rectangle(8, 8), 1.0, refine=4, preconditioner="gmg",
                                     comm=comm, gather=False)
    n_fine = dist.stats.unknowns + dist.stats.dirichlet_points  # every fine point
    local = max(b["levels_points"][-1] for b in dist.stats.distribution.balance)
    size = comm.Get_size()
    # a replicated fine mesh would put all n_fine points on every rank
    assert local <= n_fine * (1.0 if size == 1 else 0.5 + 1.0 / size), (local, n_fine)


@check
def bad_input_fails_on_every_rank(comm):
    from hatkernels import distributed
    from hatkernels.errors import InputError
    from hatkernels.mesh import rectangle

    try:
        distributed.solve_poisson(rectangle(2, 2), 1.0, refine=1, preconditioner="gmg",
                                  comm=comm, dirichlet_on=[0, 1])
    except InputError as exc:
        assert "point indices" in str(exc)
    else:
        raise AssertionError("point indices with refine=k were accepted")


@check
def pieces_make_the_whole_solution(comm):
    import os
    import tempfile

    import meshio
    import numpy as np

    import hatkernels
    from hatkernels import distributed
    from hatkernels.mesh import rectangle
    from hatkernels.mesh.tags import label_cells

    coarse = label_cells(rectangle(4, 3), {"a": lambda x, y: x < 0.5, "b": lambda x, y: x >= 0})
    def f(x, y):
        return 1 + x * y

    dist = distributed.solve_poisson(coarse, f, refine=2, preconditioner="gmg", rtol=1e-12,
                                     comm=comm, gather=False)
    where = comm.bcast(tempfile.mkdtemp() if comm.Get_rank() == 0 else None, root=0)
    out = os.path.join(where, "parts")
    index = distributed.write_pvtu(out, dist, comm=comm)
    if comm.Get_rank() == 0:
        fine = _refined(coarse, 2)
        serial = hatkernels.solve_poisson(fine, f, preconditioner="gmg", rtol=1e-12)
        text = open(index).read()
        pieces = [f"piece-{r:04d}.vtu" for r in range(comm.Get_size())]
        assert all(f'Source="{p}"' in text for p in pieces)
        cells = 0
        for p in pieces:
            m = meshio.read(os.path.join(out, p))
            cells += len(m.cells_dict["triangle"])
            xy = m.points[:, :2]
            # each piece point is a point of the fine mesh with the serial value there
            d = np.linalg.norm(fine.points[None, :, :] - xy[:, None, :], axis=2)
            k = d.argmin(axis=1)
            assert d.min(axis=1).max() < 1e-12
            assert np.abs(m.point_data["u"] - serial.u[k]).max() < 1e-9
            assert set(np.unique(m.cell_data["region"][0]).tolist()) <= {1, 2}
        assert cells == fine.n_cells  # every cell in exactly one piece
    try:
        distributed.write_pvtu(out, dist, comm=comm)
    except hatkernels.errors.InputError as exc:
        assert "exists" in str(exc) or "already" in str(exc), str(exc)
    else:
        raise AssertionError("an existing output was overwritten without force")


def main():
    from mpi4py import MPI

    mpi_checks._install_abort_hook(MPI)
    warnings.simplefilter("error", RuntimeWarning)
    comm = MPI.COMM_WORLD
    for fn in CHECKS:
        t0 = time.perf_counter()
        fn(comm)
        mpi_checks._wait_politely(comm)
        if comm.Get_rank() == 0:
            print(f"mpi_refined_checks: {fn.__name__} ok ({time.perf_counter() - t0:.1f} s)",
                  flush=True)
    if comm.Get_rank() == 0:
        print(f"mpi_refined_checks: all {len(CHECKS)} checks passed on {comm.Get_size()} ranks",
              flush=True)


if __name__ == "__main__":
    main()
