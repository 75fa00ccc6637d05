"""The patch product with its ring fused (hatkernels._jit.patch_product), what
:class:`hatkernels.patches.PatchOperator` multiplies with from 8 subdivisions up.

* against the stored assembly of the refined mesh (:func:`hatkernels.assemble_stiffness`
  on ``coarse.refine()`` repeated ``k`` times, an independent implementation over fine
  index arrays), with and without held sides;
* against the plain path, :func:`hatkernels._jit.patches.apply`, bit for bit: both make
  every row's sum term for term in the same order (the fused kernel exists for speed
  alone; ``bench/patches.py`` measures both);
* the same bits on 1 and 2 threads.

Coarse meshes are Delaunay meshes numbered at random, so cells meet their edges in both
directions (flipped sides) and in every local position.
"""

import numpy as np
import pytest
from conftest import jittered_mesh, meshes, refined, relative_error
from hypothesis import given, settings
from hypothesis import strategies as st
from test_threads import assert_same_bits, on_one_and_two_threads

import hatkernels as hk
from hatkernels._jit import patch_product, patches
from hatkernels.patches import PatchLayout, PatchOperator, element_stiffness

#: Relative agreement of two implementations of one linear operator (round-off ~1e-15).
IDENTITY = 1e-12


def both_paths(op, x):
    """``(fused, plain)``: the product by the fused kernel and by ``patches.apply``; each
    output starts as NaN, so a point either kernel leaves unwritten shows."""
    lay = op.layout
    fused, plain = np.full_like(x, np.nan), np.full_like(x, np.nan)
    patch_product.product(x, fused, op.n, op.K, lay.topo, lay.held_e, lay.held_v, op.masked,
                          op.pe, op.pv)
    patches.apply(x, plain, op.n, op.K, lay.topo, lay.held_e, lay.held_v, op.masked, op.pe,
                  op.pv, 0)
    return fused, plain


@settings(max_examples=8, deadline=None)
@given(coarse=meshes(min_n=2, max_n=4), k=st.integers(3, 5), seed=st.integers(0, 2**32 - 1))
def test_fused_product_equals_the_stored_assembly_and_the_plain_path(coarse, k, seed):
    rng = np.random.default_rng(seed)
    kappa = rng.uniform(0.1, 10.0, coarse.n_triangles)
    boundary = coarse.boundary_edges()
    held = boundary[rng.random(len(boundary)) < 0.5]
    layout = PatchLayout(coarse, k, held_sides=held)
    assert layout.topo[2].any() and not layout.topo[2].all()  # sides in both directions
    K = element_stiffness(coarse, kappa)
    fine = refined(coarse, k)
    u = rng.standard_normal(fine.n_points)
    x = layout.from_refined(u)
    x_copy, K_copy = x.copy(), K.copy()
    for masked in (False, True):
        op = PatchOperator(layout, K, masked=masked)
        assert op.n >= patch_product.SMALLEST
        fused, plain = both_paths(op, x)
        assert np.isfinite(fused).all()
        assert fused.tobytes() == plain.tobytes()
        assert np.array_equal(op @ x, fused)  # the operator takes the fused kernel
    # reference: the stored assembly on the refined mesh, every coarse cell's coefficient
    # on its 4**k children (Mesh.refine's order)
    A = hk.assemble_stiffness(fine, hk.per_triangle(np.repeat(kappa, 4**k)))
    y = layout.to_refined(PatchOperator(layout, K, masked=False) @ x)
    assert relative_error(y, A @ u) <= IDENTITY
    assert np.array_equal(x, x_copy) and np.array_equal(K, K_copy)  # inputs kept


@pytest.mark.parametrize("k", [3, 4, 6])
def test_held_rows_are_identity_rows_at_every_level_the_fused_kernel_takes(k):
    coarse = jittered_mesh(2, 11)
    layout = PatchLayout(coarse, k, held_sides=coarse.boundary_edges())
    K = element_stiffness(coarse, np.linspace(0.5, 2.0, coarse.n_triangles))
    x = np.random.default_rng(k).standard_normal(layout.size(k))
    fused, plain = both_paths(PatchOperator(layout, K), x)
    assert fused.tobytes() == plain.tobytes()
    # identity rows at the held points (common practice, no source)
    held = np.zeros(layout.size(k), dtype=bool)
    layout.edge_points(held)[layout.held_e] = True
    layout.vertex_points(held)[layout.held_v] = True
    assert held.any() and np.array_equal(fused[held], x[held])


@pytest.mark.two_threads
def test_fused_product_same_bits_on_one_and_two_threads():
    coarse = jittered_mesh(4, 3)
    layout = PatchLayout(coarse, 6, held_sides=coarse.boundary_edges()[::2])
    K = element_stiffness(coarse, np.linspace(1.0, 4.0, coarse.n_triangles))
    x = np.random.default_rng(6).standard_normal(layout.size(6))

    def compute():
        return [PatchOperator(layout, K) @ x, PatchOperator(layout, K, masked=False) @ x]

    one, two = on_one_and_two_threads(compute)
    assert_same_bits(one, two)
