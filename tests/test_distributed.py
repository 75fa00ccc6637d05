"""hatkernels.distributed: the pure parts in this process, the MPI parts through mpiexec.

Partitioning, subdomain extraction, local assembly, halo patterns and the
coarse space are plain NumPy and are checked here against the whole-mesh
(serial) objects.  Everything that needs MPI runs in tests/mpi_checks.py
under ``mpiexec -n 2`` and ``-n 3`` (oversubscribed on a 2-core machine),
started from here with a timeout so that a hung rank cannot hang the suite.
mpi4py is never imported in this process.
"""

import importlib.util
import json
import os
import shutil
import signal
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg as sl
import scipy.sparse as sp
from conftest import EPS
from mpi_checks import dense_preconditioners

import hatkernels
from hatkernels import io as kio
from hatkernels.coefficients import parse_coefficient
from hatkernels.distributed import (
    HaloPattern,
    partition,
    partition_from_owner,
    ranks_from_environment,
    subdomain,
)
from hatkernels.distributed.assembly import assemble_local, reduce_local, rows_in_global
from hatkernels.distributed.cg import condition_estimate
from hatkernels.distributed.launch import rank_from_environment
from hatkernels.distributed.matrix import split_columns
from hatkernels.distributed.precond import coarse_row, galerkin_coarse
from hatkernels.distributed.solve import _local_boundary
from hatkernels.distributed.subdomain import local_coefficient, parse_local
from hatkernels.errors import InputError
from hatkernels.mesh import ball, cuboid, disk, l_shape, rectangle
from hatkernels.problem import PoissonProblem

HERE = Path(__file__).resolve().parent
#: Seconds an mpiexec run may take before it is killed (cold numba caches included).
MPI_TIMEOUT = 300


def built_in_meshes():
    return {"rectangle": rectangle(24, 16), "l_shape": l_shape(10), "disk": disk(10)}


def larger_built_in_meshes():
    return {"rectangle": rectangle(96, 64), "l_shape": l_shape(40), "disk": disk(40)}


# -- partitioning -------------------------------------------------------------------


@pytest.mark.parametrize("method", ["rcb", "hilbert"])
@pytest.mark.parametrize("size", ["small", "larger"])
@pytest.mark.parametrize("name", ["rectangle", "l_shape", "disk"])
def test_partition_balance_and_interface(name, size, method):
    mesh = (built_in_meshes() if size == "small" else larger_built_in_meshes())[name]
    e = mesh.edges()
    for parts in (2, 3, 4):
        p = partition(mesh, parts, method=method)
        q = p.quality()
        assert p.counts().sum() == mesh.n_points
        # the bound on imbalance (max / mean - 1), for the owned points and for
        # the stored entries of the owned rows (the product's work), counted here
        assert q.imbalance < 0.05, (parts, q)
        degree = np.bincount(e.ravel(), minlength=mesh.n_points) + 1
        entries = np.bincount(p.owner, weights=degree, minlength=parts)
        assert q.owned_entries.tolist() == entries.astype(int).tolist()
        assert entries.max() / entries.mean() - 1 < 0.05, (parts, q)
        # interface points by the definition, counted independently of the library
        # (common practice, no source): ends of edges whose ends have different owners
        cut = p.owner[e[:, 0]] != p.owner[e[:, 1]]
        assert q.interface_points == len(np.unique(e[cut])) > 0
        assert q.cut_edges == int(cut.sum())
        subs = [subdomain(p, k) for k in range(parts)]
        assert q.ghosts.tolist() == [s.n_ghosts for s in subs]
        assert q.triangles.tolist() == [len(s.triangles) for s in subs]
        assert q.neighbours.tolist() == [len(s.neighbours) for s in subs]
        print(f"{name} {method} P={parts}: {q}")


def test_partition_by_triangle_weight_balances_incidences():
    mesh = disk(12)
    w = np.bincount(mesh.triangles.ravel(), minlength=mesh.n_points)
    for method in ("rcb", "hilbert"):
        p = partition(mesh, 3, method=method, weight="triangles")
        per_part = np.bincount(p.owner, weights=w, minlength=3)
        assert per_part.max() / per_part.mean() - 1 < 0.05


def test_partition_is_deterministic_and_input_untouched():
    mesh = l_shape(8)
    before = mesh.points.copy()
    a, b = partition(mesh, 3), partition(mesh, 3)
    assert np.array_equal(a.owner, b.owner)
    assert np.array_equal(mesh.points, before)
    assert not a.owner.flags.writeable


def test_partition_bad_input():
    mesh = rectangle(2, 2)
    with pytest.raises(InputError, match="cannot split 9 points into 10 parts"):
        partition(mesh, 10)
    with pytest.raises(InputError, match="unknown partition method"):
        partition(mesh, 2, method="metis")
    with pytest.raises(InputError, match="owner\\[3\\] = -1"):
        partition_from_owner(mesh, np.array([0, 0, 0, -1, 1, 1, 1, 1, 1]))
    with pytest.raises(InputError, match="part 1 owns no point"):
        partition_from_owner(mesh, np.array([0] * 8 + [2]))
    with pytest.raises(InputError, match="parts must be >= 1"):
        partition(mesh, 0)


def test_every_part_gets_a_point_even_when_tiny():
    mesh = rectangle(1, 1)  # 4 points
    for method in ("rcb", "hilbert"):
        assert partition(mesh, 4, method=method).counts().tolist() == [1, 1, 1, 1]


def _edges_by_definition(mesh):
    """Unique (low, high) point pairs of the cells' vertex pairs (numpy only)."""
    c = mesh.cells.astype(np.int64)
    k = c.shape[1]
    i, j = np.triu_indices(k, 1)
    pairs = np.sort(np.stack([c[:, i].ravel(), c[:, j].ravel()], axis=1), axis=1)
    return np.unique(pairs, axis=0)


@pytest.mark.parametrize("method", ["rcb", "hilbert"])
@pytest.mark.parametrize("name", ["cuboid", "ball"])
def test_partition_of_tetrahedra_balance_and_interface(name, method):
    mesh = cuboid(9, 7, 6) if name == "cuboid" else ball(4)
    e = _edges_by_definition(mesh)
    for parts in (2, 3, 4):
        p = partition(mesh, parts, method=method)
        q = p.quality()
        assert q.dim == 3 and "triangles" not in q.as_dict()
        assert q.imbalance < 0.05, (parts, q)  # the same bound as on triangles
        degree = np.bincount(e.ravel(), minlength=mesh.n_points) + 1
        entries = np.bincount(p.owner, weights=degree, minlength=parts)
        assert q.owned_entries.tolist() == entries.astype(int).tolist()
        # interface and cut edges by their definitions, from edges found independently of
        # the library (common practice, no source)
        cut = p.owner[e[:, 0]] != p.owner[e[:, 1]]
        assert q.interface_points == len(np.unique(e[cut])) > 0
        assert q.cut_edges == int(cut.sum())
        subs = [subdomain(p, k) for k in range(parts)]
        assert q.ghosts.tolist() == [s.n_ghosts for s in subs]
        assert q.cells.tolist() == [len(s.cells) for s in subs]
        assert q.neighbours.tolist() == [len(s.neighbours) for s in subs]
        for k, s in enumerate(subs):
            touching = np.flatnonzero((p.owner[mesh.cells] == k).any(axis=1))
            assert np.array_equal(s.cells, touching)
            assert np.array_equal(s.points[s.mesh.cells], mesh.cells[s.cells])
        print(f"{name} {method} P={parts}: {q}")
    w = np.bincount(mesh.cells.ravel(), minlength=mesh.n_points)
    per_part = np.bincount(partition(mesh, 3, method=method, weight="cells").owner, weights=w,
                           minlength=3)
    assert per_part.max() / per_part.mean() - 1 < 0.05
    with pytest.raises(InputError, match="weight 'triangles' is for triangle meshes"):
        partition(mesh, 2, weight="triangles")
    with pytest.raises(InputError, match="Subdomain.triangles is not available for tetrahedra"):
        subdomain(partition(mesh, 2), 0).triangles  # noqa: B018


def test_rcb_cuts_across_the_longest_side_in_space():
    # a long box along z: the first cut of two parts is a plane z = constant (common
    # practice, no source: recursive bisection across the longest side)
    mesh = cuboid(3, 3, 11, bounds=(0, 1, 0, 1, 0, 4))  # 12 layers of points: 6 each
    z = mesh.points[:, 2]
    owner = partition(mesh, 2).owner
    assert z[owner == 0].max() < z[owner == 1].min()


# -- subdomains, local assembly, halo patterns -------------------------------------


@pytest.mark.parametrize("name", ["rectangle", "l_shape", "disk"])
def test_owned_rows_equal_the_whole_mesh_rows_bit_for_bit(name):
    mesh = built_in_meshes()[name]
    rng = np.random.default_rng(5)
    kappa = parse_coefficient(1 + rng.random(mesh.n_triangles), mesh, tensor=True)
    load = parse_coefficient(lambda x, y: np.cos(x) * y, mesh, sign="any")
    react = parse_coefficient(hatkernels.per_point(rng.random(mesh.n_points)), mesh,
                              sign="nonnegative")
    assembler = hatkernels.StiffnessAssembler(mesh, by_rows=True)  # the serial row order
    A = assembler.assemble(kappa) + assembler.assemble_mass(react)
    b = hatkernels.assemble_load(mesh, load)
    p = partition(mesh, 3)
    for k in range(3):
        s = subdomain(p, k)
        A_L, b_L, _ = assemble_local(s, kappa=local_coefficient(kappa, s),
                                     f=local_coefficient(load, s),
                                     reaction=local_coefficient(react, s))
        mine = rows_in_global(A_L[: s.n_owned], s.points, mesh.n_points)
        # reference: the project's serial csr assembly of the whole mesh (itself checked
        # against the reference strategy and the 5-point stencil in tests/test_assembly.py)
        ref = sp.csr_matrix(A[s.owned])
        ref.sort_indices()
        assert np.array_equal(mine.indices, ref.indices)
        assert np.array_equal(mine.data, ref.data)  # same bits: same triangles, same order
        assert np.array_equal(b_L[: s.n_owned], b[s.owned])


@pytest.mark.parametrize("method", ["rcb", "hilbert"])
def test_owned_rows_equal_the_whole_mesh_rows_on_tetrahedra(method):
    mesh = cuboid(5, 4, 6)
    rng = np.random.default_rng(5)
    kappa = parse_coefficient(1 + rng.random(mesh.n_cells), mesh, tensor=True)
    load = parse_coefficient(lambda x, y, z: np.cos(x) * y + z, mesh, sign="any")
    react = parse_coefficient(hatkernels.per_point(rng.random(mesh.n_points)), mesh,
                              sign="nonnegative")
    faces = mesh.boundary_faces()
    x = mesh.points[:, 0]
    right = faces[(x[faces] == 1).all(axis=1)]
    r = lambda x, y, z: 1 + x * y  # noqa: E731
    s_face = hatkernels.per_point(rng.random(mesh.n_points))
    h_face = hatkernels.per_edge(rng.random(len(faces)))  # one value per face
    assembler = hatkernels.StiffnessAssembler(mesh)
    A = assembler.assemble(kappa) + assembler.assemble_mass(react)
    b = hatkernels.assemble_load(mesh, load)
    # reference: the project's serial assembly of the whole mesh (stiffness checked against
    # the 7-point stencil and pyamg in tests/test_assembly3d.py, face terms in their tests)
    KR = sp.csr_matrix(assembler.assemble(kappa) + hatkernels.assemble_boundary_mass(mesh, r,
                                                                                      right))
    zero = parse_coefficient(0.0, mesh, sign="any")
    g = (hatkernels.assemble_boundary_load(mesh, s_face, right)
         + hatkernels.assemble_boundary_load(mesh, h_face, faces))
    p = partition(mesh, 3, method=method)
    problem = PoissonProblem(mesh, 1.0, dirichlet_on=[0], neumann=(faces, h_face),
                             robin=(right, r, s_face))
    for k in range(3):
        s = subdomain(p, k)
        nb, rb = _local_boundary(s, problem)
        A_L, b_L, has_robin = assemble_local(s, kappa=local_coefficient(kappa, s),
                                             f=local_coefficient(load, s),
                                             reaction=local_coefficient(react, s))
        mine = rows_in_global(A_L[: s.n_owned], s.points, mesh.n_points)
        ref = sp.csr_matrix(A[s.owned])
        ref.sort_indices()
        assert np.array_equal(mine.indices, ref.indices)
        assert np.array_equal(mine.data, ref.data)  # same bits: same cells, same order
        assert np.array_equal(b_L[: s.n_owned], b[s.owned])
        # the face terms: the same sums, to round-off (scipy sums the duplicates of a face
        # matrix in an order that depends on the numbering)
        F_L, g_L, has_robin = assemble_local(s, kappa=local_coefficient(kappa, s),
                                             f=local_coefficient(zero, s), neumann=nb, robin=rb)
        mine = rows_in_global(F_L[: s.n_owned], s.points, mesh.n_points)
        assert has_robin == bool(np.isin(s.owned, right).any())
        assert abs(mine - KR[s.owned]).max() <= 8 * EPS * abs(KR).max()
        assert np.abs(g_L[: s.n_owned] - g[s.owned]).max() <= 8 * EPS * np.abs(g).max()


def test_subdomain_layout():
    mesh = disk(8)
    p = partition(mesh, 3, method="hilbert")
    owners_seen = np.zeros(mesh.n_points, dtype=int)
    for k in range(3):
        s = subdomain(p, k)
        owners_seen[s.owned] += 1
        assert np.all(p.owner[s.owned] == k)
        assert np.all(np.diff(s.owned) > 0)
        assert np.all(np.diff(s.ghost_owner) >= 0) and np.all(s.ghost_owner != k)
        touching = np.flatnonzero((p.owner[mesh.triangles] == k).any(axis=1))
        assert np.array_equal(s.triangles, touching)
        # local triangles are the global ones renumbered
        assert np.array_equal(s.points[s.mesh.triangles], mesh.triangles[s.triangles])
    assert np.all(owners_seen == 1)


def _global_messages(p, patterns, subs, n_ids):
    """(sender, receiver) -> global numbers sent, and -> global numbers expected."""
    sent, expected = {}, {}
    for r, (pat, ids) in enumerate(zip(patterns, n_ids, strict=True)):
        for k, q in enumerate(pat.neighbours):
            sent[r, int(q)] = ids[pat.send[k]]
            lo, hi = pat.recv_offsets[k], pat.recv_offsets[k + 1]
            expected[int(q), r] = ids[pat.n_owned + lo: pat.n_owned + hi]
    return sent, expected


@pytest.mark.parametrize("method", ["rcb", "hilbert"])
@pytest.mark.parametrize("name", ["l_shape", "cuboid"])
def test_halo_patterns_match_across_parts(method, name):
    # What rank r sends to q is, in order, what q expects from r: before and after
    # the Dirichlet points are taken out (the restricted patterns).
    mesh = l_shape(9) if name == "l_shape" else cuboid(6, 5, 4)
    P = 4
    p = partition(mesh, P, method=method)
    subs = [subdomain(p, k) for k in range(P)]
    pats = [HaloPattern.from_subdomain(s) for s in subs]
    sent, expected = _global_messages(p, pats, subs, [s.points for s in subs])
    assert sent.keys() == expected.keys() and sent
    for key in sent:
        assert np.array_equal(sent[key], expected[key]), key
    fixed = np.zeros(mesh.n_points, dtype=bool)
    fixed[mesh.boundary_points()] = True
    restricted = [pat.restrict(~fixed[s.points]) for pat, s in zip(pats, subs, strict=True)]
    ids = [s.points[~fixed[s.points]] for s in subs]
    sent, expected = _global_messages(p, restricted, subs, ids)
    assert sent.keys() == expected.keys()
    for key in sent:
        assert np.array_equal(sent[key], expected[key]), key
        assert not fixed[sent[key]].any()


def test_reduced_rows_rebuild_the_serial_reduced_system():
    mesh = rectangle(12, 9)
    kappa = parse_coefficient(None, mesh, tensor=True)
    load = parse_coefficient(1.0, mesh, sign="any")
    A = hatkernels.assemble_stiffness(mesh)
    g = mesh.points[:, 0] + 1.0
    fixed = mesh.boundary_points()
    system = hatkernels.apply_dirichlet(A, hatkernels.assemble_load(mesh, 1.0), fixed, g[fixed])
    pos = np.full(mesh.n_points, -1)
    pos[system.free] = np.arange(len(system.free))
    p = partition(mesh, 3)
    rows, rhs = [], np.zeros(len(system.free))
    for k in range(3):
        s = subdomain(p, k)
        A_L, b_L, _ = assemble_local(s, kappa=local_coefficient(kappa, s),
                                     f=local_coefficient(load, s))
        loc = s.local_numbers(fixed, mesh.n_points)
        local = reduce_local(s, A_L, b_L, loc[loc >= 0], g[fixed][loc >= 0])
        own = pos[local.free_points[: local.n_unknowns]]
        A_oo, A_og = split_columns(local.A, local.n_unknowns)
        assert A_oo.shape == (local.n_unknowns, local.n_unknowns)
        C = rows_in_global(sp.hstack([A_oo, A_og], format="csr"), pos[local.free_points],
                           len(system.free))
        rows.append(sp.csr_matrix((C.data, C.indices, C.indptr), shape=C.shape)[np.argsort(own)])
        rhs[own] = local.b
        u = local.expand(np.zeros(local.n_unknowns))
        assert np.array_equal(u[local.owned_fixed], g[s.owned][local.owned_fixed])
    # every reduced row is somebody's owned row, and the lifting moved g to the right side
    # (reference: hatkernels.apply_dirichlet on the whole system, tested in test_dirichlet.py)
    order = np.concatenate([np.sort(pos[subdomain(p, k).owned][pos[subdomain(p, k).owned] >= 0])
                            for k in range(3)])
    whole = sp.vstack(rows, format="csr")
    assert abs(whole - system.A[order]).max() < 1e-14
    assert np.abs(rhs - system.b).max() < 1e-14


def test_local_coefficient_kinds_and_global_names_in_errors():
    mesh = rectangle(6, 6)
    s = subdomain(partition(mesh, 2), 1)
    per_tri = np.arange(mesh.n_triangles, dtype=float) + 1
    c = local_coefficient(parse_coefficient(per_tri, mesh), s)
    assert np.array_equal(c.value, per_tri[s.triangles])
    c = local_coefficient(parse_coefficient(hatkernels.per_point(np.arange(49.0) + 1), mesh), s)
    assert np.array_equal(c.value, np.arange(49.0)[s.points] + 1)
    K = np.tile(np.eye(2), (mesh.n_triangles, 1, 1)) * per_tri[:, None, None]
    c = local_coefficient(parse_coefficient(K, mesh, tensor=True), s)
    assert c.value.shape == (len(s.triangles), 2, 2)
    bad = parse_local(lambda x, y: np.where(x > 0.9, -1.0, 1.0), mesh, s, name="coefficient",
                      tensor=True)
    with pytest.raises(InputError, match=r"quadrature point of triangle (\d+)") as info:
        assemble_local(s, kappa=bad, f=parse_local(1.0, mesh, s, name="f", sign="any"))
    k = int(info.value.args[0].split("triangle ")[1].split(";")[0])
    assert mesh.points[mesh.triangles[k]][:, 0].max() > 0.9  # a global triangle number


def test_errors_on_tetrahedra_name_global_cells_and_faces():
    mesh = cuboid(5, 5, 5)
    s = subdomain(partition(mesh, 2), 1)
    bad = parse_local(lambda x, y, z: np.where(x > 0.9, -1.0, 1.0), mesh, s, name="coefficient",
                      tensor=True)
    with pytest.raises(InputError, match=r"quadrature point of tetrahedron (\d+)") as info:
        assemble_local(s, kappa=bad, f=parse_local(1.0, mesh, s, name="f", sign="any"))
    k = int(info.value.args[0].split("tetrahedron ")[1].split(";")[0])
    assert mesh.points[mesh.cells[k]][:, 0].max() > 0.9  # a global tetrahedron number
    faces = mesh.boundary_faces()
    problem = PoissonProblem(mesh, 1.0, dirichlet_on=[0],
                             neumann=(faces, lambda x, y, z: np.where(z > 0.9, np.nan, 1.0)))
    nb, _ = _local_boundary(s, problem)
    with pytest.raises(InputError, match=r"quadrature point of face (\d+)") as info:
        assemble_local(s, kappa=parse_local(None, mesh, s, name="k", tensor=True),
                       f=parse_local(1.0, mesh, s, name="f", sign="any"), neumann=nb)
    text = info.value.args[0]
    k = int(text.split("face ")[1].split(";")[0])
    at = np.array([float(c) for c in text.split(" at (")[1].split(")")[0].split(",")])
    # a global face number: the face of the whole mesh that holds the quadrature point named
    corners = mesh.points[faces[k]]
    assert at[2] > 0.9
    assert np.all(at >= corners.min(axis=0) - 1e-12) and np.all(at <= corners.max(axis=0) + 1e-12)
    normal = np.cross(corners[1] - corners[0], corners[2] - corners[0])
    assert abs(normal @ (at - corners[0])) <= 1e-12


# -- coarse space ----------------------------------------------------------------------


def _reduced(mesh, fixed):
    A = hatkernels.assemble_stiffness(mesh)
    return hatkernels.apply_dirichlet(A, hatkernels.assemble_load(mesh, 1.0), fixed)


def test_galerkin_coarse_matrix_equals_dense_product():
    mesh = disk(8)
    fixed = mesh.boundary_points()
    system = _reduced(mesh, fixed)
    P = 4
    p = partition(mesh, P)
    rows, cols, vals = [], [], []
    for k in range(P):
        s = subdomain(p, k)
        A_L, b_L, _ = assemble_local(s, kappa=parse_local(None, mesh, s, name="k", tensor=True),
                                     f=parse_local(1.0, mesh, s, name="f", sign="any"))
        loc = s.local_numbers(fixed, mesh.n_points)
        local = reduce_local(s, A_L, b_L, loc[loc >= 0], 0.0)
        A_oo, A_og = split_columns(local.A, local.n_unknowns)
        ghost_owner = np.repeat(local.pattern.neighbours, local.pattern.recv_counts)
        c, v = coarse_row(A_oo, A_og, ghost_owner, k)
        rows += [k] * len(c)
        cols += c.tolist()
        vals += v.tolist()
    Ac, empty = galerkin_coarse(np.array(rows), np.array(cols), np.array(vals), P)
    # reference: R A R^T with dense numpy products (common practice, no source)
    owner = p.owner[system.free]
    R = np.zeros((P, len(owner)))
    R[owner, np.arange(len(owner))] = 1.0
    ref = R @ system.A.toarray() @ R.T
    assert not empty.any()
    assert np.abs(Ac.toarray() - ref).max() <= 1e-12 * np.abs(ref).max()
    assert np.array_equal(Ac.toarray(), Ac.toarray().T)


def test_galerkin_coarse_handles_a_subdomain_without_unknowns():
    Ac, empty = galerkin_coarse(np.array([0, 0, 2, 2]), np.array([0, 2, 0, 2]),
                                np.array([2.0, -1.0, -1.0, 2.0]), 3)
    assert empty.tolist() == [False, True, False]
    assert Ac.toarray().tolist() == [[2, 0, -1], [0, 1, 0], [-1, 0, 2]]


def test_two_level_condition_number_stays_bounded_block_jacobi_grows():
    # Additive Schwarz with a coarse space: kappa <= C (1 + H/delta) independently of the
    # number of subdomains; one level: kappa grows like 1/(H delta) (A. Toselli and
    # O. Widlund, Domain Decomposition Methods, Springer 2005, chapter 3; value from
    # memory for the form of the bounds).  Eigenvalues by scipy.linalg.eigh (reference
    # library: scipy), Dirichlet on one edge only so that subdomains float.
    mesh = rectangle(14, 14)
    left = np.flatnonzero(mesh.points[:, 0] == 0)
    system = _reduced(mesh, left)
    Af, free = system.A.toarray(), system.free
    one, two = [], []
    with hatkernels.threads(1):  # numba's idle OpenMP threads slow OpenBLAS down six times
        for P in (2, 4, 8, 16):
            one_level, two_level = dense_preconditioners(Af, partition(mesh, P).owner[free], P)
            for M, out in ((one_level, one), (two_level, two)):
                ev = sl.eigh(Af, np.linalg.inv(M), eigvals_only=True)
                out.append(ev[-1] / ev[0])
    assert one[-1] > 3 * one[0]           # block Jacobi degrades with P
    assert max(two) < 1.5 * min(two)      # the two-level method does not
    assert two[-1] < one[-1] / 4


def test_condition_estimate_from_cg_coefficients():
    # CG on diag(1..100): the Lanczos estimate converges to the true ratio 100
    # (Golub and Van Loan, Matrix Computations, 1996, section 10.2)
    d = np.arange(1.0, 101.0)
    b = np.ones(100)
    x, r = np.zeros(100), b.copy()
    p, rr = r.copy(), r @ r
    alphas, betas = [], []
    for _ in range(60):
        q = d * p
        a = rr / (p @ q)
        x += a * p
        r -= a * q
        rr_new = r @ r
        alphas.append(a)
        betas.append(rr_new / rr)
        p = r + betas[-1] * p
        rr = rr_new
    assert abs(condition_estimate(alphas, betas[:-1]) - 100.0) < 1.0
    assert np.isnan(condition_estimate([], []))


# -- launcher environment ------------------------------------------------------------------


def test_ranks_from_environment():
    assert ranks_from_environment({}) == 1
    assert ranks_from_environment({"PMI_SIZE": "4", "PMI_RANK": "2"}) == 4
    assert rank_from_environment({"PMI_SIZE": "4", "PMI_RANK": "2"}) == 2
    assert ranks_from_environment({"OMPI_COMM_WORLD_SIZE": "3"}) == 3
    assert ranks_from_environment({"PMI_SIZE": "junk"}) == 1


def test_distributed_solve_takes_every_serial_argument():
    # "the same arguments as the serial one": names, kinds and defaults (common practice,
    # no source); the extra ones are keyword-only
    import inspect

    from hatkernels.distributed import solve_poisson as distributed

    serial = inspect.signature(hatkernels.solve_poisson).parameters
    ours = inspect.signature(distributed).parameters
    for name, param in serial.items():
        assert name in ours, f"distributed solve_poisson lacks {name!r}"
        assert ours[name].kind == param.kind, name
        if name != "preconditioner":  # None: multigrid on refinements, else the serial default
            assert ours[name].default == param.default, name
    assert ours["preconditioner"].default is None
    for name in ours.keys() - serial.keys():
        assert ours[name].kind == inspect.Parameter.KEYWORD_ONLY, name


def test_import_does_not_need_mpi4py():
    code = ("import sys, hatkernels, hatkernels.distributed, hatkernels.cli; "
            "print('mpi4py' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "False"


# -- under mpiexec ---------------------------------------------------------------------------


def _mpiexec():
    here = Path(sys.executable).parent / "mpiexec"
    return str(here) if here.exists() else shutil.which("mpiexec")


MPI_MISSING = None
if importlib.util.find_spec("mpi4py") is None:
    MPI_MISSING = "mpi4py is not installed (pip install '.[mpi]')"
elif _mpiexec() is None:
    MPI_MISSING = "no mpiexec next to this python or on PATH"
needs_mpi = pytest.mark.skipif(MPI_MISSING is not None, reason=MPI_MISSING or "")


def run_mpi(ranks, args, cwd=None, timeout=MPI_TIMEOUT):
    """``mpiexec -n ranks`` + args, killed with its whole process group on timeout."""
    env = dict(os.environ)
    env["OMPI_MCA_rmaps_base_oversubscribe"] = "1"  # Open MPI: allow more ranks than cores
    env["PYTHONPATH"] = str(HERE.parent) + os.pathsep + env.get("PYTHONPATH", "")
    proc = subprocess.Popen([_mpiexec(), "-n", str(ranks), *args], cwd=cwd, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)
    try:
        out, err = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        out, err = proc.communicate()
        pytest.fail(f"mpiexec -n {ranks} did not finish in {timeout} s\n{out}\n{err}")
    return proc.returncode, out, err


@needs_mpi
@pytest.mark.parametrize("ranks", [2, 3])
def test_mpi_checks(ranks):
    code, out, err = run_mpi(ranks, [sys.executable, str(HERE / "mpi_checks.py")])
    print(out)
    assert code == 0, f"exit {code}\n{out}\n{err}"
    assert f"all 13 checks passed on {ranks} ranks" in out


@needs_mpi
def test_a_replicated_refinement_that_does_not_fit_is_refused_on_every_rank(tmp_path):
    # every rank of the replicated path refines the whole mesh: the two ranks on this node
    # are checked together (twice one rank's need) and both refuse before refining
    script = tmp_path / "refine.py"
    script.write_text(
        "import hatkernels, hatkernels.memory as m\n"
        "from hatkernels.distributed import solve_poisson\n"
        "from hatkernels.mesh import rectangle\n"
        "from mpi4py import MPI\n"
        "mesh = rectangle(20, 20)\n"
        "one = m.refine_bytes(mesh, 2)[1]\n"
        "m.available_bytes = lambda: int(1.5 * one)  # room for one copy, not two\n"
        "try:\n"
        "    solve_poisson(mesh, 1.0, refine=2, preconditioner='amg')\n"
        "except hatkernels.InputError as exc:\n"
        "    print(f'rank {MPI.COMM_WORLD.Get_rank()} refused: {exc}')\n"
    )
    code, out, err = run_mpi(2, [sys.executable, str(script)], timeout=120)
    assert code == 0, f"{out}\n{err}"
    for rank in (0, 1):
        assert f"rank {rank} refused: not enough memory: refining the mesh (800 triangles) " \
               "2 times gives 12,800 triangles" in out
    assert "2 ranks on this node building them each" in out


@needs_mpi
def test_mpi_checks_failure_aborts_every_rank(tmp_path):
    # one rank raises while the other waits in a collective: the hook must end both
    script = tmp_path / "fail.py"
    script.write_text(
        f"import sys; sys.path.insert(0, {str(HERE)!r})\n"
        "import mpi_checks\n"
        "from mpi4py import MPI\n"
        "mpi_checks._install_abort_hook(MPI)\n"
        "if MPI.COMM_WORLD.Get_rank() == 1:\n"
        "    raise RuntimeError('deliberate failure on rank 1')\n"
        "MPI.COMM_WORLD.Barrier()\n"
    )
    code, out, err = run_mpi(2, [sys.executable, str(script)], timeout=120)
    assert code != 0
    assert "deliberate failure on rank 1" in err


@needs_mpi
def test_command_under_mpiexec_matches_the_serial_command(tmp_path):
    args = ["solve", "--cells", "48", "--quiet"]
    code, out, err = run_mpi(2, [sys.executable, "-m", "hatkernels.cli", *args, "--out",
                                 str(tmp_path / "mpi")], cwd=tmp_path)
    assert code == 0, f"{out}\n{err}"
    assert out.count("hatkernels solve:") == 1  # only rank 0 prints
    for text in ("rank 0 ", "rank 1 ", "partition", "communication", "CAUTION"):
        assert text in out, text
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        serial = subprocess.run([sys.executable, "-m", "hatkernels.cli", *args, "--out",
                                 str(tmp_path / "serial")], capture_output=True, text=True,
                                cwd=tmp_path, timeout=MPI_TIMEOUT)
    assert serial.returncode == 0, serial.stderr
    a = kio.read_solution(str(tmp_path / "mpi" / "solution.npz"))
    b = kio.read_solution(str(tmp_path / "serial" / "solution.npz"))
    ua, ub = a.point_data["u"], b.point_data["u"]
    assert np.abs(ua - ub).max() <= 1e-8 * np.abs(ub).max()
    summary = json.loads((tmp_path / "mpi" / "summary.json").read_text())
    assert summary["distributed"]["ranks"] == 2
    assert len(summary["distributed"]["balance"]) == 2
    assert summary["command"].startswith("mpiexec -n 2 hatkernels solve")


@needs_mpi
def test_command_under_mpiexec_bad_usage_exits_2_once(tmp_path):
    code, out, err = run_mpi(2, [sys.executable, "-m", "hatkernels.cli", "solve", "--cells", "24",
                                 "--refine", "1", "--out", str(tmp_path / "x")], cwd=tmp_path)
    assert code == 2
    assert err.count("hatkernels: error:") == 1
