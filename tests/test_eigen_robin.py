"""eigenmodes with a Robin term: kappa du/dn + r u = 0 on some sides.

The reference is the slab with linear heat transfer at its faces (H. S.
Carslaw and J. C. Jaeger, Conduction of Heat in Solids, 2nd ed., 1959,
chapter III): on 0 < x < L with kappa = rho = 1, insulated at x = 0 and
du/dx + h u = 0 at x = L, the modes are cos(beta x / L) with

    beta tan(beta) = Bi,   Bi = h L,   lambda = (beta / L)^2;

held at x = 0 instead, they are sin(beta x / L) with beta cot(beta) = -Bi.
The roots come from scipy.optimize.brentq, one per branch of tan.  A thin
strip (width L / 20) is the slab: its modes that vary across the strip lie
above (pi / width)^2.  P1 eigenvalues approach the exact ones from above at
order 2 (I. Babuska and J. Osborn, Eigenvalue problems, Handbook of
Numerical Analysis II, 1991).
"""

import numpy as np
import pytest
from scipy.optimize import brentq

from hatkernels import InputError, threads
from hatkernels.assembly import assemble_mass
from hatkernels.eigen import eigenmodes
from hatkernels.mesh import cuboid, rectangle
from hatkernels.mesh.tags import label_sides

BI = 2.0


@pytest.fixture(autouse=True)
def one_thread():
    with threads(1):
        yield


def tan_roots(count, bi):
    """The smallest roots of beta tan(beta) = bi (bi > 0), one in each (j pi, j pi + pi/2)."""
    return np.array([brentq(lambda b: b * np.tan(b) - bi, j * np.pi + 1e-12,
                            j * np.pi + np.pi / 2 - 1e-12) for j in range(count)])


def cot_roots(count, bi):
    """The smallest roots of beta cot(beta) = -bi (bi > 0), one in each (j pi + pi/2, (j+1) pi)."""
    return np.array([brentq(lambda b: b * np.cos(b) + bi * np.sin(b), j * np.pi + np.pi / 2,
                            (j + 1) * np.pi - 1e-12) for j in range(count)])


def strip(n, length=1.0):
    return rectangle(n, max(1, n // 20), bounds=(0.0, length, 0.0, length / 20))


def end_edges(mesh, x):
    e = mesh.boundary_edges()
    return e[(mesh.points[e][:, :, 0] == x).all(axis=1)]


def check_from_above_at_order_two(values, exact):
    errors = np.asarray(values) - exact
    assert (errors > 0).all()
    rate = np.log2(errors[-2] / errors[-1])
    assert np.all((1.85 < rate) & (rate < 2.15)), rate


def test_slab_insulated_and_cooled_against_carslaw_and_jaeger():
    # beta tan beta = Bi: Carslaw and Jaeger, 1959, chapter III; the load s = 3 of the Robin
    # pair moves the steady state only and must not change the modes
    L = 2.0
    exact = (tan_roots(3, BI * L) / L) ** 2
    values = []
    for n in (20, 40, 80):
        mesh = strip(n, L)
        modes = eigenmodes(mesh, 3, dirichlet_on=(), robin=(end_edges(mesh, L), BI, 3.0))
        assert not modes.zero_modes.any()  # the cooled end holds the constant
        values.append(modes.values)
    check_from_above_at_order_two(values, exact)


def test_slab_held_and_cooled_by_lobpcg_on_a_refined_mesh():
    # beta cot beta = -Bi (Carslaw and Jaeger, 1959, chapter III); lobpcg with the default
    # multigrid (every part holds a point), nested start with the Robin term carried down
    mesh = strip(20)
    for _ in range(3):
        mesh = mesh.refine()
    exact = cot_roots(3, BI) ** 2
    modes = eigenmodes(mesh, 3, dirichlet_on=end_edges(mesh, 0.0),
                       robin=(end_edges(mesh, 1.0), BI, 0.0), method="lobpcg", rtol=1e-10)
    assert modes.stats.method == "lobpcg" and modes.stats.levels[0][1] == 0  # nested start
    assert modes.stats.preconditioner  # the multigrid, named by the library
    # 160 cells along: the relative P1 error of beta^2 is about (beta h)^2 / 12 (the 1-D
    # stiffness-mass pencil; common practice, no source): 2.1e-4 for the third; twice that
    assert np.all(modes.values > exact)
    assert np.all(modes.values < exact * (1 + 5e-4)), modes.values / exact - 1


def test_slab_cooled_at_both_ends_by_tag_with_lobpcg_and_amg():
    # both faces of a slab 2L cooled: the symmetric modes of beta tan beta = Bi and the
    # antisymmetric ones of beta cot beta = -Bi, beta on the half-thickness L (Carslaw and
    # Jaeger, 1959, chapter III); nothing is held, so the stiffness alone is singular and
    # the multigrid cannot serve: amg on K + R, nested start from the coarse Robin term
    mesh = strip(20, 2.0)
    mesh = label_sides(mesh, {"left": lambda x, y: x == 0.0, "right": lambda x, y: x == 2.0})
    for _ in range(3):
        mesh = mesh.refine()
    exact = np.sort(np.concatenate([tan_roots(2, BI), cot_roots(2, BI)]) ** 2)[:3]
    modes = eigenmodes(mesh, 3, robin={"left": (BI, 1.0), "right": (BI, 0.0)},
                       method="lobpcg", rtol=1e-10)
    assert not modes.zero_modes.any() and modes.stats.levels[0][1] == 0  # nested start
    assert np.all(modes.values > exact)  # (beta h)^2 / 12 as above, twice it
    assert np.all(modes.values < exact * (1 + 5e-4)), modes.values / exact - 1
    with pytest.raises(InputError, match="singular here.*Robin"):
        eigenmodes(mesh, 2, robin={"left": (BI, 1.0), "right": (BI, 0.0)}, method="lobpcg",
                   preconditioner=next(iter(_mesh_preconditioners())))


def _mesh_preconditioners():
    from hatkernels import PRECONDITIONERS
    from hatkernels.precond import capabilities

    names = [n for n in PRECONDITIONERS if capabilities(n).needs_mesh]
    if not names:
        pytest.skip("no registered preconditioner needs the mesh")
    return names


def test_column_of_tetrahedra_cooled_on_top():
    # the same slab along z, cooled on its top face: beta tan beta = Bi (Carslaw and Jaeger,
    # 1959, chapter III), from above; (beta h)^2 / 12 = 1.1e-3 for the second, twice it
    mesh = cuboid(1, 1, 32, bounds=(0.0, 0.05, 0.0, 0.05, 0.0, 1.0))
    faces = mesh.boundary_faces()
    top = faces[(mesh.points[faces][:, :, 2] == 1.0).all(axis=1)]
    exact = tan_roots(2, BI) ** 2
    modes = eigenmodes(mesh, 2, dirichlet_on=(), robin=(top, BI, 0.0))
    assert np.all(modes.values > exact)
    assert np.all(modes.values < exact * (1 + 2.2e-3)), modes.values / exact - 1


def test_vectors_mass_orthonormal_and_zero_film_leaves_the_zero_mode():
    mesh = strip(40)
    right = end_edges(mesh, 1.0)
    modes = eigenmodes(mesh, 3, dirichlet_on=(), robin=(right, BI, 0.0), density=2.5)
    V = modes.vectors
    M = assemble_mass(mesh, 2.5)
    # M-orthonormal to round-off of a dense solve on 80 unknowns (common practice, no source)
    assert np.abs(V.T @ (M @ V) - np.eye(3)).max() < 1e-10
    # r = 0 on every side: nothing holds the constant, which stays a zero mode
    idle = eigenmodes(mesh, 2, dirichlet_on=(), robin=(right, 0.0, 4.0))
    assert idle.zero_modes.tolist() == [True, False] and idle.values[0] == 0.0


def test_bad_robin_input_is_named_and_inputs_are_kept():
    mesh = strip(20)
    right = end_edges(mesh, 1.0)
    kept = right.copy()
    with pytest.raises(InputError, match="boundary coefficient"):
        eigenmodes(mesh, 2, robin=(right, -1.0, 0.0))
    with pytest.raises(InputError, match="robin must be"):
        eigenmodes(mesh, 2, robin=(right, 1.0, 0.0, 0.0))
    with pytest.raises(InputError, match="boundary tag"):
        eigenmodes(mesh, 2, robin={"nowhere": (1.0, 0.0)})
    eigenmodes(mesh, 2, robin=(right, BI, 0.0))
    assert (right == kept).all()
