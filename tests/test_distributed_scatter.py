"""Scattered input (hatkernels.distributed.scatter): the pure parts here, the MPI runs through mpiexec.

Here, without MPI: a part cut on rank 0 carries the rows of the whole problem
(checked against the 5-point stencil and P1's exactness on linear solutions),
survives its transfer (through an in-memory stand-in for the communicator),
and the input rules refuse every inconsistent mix of meshes and None.  Under
``mpiexec -n 1, 2, 3``: tests/mpi_scatter_checks.py (the solve against scipy,
against the replicated path, errors on every rank, gather modes).
"""

import pickle
import sys
from collections import defaultdict, deque
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from hypothesis import given
from hypothesis import strategies as st
from mpi_scatter_checks import jittered, tagged_data, tagged_square

from hatkernels.distributed import partition
from hatkernels.distributed.assembly import rows_in_global
from hatkernels.distributed.scatter import (
    AGREED,
    Part,
    input_mode,
    input_status,
    part_arrays,
    part_from_arrays,
    part_of,
    recv_part,
    scatter_parts,
    send_part,
)
from hatkernels.errors import InputError
from hatkernels.mesh import cuboid, rectangle
from hatkernels.problem import PoissonProblem

HERE = Path(__file__).resolve().parent


def _whole_from_parts(problem, parts):
    """The whole matrix and load stacked from the parts' owned rows (global columns)."""
    n = problem.mesh.n_points
    rows, loads, owned = [], np.zeros(n), []
    for p in parts:
        m = p.n_owned
        rows.append(rows_in_global(p.A[:m], p.points, n))
        loads[p.owned] = p.b[:m]
        owned.append(p.owned)
    order = np.concatenate(owned)
    A = sp.vstack(rows).tocsr()
    P = sp.csr_matrix((np.ones(n), (order, np.arange(n))), shape=(n, n))
    return (P @ A).tocsr(), loads


# -- a part carries the rows of the whole problem ---------------------------------------------


def test_owned_rows_are_the_five_point_stencil():
    n = 8
    mesh = rectangle(n, n)
    problem = PoissonProblem(mesh, 1.0)
    split = partition(mesh, 3)
    h = 1.0 / n
    for r in range(3):
        p = part_of(problem, split, r)
        assert np.array_equal(np.sort(p.owned), split.owned(r))
        A = rows_in_global(p.A[: p.n_owned], p.points, mesh.n_points).toarray()
        for k, g in enumerate(p.owned):
            i, j = g % (n + 1), g // (n + 1)
            if 0 < i < n and 0 < j < n:
                # right-split squares give the 5-point stencil and a load of h^2 at
                # interior points (common practice, no source)
                expect = np.zeros(mesh.n_points)
                expect[g] = 4.0
                expect[[g - 1, g + 1, g - n - 1, g + n + 1]] = -1.0
                assert np.abs(A[k] - expect).max() <= 8 * np.finfo(float).eps
                assert p.b[k] == pytest.approx(h * h, rel=1e-12, abs=0)


@pytest.mark.parametrize("dim", [2, 3])
def test_parts_solve_a_linear_solution_exactly(dim):
    mesh = jittered(rectangle(10, 10), 0.15, 1) if dim == 2 else jittered(cuboid(4), 0.1, 1)
    exact = 1.0 + mesh.points @ np.arange(1.0, dim + 1.0)
    held = mesh.boundary_points()
    problem = PoissonProblem(mesh, 0.0, dirichlet=exact, dirichlet_on=held)
    split = partition(mesh, 3)
    parts = [part_of(problem, split, r) for r in range(3)]
    for p in parts:  # the held values travel with the part, in local numbers
        assert np.array_equal(np.sort(p.points[p.fixed]), np.intersect1d(p.points, held))
        assert np.array_equal(p.values, exact[p.points[p.fixed]])
        assert p.n_ghosts > 0 and len(p.points) < mesh.n_points
    A, b = _whole_from_parts(problem, parts)
    free = np.setdiff1d(np.arange(mesh.n_points), held)
    rhs = b[free] - A[free][:, held] @ exact[held]
    u = spla.spsolve(A[free][:, free].tocsc(), rhs)
    # P1 reproduces linear solutions exactly (the patch test; common practice, no source);
    # scipy's direct solver (reference library) on the rows the parts carry
    assert np.abs(u - exact[free]).max() <= 1e-10 * np.abs(exact).max()


@given(seed=st.integers(0, 2**16), parts=st.integers(2, 5))
def test_owned_rows_sum_to_zero_and_cover_every_point_once(seed, parts):
    mesh = jittered(rectangle(6, 5), 0.15, seed)
    problem = PoissonProblem(mesh, 1.0, coefficient=lambda x, y: 1 + x * y)
    split = partition(mesh, parts)
    found = [part_of(problem, split, r) for r in range(parts)]
    owned = np.concatenate([p.owned for p in found])
    assert np.array_equal(np.sort(owned), np.arange(mesh.n_points))
    for p in found:
        A = p.A[: p.n_owned]
        # constants are in the stiffness's kernel: every complete row sums to zero
        # (common practice, no source)
        scale = np.abs(A).sum(axis=1).A1
        assert (np.abs(A.sum(axis=1).A1) <= 64 * np.finfo(float).eps * scale).all()


# -- the transfer -------------------------------------------------------------------------------


class Wires:
    """In-memory point-to-point messages, in order per destination (MPI's non-overtaking
    rule), for the transfer functions without MPI.  ``send`` pickles like mpi4py does."""

    def __init__(self, size):
        self.size = size
        self.boxes = defaultdict(deque)

    def Get_size(self):
        return self.size

    def send(self, obj, dest, tag):
        self.boxes[dest].append(("object", pickle.dumps(obj)))

    def Send(self, buf, dest, tag):
        assert buf.flags.c_contiguous
        self.boxes[dest].append(("buffer", buf.copy()))

    def at(self, rank):
        wires = self

        class End:
            def Iprobe(self, source, tag):
                return bool(wires.boxes[rank])

            def recv(self, source, tag):
                kind, obj = wires.boxes[rank].popleft()
                assert kind == "object"
                return pickle.loads(obj)

            def Recv(self, buf, source, tag):
                kind, obj = wires.boxes[rank].popleft()
                assert kind == "buffer" and obj.dtype == buf.dtype and obj.shape == buf.shape
                buf[...] = obj

        return End()


def _same(a, b):
    assert a.n_owned == b.n_owned and a.n_cells == b.n_cells
    for name in ("points", "neighbours", "recv_offsets", "b", "fixed", "values"):
        x, y = getattr(a, name), getattr(b, name)
        assert x.dtype == y.dtype and np.array_equal(x, y), name
    assert len(a.send) == len(b.send)
    assert all(x.dtype == y.dtype and np.array_equal(x, y) for x, y in zip(a.send, b.send, strict=True))
    assert (a.A != b.A).nnz == 0 and a.A.indices.dtype == b.A.indices.dtype


def test_parts_travel_whole_and_rank_0_keeps_its_own():
    mesh = tagged_square(10, seed=2)
    problem = PoissonProblem(mesh, 1.0, **tagged_data())
    split = partition(mesh, 3)
    wires = Wires(3)
    own, failure = scatter_parts(wires, problem, split)
    assert failure is None
    _same(own, part_of(problem, split, 0))
    for r in (1, 2):
        _same(recv_part(wires.at(r)), part_of(problem, split, r))
        assert not wires.boxes[r]  # every message read, none left over


def test_one_part_without_neighbours_round_trips():
    mesh = rectangle(3, 2)
    p = part_of(PoissonProblem(mesh, 1.0, dirichlet_on=[], reaction=1.0), partition(mesh, 1), 0)
    assert p.send == () and p.fixed.size == 0  # nothing to send, nothing held
    meta, arrays = part_arrays(p)
    _same(part_from_arrays(meta, arrays), p)
    wires = Wires(2)
    send_part(wires, p, 1)
    _same(recv_part(wires.at(1)), p)


def test_a_reduced_part_cannot_be_sent():
    mesh = rectangle(3, 2)
    p = part_of(PoissonProblem(mesh, 1.0), partition(mesh, 2), 0).reduced()
    assert p.A is None and p.b is None and isinstance(p, Part)
    with pytest.raises(InputError, match="needs its local matrix"):
        part_arrays(p)


def test_a_failure_reaches_every_waiting_rank():
    mesh = rectangle(8, 8)
    # negative only where x > 0.9: met while cutting the last part
    problem = PoissonProblem(mesh, 1.0, coefficient=lambda x, y: np.where(x > 0.9, -1.0, 1.0))
    split = partition(mesh, 4)
    wires = Wires(4)
    own, failure = scatter_parts(wires, problem, split)
    assert own is None
    assert isinstance(failure, InputError) and "coefficient" in str(failure)
    got = [recv_part(wires.at(r)) for r in (1, 2, 3)]
    assert got[-1] is None  # the part that failed, and the ranks after it, get None
    assert all(not wires.boxes[r] for r in (1, 2, 3))


# -- which path a call takes --------------------------------------------------------------------

OPTIONS = dict(zip(AGREED, (0, None, None, True, 1e-10, 0.0, None), strict=True))
MESH = rectangle(3, 3)


def _seen(meshes, changed=None):
    """Every rank's status: ``changed`` maps a rank to the options it changes."""
    changed = changed or {}
    return [input_status(m, {**OPTIONS, **changed.get(r, {})}) for r, m in enumerate(meshes)]


def test_input_modes():
    assert input_mode(_seen([MESH])) == "replicated"  # one rank: nothing to scatter
    assert input_mode(_seen([MESH, MESH, MESH])) == "replicated"
    assert input_mode(_seen([MESH, None, None])) == "scattered"
    assert input_mode(_seen([MESH, None])) == "scattered"


@pytest.mark.parametrize("meshes, changed, words", [
    ((None,), {}, ["rank 0 was given no mesh (None)"]),
    ((None, None, None), {}, ["rank 0 was given no mesh", "nor was any other rank"]),
    ((None, MESH, MESH), {}, ["rank 0 was given no mesh", "ranks 1, 2 were given one"]),
    ((MESH, MESH, None), {}, ["rank 2 was given no mesh", "ranks 0, 1 were given one"]),
    ((MESH, rectangle(4, 3)), {}, ["rank 1 was given another mesh (20 points"]),
    ((MESH, rectangle(3, 3, bounds=(0, 2, 0, 1))), {}, ["rank 1 was given another mesh",
                                                        "other coordinates or cells"]),
    ((MESH, "mesh.npz"), {}, ["got str on rank 1"]),
    ((MESH, None), {1: {"refine": 2}}, ["refine=k with the mesh on rank 0 only",
                                         "rank 1 asked for refine=2"]),
    ((MESH, None, None), {0: {"refine": 1}, 1: {"refine": 1}, 2: {"refine": 1}},
     ["ranks 0, 1, 2 asked"]),
    ((MESH, None), {1: {"coarse": "constants"}}, ["rank 1 was called with coarse='constants'",
                                                   "rank 0 with coarse=None"]),
    ((MESH, MESH), {1: {"rtol": 1e-8}}, ["rtol=1e-08"]),
])
def test_inconsistent_input_is_named(meshes, changed, words):
    with pytest.raises(InputError) as info:
        input_mode(_seen(meshes, changed))
    assert all(w in str(info.value) for w in words), str(info.value)


def test_statuses_pickle_small():
    # they travel by allgather on every call: a few hundred bytes, not the mesh
    assert len(pickle.dumps(input_status(rectangle(50, 50), OPTIONS))) < 600


# -- under mpiexec ------------------------------------------------------------------------------

from test_distributed import needs_mpi, run_mpi  # noqa: E402


@needs_mpi
@pytest.mark.parametrize("ranks", [2, 3])  # one rank has nothing to scatter (replicated)
def test_mpi_scatter_checks(ranks):
    code, out, err = run_mpi(ranks, [sys.executable, str(HERE / "mpi_scatter_checks.py")])
    print(out)
    assert code == 0, f"exit {code}\n{out}\n{err}"
    assert f"all 6 checks passed on {ranks} ranks" in out
