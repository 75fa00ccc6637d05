"""The ``triplets`` strategy: vectorised element matrices into scipy COO, then CSR.

This is what most vectorised P1 codes do today, and the baseline every
benchmark compares against: (M, 3, 3) element matrices from NumPy, nine
(row, column, value) triplets per triangle, and scipy's COO -> CSR
conversion to sum the duplicates.
"""

import numpy as np
import scipy.sparse as sp

from hatkernels.assembly.elements import mass_values
from hatkernels.coefficients import triangle_means
from hatkernels.geometry import element_gradients


def _coo_to_csr(mesh, K):
    t = mesh.triangles
    rows = np.repeat(t, 3, axis=1).ravel()
    cols = np.tile(t, (1, 3)).ravel()
    n = mesh.n_points
    A = sp.coo_matrix((K.reshape(-1), (rows, cols)), shape=(n, n)).tocsr()
    A.sum_duplicates()  # canonical: sorted indices, no duplicates
    return A


def stiffness(mesh, coef, quadrature):
    area, G = element_gradients(mesh.points, mesh.triangles, plain=True)
    if coef.kind == "tensor":
        spec = "mai,ij,mbj->mab" if coef.value.ndim == 2 else "mai,mij,mbj->mab"
        K = np.einsum(spec, G, coef.value, G) * area[:, None, None]
    else:
        w = area * triangle_means(coef, mesh, quadrature)
        K = np.einsum("mai,mbi->mab", G, G) * w[:, None, None]
    return _coo_to_csr(mesh, K)


def mass(mesh, coef, quadrature):
    d, o = mass_values(mesh, coef, quadrature)
    K = np.empty((mesh.n_triangles, 3, 3))
    for a in range(3):
        K[:, a, a] = d[:, a]
        b, c = (a + 1) % 3, (a + 2) % 3
        K[:, b, c] = K[:, c, b] = o[:, a]
    return _coo_to_csr(mesh, K)
