"""Checks of hatkernels.distributed under MPI: run as ``mpiexec -n P python tests/mpi_checks.py``.

tests/test_distributed.py runs this script with 2 and 3 ranks (with a
timeout).  A failure on any rank aborts every rank (``MPI_Abort`` from the
exception hook) so that no rank is left waiting in a collective call; rank
0 prints ``mpi_checks: all N checks passed on P ranks`` at the end.

Nothing runs on import (pytest's doctest collection imports this file).
"""

import sys
import time
import traceback
import warnings


def _install_abort_hook(MPI):
    def hook(kind, value, tb):
        sys.stderr.write(f"mpi_checks: rank {MPI.COMM_WORLD.Get_rank()} failed:\n")
        traceback.print_exception(kind, value, tb)
        sys.stderr.flush()
        MPI.COMM_WORLD.Abort(1)

    sys.excepthook = hook


CHECKS = []


def _wait_politely(comm):
    """A barrier that sleeps while it waits: with more ranks than cores, a spinning
    barrier would take the core from the rank that still works."""
    request = comm.Ibarrier()
    while not request.Test():
        time.sleep(0.002)


def check(fn):
    CHECKS.append(fn)
    return fn


def dense_preconditioners(Af, owner, P):
    """Dense block Jacobi and additive two-level preconditioners, from their formulas:
    ``blockdiag(A_qq^-1)`` and that plus ``R^T (R A R^T)^-1 R`` (numpy; the reference)."""
    import numpy as np

    Minv = np.zeros_like(Af)
    for q in range(P):
        I = np.flatnonzero(owner == q)
        Minv[np.ix_(I, I)] = np.linalg.inv(Af[np.ix_(I, I)])
    R = np.zeros((P, len(owner)))
    R[owner, np.arange(len(owner))] = 1.0
    return Minv, Minv + R.T @ np.linalg.solve(R @ Af @ R.T, R)


def _meshes():
    from hatkernels.mesh import disk, l_shape, rectangle

    return {"rectangle": rectangle(20, 14), "l_shape": l_shape(10), "disk": disk(9)}


def _serial(mesh, f, **kw):
    """The project's serial solve, on one thread (the ranks share the cores), with CG
    started from zero as the distributed solve starts it (the serial default with
    ``amg-native`` is the full-multigrid start)."""
    import hatkernels

    kw.setdefault("start", "zero")
    with hatkernels.threads(1):
        return hatkernels.solve_poisson(mesh, f, **kw)


@check
def solution_equals_serial_and_scipy(comm):
    import numpy as np
    import scipy.sparse.linalg as spla

    import hatkernels
    from hatkernels.distributed import solve_poisson

    for name, mesh in _meshes().items():
        x, y = mesh.points.T
        cases = [
            ("amg", None, {}),
            ("ic0", "constants", {"coefficient": lambda x, y: 1 + x * x, "dirichlet": x + 2 * y}),
            ("jacobi", None, {"reaction": 2.0, "neumann": 0.5,
                              "dirichlet_on": np.flatnonzero(mesh.points[:, 0] <= x.min() + 1e-9)}),
        ]
        for pc, coarse, kw in cases:
            f = lambda x, y: 1 + np.sin(3 * x) * y  # noqa: E731
            sol = solve_poisson(mesh, f, comm=comm, rtol=1e-12, preconditioner=pc,
                                coarse=coarse, check=True, **kw)
            ser = _serial(mesh, f, rtol=1e-12, preconditioner=pc, **kw)
            scale = np.abs(ser.u).max()
            # the project's serial solve (itself checked against scipy in tests/test_poisson.py)
            assert np.abs(sol.u - ser.u).max() <= 1e-8 * scale, (name, pc)
            assert sol.stats.unknowns == ser.stats.unknowns
            assert sol.stats.nnz == ser.stats.nnz
            # reference library: scipy (spsolve on the serial reduced system, direct)
            if not kw:
                A = hatkernels.assemble_stiffness(mesh)
                b = hatkernels.assemble_load(mesh, f)
                system = hatkernels.apply_dirichlet(A, b, mesh.boundary_points())
                u = system.expand(spla.spsolve(system.A.tocsc(), system.b))
                assert np.abs(sol.u - u).max() <= 1e-8 * np.abs(u).max(), name


@check
def tetrahedra_equal_serial(comm):
    import numpy as np

    from hatkernels.distributed import solve_poisson
    from hatkernels.mesh import cuboid

    mesh = cuboid(6, 6, 6)
    x, y, z = mesh.points.T
    faces = mesh.boundary_faces()
    on = lambda c, v: faces[(mesh.points[faces, c] == v).all(axis=1)]  # noqa: E731
    cases = [
        ("amg", None, {}),
        ("amg", "constants", {"coefficient": lambda x, y, z: 1 + x * z,
                              "dirichlet": x + 2 * y - z}),
        # held on one face, a film coefficient varying over another, a flux on the rest
        ("ic0", None, {"dirichlet_on": on(0, 0.0), "reaction": 2.0, "neumann": 0.5,
                       "robin": (on(0, 1.0), lambda x, y, z: 1 + y * z, 3.0)}),
        ("jacobi", "constants", {"dirichlet_on": on(2, 0.0),
                                 "robin": (lambda x, y, z: 2 + x, lambda x, y, z: x * y)}),
    ]
    found = []
    for pc, coarse, kw in cases:
        f = lambda x, y, z: 1 + np.sin(3 * x) * y * z  # noqa: E731
        sol = solve_poisson(mesh, f, comm=comm, rtol=1e-12, preconditioner=pc,
                            coarse=coarse, check=True, **kw)
        ser = _serial(mesh, f, rtol=1e-12, preconditioner=pc, **kw)
        # the project's serial solve on tetrahedra (itself checked against analytic
        # solutions in tests/test_convergence3d.py and test_solvers3d.py, its face terms
        # in tests/test_faces.py): the partition must not change the answer, point by point
        assert np.abs(sol.u - ser.u).max() <= 1e-10 * np.abs(ser.u).max(), (pc, kw.keys())
        assert sol.stats.unknowns == ser.stats.unknowns
        assert sol.stats.nnz == ser.stats.nnz
        part = sol.stats.distribution.partition
        assert part["dim"] == 3 and part["imbalance"] < 0.05
        assert [b["cells"] for b in sol.stats.distribution.balance] == part["cells"]
        found.append((pc, coarse, sol.stats.iterations))
    if comm.Get_rank() == 0:
        print("mpi_checks: iterations on cuboid(6, 6, 6) at rtol 1e-12", found)


@check
def matrix_rows_equal_serial(comm):
    import numpy as np
    import scipy.sparse as sp

    import hatkernels
    from hatkernels.coefficients import parse_coefficient
    from hatkernels.distributed import partition, subdomain
    from hatkernels.distributed.assembly import (
        assemble_local,
        reduce_local,
        rows_in_global,
    )
    from hatkernels.distributed.halo import CommStats
    from hatkernels.distributed.matrix import DistributedMatrix
    from hatkernels.distributed.subdomain import local_coefficient

    rank, size = comm.Get_rank(), comm.Get_size()
    for name, mesh in _meshes().items():
        kappa = parse_coefficient(lambda x, y: 2 + np.cos(x + y), mesh, tensor=True)
        load = parse_coefficient(1.0, mesh, sign="any")
        sub = subdomain(partition(mesh, size), rank)
        A_L, b_L, _ = assemble_local(sub, kappa=local_coefficient(kappa, sub),
                                     f=local_coefficient(load, sub))
        # the project's serial csr assembly (checked against the reference strategy and
        # the 5-point stencil in tests/test_assembly.py), owned rows: the same bits
        A = hatkernels.assemble_stiffness(mesh, kappa).tocsr()
        mine = rows_in_global(A_L[: sub.n_owned], sub.points, mesh.n_points)
        ref = sp.csr_matrix(A[sub.owned])
        ref.sort_indices()
        assert np.array_equal(mine.indptr, ref.indptr), name
        assert np.array_equal(mine.indices, ref.indices), name
        assert np.array_equal(mine.data, ref.data), name
        # the reduced distributed matrix (what the products use) against apply_dirichlet
        fixed = mesh.boundary_points()
        loc = sub.local_numbers(fixed, mesh.n_points)
        local = reduce_local(sub, A_L, b_L, loc[loc >= 0], 0.0)
        D = DistributedMatrix(local.A, local.pattern, comm, CommStats())
        rows = sp.hstack([D.A_oo, D.A_og], format="csr")
        system = hatkernels.apply_dirichlet(A, hatkernels.assemble_load(mesh, 1.0), fixed)
        position = np.full(mesh.n_points, -1)
        position[system.free] = np.arange(len(system.free))
        got = rows_in_global(rows, position[local.free_points], len(system.free))
        want = sp.csr_matrix(system.A[position[local.free_points[: local.n_unknowns]]])
        want.sort_indices()
        assert (abs(got - want)).max() == 0, name
        assert np.array_equal(local.b, system.b[position[local.free_points[: local.n_unknowns]]])


@check
def halo_round_trip_and_product(comm):
    import numpy as np

    import hatkernels
    from hatkernels.distributed import partition, subdomain
    from hatkernels.distributed.halo import Halo, HaloPattern
    from hatkernels.distributed.matrix import DistributedMatrix

    rank, size = comm.Get_rank(), comm.Get_size()
    mesh = hatkernels.mesh.disk(10)
    sub = subdomain(partition(mesh, size, method="hilbert"), rank)
    halo = Halo(HaloPattern.from_subdomain(sub), comm)
    rng = np.random.default_rng(7)
    field = rng.standard_normal(mesh.n_points)  # the same on every rank
    x = np.full(len(sub.points), np.nan)
    x[: sub.n_owned] = field[sub.owned]
    for _ in range(3):  # repeated exchanges reuse the buffers
        halo.exchange(x)
        assert np.array_equal(x, field[sub.points])  # exact: values are copied, not computed
        x[sub.n_owned:] = np.nan
    assert np.array_equal(halo.exchange_indices(sub.owned.astype(np.int64)),
                          sub.points[sub.n_owned:])
    # the distributed product against the serial one (same rows, different column order)
    A = hatkernels.assemble_stiffness(mesh)
    local = A[sub.points[: sub.n_owned]][:, sub.points]
    D = DistributedMatrix(local.tocsr(), HaloPattern.from_subdomain(sub), comm)
    p = np.zeros(len(sub.points))
    p[: sub.n_owned] = field[sub.owned]
    q = np.empty(sub.n_owned)
    D.matvec_into(p, q)
    ref = (A @ field)[sub.owned]
    assert np.abs(q - ref).max() <= 1e-13 * np.abs(ref).max()


@check
def one_rank_equals_serial_bit_for_bit(comm):
    import numpy as np

    from hatkernels.distributed import solve_poisson
    from hatkernels.mesh import cuboid

    me = comm.Split(color=0 if comm.Get_rank() == 0 else 1, key=comm.Get_rank())
    try:
        if comm.Get_rank() == 0:
            for mesh in _meshes().values():
                for pc in ("amg", "jacobi", "none"):
                    sol = solve_poisson(mesh, 1.0, comm=me, rtol=1e-10, preconditioner=pc)
                    ser = _serial(mesh, 1.0, rtol=1e-10, preconditioner=pc)
                    assert sol.stats.iterations == ser.stats.iterations
                    assert np.array_equal(sol.u, ser.u), pc
            mesh = cuboid(6, 6, 6)  # tetrahedra
            for pc in ("amg", "jacobi"):
                sol = solve_poisson(mesh, 1.0, comm=me, rtol=1e-10, preconditioner=pc)
                ser = _serial(mesh, 1.0, rtol=1e-10, preconditioner=pc)
                assert sol.stats.iterations == ser.stats.iterations
                assert np.array_equal(sol.u, ser.u), ("cuboid", pc)
    finally:
        me.Free()
        _wait_politely(comm)


@check
def two_level_stays_bounded(comm):
    import numpy as np

    from hatkernels.distributed import solve_poisson
    from hatkernels.mesh import rectangle

    # Dirichlet on the left edge only: with 3 parts two subdomains do not touch it.
    mesh = rectangle(32, 32)
    left = np.flatnonzero(mesh.points[:, 0] == 0)
    found = {}
    for P in range(1, comm.Get_size() + 1):
        sub = comm.Split(color=0 if comm.Get_rank() < P else 1, key=comm.Get_rank())
        try:
            if comm.Get_rank() < P:
                for coarse in (None, "constants"):
                    sol = solve_poisson(mesh, 1.0, comm=sub, dirichlet_on=left, rtol=1e-8,
                                        preconditioner="amg", coarse=coarse, check=True)
                    found[P, coarse] = (sol.stats.iterations, sol.stats.condition_estimate)
        finally:
            sub.Free()
    if comm.Get_rank() == 0:
        print("mpi_checks: iterations and condition estimates", found)
        # Additive two-level Schwarz: condition number bounded independently of the number
        # of subdomains (A. Toselli, O. Widlund, Domain Decomposition Methods, 2005, ch. 3)
        # while block Jacobi's grows (value from memory for the form of the bounds).
        its = [found[P, "constants"][0] for P in range(1, comm.Get_size() + 1)]
        kap = [found[P, "constants"][1] for P in range(1, comm.Get_size() + 1)]
        top = comm.Get_size()
        # with two parts or more the coarse space must pay for itself on this problem: a
        # clearly smaller condition estimate than block Jacobi's and no more iterations
        # (measured here: 41 against 66 at P = 2, 38 against 88 at P = 3)
        for P in range(2, top + 1):
            two, block = found[P, "constants"], found[P, None]
            assert two[1] < 0.8 * block[1], (P, two, block)
            assert two[0] <= block[0] + 1, (P, two, block)
        if top >= 3:
            assert its[2] <= 1.25 * its[1], its  # linear growth would be 1.5
            assert kap[2] <= 1.25 * kap[1], kap
            one = [found[P, None][1] for P in (2, 3)]
            assert one[1] >= 1.2 * one[0], one  # the problem does exercise the coarse space
            assert kap[2] < one[1], (kap, one)


@check
def two_level_apply_equals_dense(comm):
    import numpy as np

    import hatkernels
    from hatkernels.distributed import partition
    from hatkernels.distributed.halo import CommStats
    from hatkernels.distributed.precond import make_distributed_preconditioner

    size = comm.Get_size()
    mesh = hatkernels.mesh.l_shape(6)
    split = partition(mesh, size)
    fixed = mesh.boundary_points()
    D, local = _distributed_system(comm, mesh)
    M = make_distributed_preconditioner(D, "direct", "constants", comm, CommStats())
    system = hatkernels.apply_dirichlet(hatkernels.assemble_stiffness(mesh),
                                     hatkernels.assemble_load(mesh, 1.0), fixed)
    rng = np.random.default_rng(3)
    r_all = rng.standard_normal(len(system.free))
    position = np.full(mesh.n_points, -1)
    position[system.free] = np.arange(len(system.free))
    mine = position[local.free_points[: local.n_unknowns]]
    z = np.empty(local.n_unknowns)
    M.apply_into(np.ascontiguousarray(r_all[mine]), z)
    # reference: the dense formula M = blockdiag(A_qq^-1) + R^T (R A R^T)^-1 R (numpy)
    _, M2 = dense_preconditioners(system.A.toarray(), split.owner[system.free], size)
    zref = M2 @ r_all
    assert np.abs(z - zref[mine]).max() <= 1e-10 * np.abs(zref).max()


@check
def errors_reach_every_rank(comm):
    import numpy as np

    from hatkernels.distributed import solve_poisson
    from hatkernels.errors import InputError
    from hatkernels.mesh import rectangle

    mesh = rectangle(12, 12)

    # negative only near x = 1: met by one rank's assembly, must raise on all ranks
    def kappa(x, y):
        return np.where(x > 0.95, -1.0, 1.0)

    try:
        solve_poisson(mesh, 1.0, comm=comm, coefficient=kappa)
    except InputError as exc:
        text = str(exc)
        assert "coefficient" in text, text
    else:
        raise AssertionError("a negative coefficient was accepted")
    # a triangle named in the message is a triangle of the whole mesh touching x > 0.95
    if "triangle" in text and "rank" not in text:
        k = int(text.split("triangle ")[1].split(";")[0].split()[0])
        assert mesh.points[mesh.triangles[k]][:, 0].max() > 0.95, text
    other = rectangle(12 + comm.Get_rank(), 12)
    try:
        solve_poisson(other, 1.0, comm=comm)
    except InputError as exc:
        assert "mesh" in str(exc)
    else:
        raise AssertionError("different meshes on different ranks were accepted")


@check
def gather_modes(comm):
    import numpy as np

    from hatkernels.distributed import solve_poisson
    from hatkernels.mesh import disk

    mesh = disk(6)
    full = solve_poisson(mesh, 1.0, comm=comm, gather=True)
    root = solve_poisson(mesh, 1.0, comm=comm, gather="root")
    none = solve_poisson(mesh, 1.0, comm=comm, gather=False)
    assert (root.u is not None) == (comm.Get_rank() == 0)
    assert none.u is None
    assert np.array_equal(full.u[full.owned], full.u_owned)
    assert np.array_equal(none.u_owned, full.u_owned)
    counts = comm.allgather(len(full.owned))
    assert sum(counts) == mesh.n_points
    balance = full.stats.distribution.balance
    assert [b["owned_points"] for b in balance] == counts
    assert full.stats.distribution.partition["imbalance"] < 0.05
    assert full.stats.distribution.threads_per_rank["threads"] >= 1


def _distributed_system(comm, mesh):
    """The reduced Poisson system (whole boundary fixed) as a DistributedMatrix and its b."""
    from hatkernels.distributed import partition, subdomain
    from hatkernels.distributed.assembly import assemble_local, reduce_local
    from hatkernels.distributed.halo import CommStats
    from hatkernels.distributed.matrix import DistributedMatrix
    from hatkernels.distributed.subdomain import parse_local

    sub = subdomain(partition(mesh, comm.Get_size()), comm.Get_rank())
    A_L, b_L, _ = assemble_local(sub, kappa=parse_local(None, mesh, sub, name="k", tensor=True),
                                 f=parse_local(1.0, mesh, sub, name="f", sign="any"))
    loc = sub.local_numbers(mesh.boundary_points(), mesh.n_points)
    local = reduce_local(sub, A_L, b_L, loc[loc >= 0], 0.0)
    return DistributedMatrix(local.A, local.pattern, comm, CommStats()), local


@check
def cg_conventions(comm):
    import hatkernels

    with hatkernels.threads(1):  # the ranks share the cores (solve_poisson does this itself)
        _cg_conventions(comm)


def _cg_conventions(comm):
    import numpy as np

    from hatkernels.distributed.cg import cg
    from hatkernels.errors import InputError
    from hatkernels.mesh import rectangle

    # scipy's conventions (reference library: scipy, scipy.sparse.linalg.cg documentation)
    D, local = _distributed_system(comm, rectangle(10, 10))
    b = local.b
    x0 = np.full(len(b), 0.5)
    keep = x0.copy()
    one = cg(D, b, x0, rtol=1e-12, maxiter=1)
    assert one.info == 1 and one.iterations == 1
    assert np.array_equal(x0, keep)  # x0 not overwritten
    zero = cg(D, np.zeros(len(b)), rtol=1e-12)
    assert zero.info == 0 and not zero.x.any()
    full = cg(D, b, rtol=1e-10)
    assert full.info == 0 and full.residuals[-1] <= 1e-10 * full.residuals[0]
    calls = []
    cg(D, b, rtol=1e-10, callback=lambda x: calls.append(1))
    assert len(calls) == full.iterations
    bad = b.copy()
    if comm.Get_rank() == comm.Get_size() - 1 and len(bad):
        bad[0] = np.nan  # bad on one rank only: every rank must raise, none may hang
    try:
        cg(D, bad)
    except InputError:
        pass
    else:
        raise AssertionError("a NaN in b was accepted")


@check
def rank_without_unknowns(comm):
    import numpy as np

    from hatkernels.distributed import partition_from_owner, solve_poisson
    from hatkernels.mesh import rectangle

    # the last rank owns only Dirichlet points: an empty block, a zero coarse function
    size = comm.Get_size()
    mesh = rectangle(8, 8)
    x = mesh.points[:, 0]
    owner = np.minimum((x * (size - 1)).astype(int), size - 2)
    owner[x == 0] = size - 1
    split = partition_from_owner(mesh, owner)
    ser = _serial(mesh, 1.0, rtol=1e-12)
    for coarse in (None, "constants"):
        sol = solve_poisson(mesh, 1.0, comm=comm, partition=split, rtol=1e-12, coarse=coarse,
                            check=True)
        assert sol.stats.distribution.balance[-1]["owned_unknowns"] == 0
        assert np.abs(sol.u - ser.u).max() <= 1e-8 * np.abs(ser.u).max()


class _BufferCallsOnly:
    """A communicator that lets through only mpi4py's buffer calls (capitalised names:
    ``Isend``, ``Allreduce``, ...) and refuses the pickling ones (``isend``,
    ``allreduce``, ...); it counts the calls and keeps the send buffers (by address:
    held, so that a fresh allocation cannot reuse a freed buffer's address)."""

    def __init__(self, comm):
        import collections

        self._comm = comm
        self.calls = collections.Counter()
        self.send_buffers = {}

    def __getattr__(self, name):
        if not name[:1].isupper():
            raise AssertionError(f"comm.{name}: a pickling call on the solve's path")
        fn = getattr(self._comm, name)

        def call(*args, **kwargs):
            self.calls[name] += 1
            if name in ("Isend", "Irecv"):
                buf = args[0][0]
                assert buf.flags.c_contiguous and buf.dtype.kind == "f", (name, buf.flags)
                if name == "Isend":
                    self.send_buffers[buf.ctypes.data] = buf
            return fn(*args, **kwargs)

        return call


@check
def hot_path_uses_preallocated_buffers_and_no_pickling(comm):
    import hatkernels
    from hatkernels.distributed.cg import cg
    from hatkernels.distributed.precond import make_distributed_preconditioner
    from hatkernels.mesh import rectangle

    for coarse in (None, "constants"):
        proxy = _BufferCallsOnly(comm)
        D, local = _distributed_system(proxy, rectangle(24, 16))
        M = make_distributed_preconditioner(D, "amg", coarse, proxy, D.stats)
        proxy.calls.clear()
        exchanges = D.stats.halo_exchanges
        with hatkernels.threads(1):  # the ranks share the cores (solve_poisson does this itself)
            result = cg(D, local.b, rtol=1e-10, M=M)
        assert result.info == 0, result.message
        exchanges = D.stats.halo_exchanges - exchanges
        senders = sum(1 for s in D.halo.pattern.send if len(s))
        assert exchanges >= result.iterations
        # one message per neighbour and product, always from the same buffers
        assert proxy.calls["Isend"] == senders * exchanges, (proxy.calls, senders, exchanges)
        assert len(proxy.send_buffers) == senders, (len(proxy.send_buffers), senders)
        # two reductions per iteration (docs/distributed.md), plus a few at start and end
        assert proxy.calls["Allreduce"] <= 2 * result.iterations + 4 + 2 * result.restarts
        if coarse:
            assert proxy.calls["Gather"] == proxy.calls["Scatter"] >= result.iterations
        assert set(proxy.calls) <= {"Isend", "Irecv", "Allreduce", "Gather", "Scatter"}, \
            proxy.calls


@check
def threads_per_rank_and_monitor(comm):
    import os

    import numba
    import numpy as np
    from mpi4py import MPI

    from hatkernels.distributed import solve_poisson
    from hatkernels.distributed.launch import cores_per_node
    from hatkernels.errors import InputError
    from hatkernels.mesh import disk

    mesh = disk(8)
    before = numba.get_num_threads()
    seen = []
    sol = solve_poisson(mesh, 1.0, comm=comm, monitor=lambda i, r: seen.append((i, r)))
    assert numba.get_num_threads() == before  # restored after the solve
    chosen = sol.stats.distribution.threads_per_rank
    assert sol.stats.threads == chosen["threads"] >= 1  # numba ran with the choice
    node = comm.Split_type(MPI.COMM_TYPE_SHARED)
    try:
        on_node = node.allreduce(chosen["threads"])
        ranks_on_node = node.Get_size()
    finally:
        node.Free()
    assert chosen["ranks_on_node"] == ranks_on_node
    if "NUMBA_NUM_THREADS" not in os.environ:
        # no oversubscription by threads: at most one thread per core on the node, or
        # one per rank when there are more ranks than cores (common practice, no source)
        assert on_node <= max(cores_per_node()[0], ranks_on_node), (on_node, chosen)
    one = solve_poisson(mesh, 1.0, comm=comm, threads=1)
    assert one.stats.threads == 1 and one.stats.distribution.threads_per_rank["chosen_by"] == "given"
    try:
        solve_poisson(mesh, 1.0, comm=comm, threads=0)
    except InputError as exc:
        assert "threads must be between 1 and" in str(exc), exc
    else:
        raise AssertionError("threads=0 was accepted")
    # monitor: every iteration once, the global residual norms, the same on every rank
    its = sol.stats.iterations
    assert [i for i, _ in seen] == list(range(1, its + 1)), seen
    assert np.array_equal([r for _, r in seen], sol.stats.residuals[1:])
    assert all(other == seen for other in comm.allgather(seen))


def run_checks(name, checks):
    """Run ``checks`` (functions of the communicator) on COMM_WORLD, one after the other,
    each ranks' exception aborting every rank; rank 0 reports each and the total."""
    from mpi4py import MPI

    _install_abort_hook(MPI)
    warnings.simplefilter("error", RuntimeWarning)  # a solve that does not converge fails
    comm = MPI.COMM_WORLD
    for fn in checks:
        t0 = time.perf_counter()
        fn(comm)
        _wait_politely(comm)
        if comm.Get_rank() == 0:
            print(f"{name}: {fn.__name__} ok ({time.perf_counter() - t0:.1f} s)", flush=True)
    if comm.Get_rank() == 0:
        print(f"{name}: all {len(checks)} checks passed on {comm.Get_size()} ranks",
              flush=True)


if __name__ == "__main__":
    run_checks("mpi_checks", CHECKS)
