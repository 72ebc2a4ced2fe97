"""Element stiffness matrices (Q4 plane stress, H8): identities every element must satisfy.

Sources
-------
- Patch test (a linear displacement field imposed on the boundary of a patch is
  reproduced exactly inside; constant strain energy integrated exactly): Zienkiewicz,
  Taylor & Zhu, The Finite Element Method: Its Basis and Fundamentals, 7th ed., 2013.
- Symmetry, positive semi-definiteness, exactly 3 (2D) / 6 (3D) zero eigenvalues whose
  eigenvectors are the rigid-body modes: Cook, Malkus, Plesha & Witt, Concepts and
  Applications of Finite Element Analysis, 4th ed., 2002.
- Closed form of the unit-square Q4 matrix: Sigmund, "A 99 line topology optimization
  code written in Matlab", SMO 21:120-127, 2001 (matrix entries recalled from memory;
  they match to round-off, so the tolerance is tight).

Our grids only have square / cubic elements, so the patch is a regular block of
elements; the test still exercises element, assembly and restraint handling together.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy.sparse.linalg import spsolve

from topopt.assembly import Assembler
from topopt.elements import elasticity_matrix, element_stiffness, h8_stiffness, q4_stiffness
from topopt.grid import LOCAL_NODES, Grid

MATERIALS = [(1.0, 0.0), (70000.0, 0.33), (2.1e5, 0.45), (3.0, -0.5)]
SIZES = [0.1, 1.0, 2.5]
PARAMS = [(dim, E, nu, h) for dim in (2, 3) for (E, nu) in MATERIALS for h in SIZES]


def _rigid_body_modes(coords: np.ndarray) -> np.ndarray:
    """Translations and infinitesimal rotations of nodes at ``coords`` (n, dim), as columns."""
    n, dim = coords.shape
    modes = []
    for c in range(dim):
        u = np.zeros((n, dim))
        u[:, c] = 1.0
        modes.append(u.ravel())
    centred = coords - coords.mean(axis=0)
    planes = [(0, 1)] if dim == 2 else [(0, 1), (1, 2), (0, 2)]
    for a, b in planes:
        u = np.zeros((n, dim))
        u[:, a] = -centred[:, b]
        u[:, b] = centred[:, a]
        modes.append(u.ravel())
    return np.column_stack(modes)


@pytest.mark.parametrize(("dim", "E", "nu", "h"), PARAMS)
def test_element_matrix_spectrum_and_rigid_body_modes(dim, E, nu, h):
    # Cook et al. 2002: symmetric PSD, zero eigenvalues = rigid-body modes only.
    K = element_stiffness(dim, youngs_modulus=E, poisson_ratio=nu, element_size=h, thickness=0.7)
    assert K.shape == (dim * 2**dim,) * 2
    assert np.array_equal(K, K.T)
    eig = np.linalg.eigvalsh(K)
    scale = eig.max()
    assert eig.min() > -1e-12 * scale
    n_zero = int(np.sum(eig < 1e-10 * scale))
    assert n_zero == (3 if dim == 2 else 6), eig / scale
    # The smallest non-zero eigenvalue is well separated (no spurious soft mode).
    assert eig[n_zero] > 1e-4 * scale
    R = _rigid_body_modes(LOCAL_NODES[dim] * h)
    assert np.linalg.matrix_rank(R) == n_zero
    residual = np.linalg.norm(K @ R, axis=0) / (scale * np.linalg.norm(R, axis=0))
    assert residual.max() < 1e-12, residual


@pytest.mark.parametrize(("dim", "E", "nu", "h"), PARAMS)
def test_constant_strain_energy_is_exact(dim, E, nu, h):
    # Zienkiewicz, Taylor & Zhu 2013: under a linear field (constant strain) the element
    # energy equals strain . D . strain times the element volume, exactly.
    rng = np.random.default_rng(3)
    G = rng.normal(size=(dim, dim))
    u = (LOCAL_NODES[dim] * h) @ G.T  # (n_nodes, dim), u_i = G_ij x_j
    t = 0.7 if dim == 2 else 1.0
    K = element_stiffness(dim, youngs_modulus=E, poisson_ratio=nu, element_size=h, thickness=t)
    eps_t = 0.5 * (G + G.T)
    if dim == 2:
        strain = np.array([eps_t[0, 0], eps_t[1, 1], 2 * eps_t[0, 1]])
        volume = h * h * t
    else:
        strain = np.array([eps_t[0, 0], eps_t[1, 1], eps_t[2, 2],
                           2 * eps_t[1, 2], 2 * eps_t[0, 2], 2 * eps_t[0, 1]])
        volume = h**3
    D = elasticity_matrix(dim, youngs_modulus=E, poisson_ratio=nu)
    expected = strain @ D @ strain * volume
    got = u.ravel() @ K @ u.ravel()
    assert abs(got - expected) <= 1e-12 * abs(expected), (got, expected)


@pytest.mark.parametrize(("shape", "E", "nu", "h"), [
    ((4, 3), 1.0, 0.3, 1.0),
    ((5, 4), 70000.0, 0.45, 0.25),
    ((3, 3, 3), 200.0, 0.3, 2.0),
    ((4, 3, 3), 1.0, -0.3, 0.5),
])
def test_patch_test_linear_field_reproduced_inside(shape, E, nu, h):
    # Zienkiewicz, Taylor & Zhu 2013: impose u = a + G x on the boundary nodes of the
    # patch; solving for the inner nodes must give the same linear field exactly.
    grid = Grid(shape, h, 1.3 if len(shape) == 2 else 1.0)
    dim = grid.dim
    rng = np.random.default_rng(7)
    a = rng.normal(size=dim)
    G = rng.normal(size=(dim, dim)) * 1e-2
    x = grid.node_coordinates()
    exact = (a + x @ G.T).ravel()
    index = np.indices(grid.node_shape).reshape(dim, -1).T
    boundary_node = np.any((index == 0) | (index == np.array(grid.shape)), axis=1)
    inner_dofs = np.flatnonzero(np.repeat(~boundary_node, dim))
    assert inner_dofs.size > 0
    Ke = element_stiffness(dim, youngs_modulus=E, poisson_ratio=nu, element_size=h,
                           thickness=grid.thickness)
    K_full = Assembler(grid, Ke, np.arange(grid.n_dofs)).assemble(np.ones(grid.n_elements))
    K_full = K_full.tocsr()
    bnd = np.setdiff1d(np.arange(grid.n_dofs), inner_dofs)
    K_ii = Assembler(grid, Ke, inner_dofs).assemble(np.ones(grid.n_elements))
    rhs = -(K_full[inner_dofs][:, bnd] @ exact[bnd])
    u_inner = spsolve(K_ii, rhs)
    err = np.max(np.abs(u_inner - exact[inner_dofs])) / np.max(np.abs(exact))
    assert err < 1e-10, err
    # And the inner nodes are in equilibrium under the exact field (no internal force).
    residual = K_full @ exact
    scale = np.max(np.abs(K_full.data)) * np.max(np.abs(exact))
    assert np.max(np.abs(residual[inner_dofs])) < 1e-12 * scale


def test_q4_unit_square_closed_form():
    # Sigmund 2001 (from memory of the printed matrix): E = 1, unit square, unit thickness.
    for nu in (0.0, 0.3, 0.49):
        k = [1 / 2 - nu / 6, 1 / 8 + nu / 8, -1 / 4 - nu / 12, -1 / 8 + 3 * nu / 8,
             -1 / 4 + nu / 12, -1 / 8 - nu / 8, nu / 6, 1 / 8 - 3 * nu / 8]
        order = np.array([
            [1, 2, 3, 4, 5, 6, 7, 8], [2, 1, 8, 7, 6, 5, 4, 3], [3, 8, 1, 6, 7, 4, 5, 2],
            [4, 7, 6, 1, 8, 3, 2, 5], [5, 6, 7, 8, 1, 2, 3, 4], [6, 5, 4, 3, 2, 1, 8, 7],
            [7, 4, 5, 2, 3, 8, 1, 6], [8, 3, 2, 5, 4, 7, 6, 1]]) - 1
        expected = np.array(k)[order] / (1 - nu**2)
        got = q4_stiffness(youngs_modulus=1.0, poisson_ratio=nu, element_size=1.0)
        assert np.max(np.abs(got - expected)) < 1e-13


def test_scaling_with_modulus_size_and_thickness():
    # Common practice (dimensional analysis): K ~ E; a 2D plane-stress element is
    # independent of its size and proportional to thickness; a 3D element scales with h.
    K2 = q4_stiffness(youngs_modulus=1.0, poisson_ratio=0.3, element_size=1.0)
    assert np.allclose(q4_stiffness(youngs_modulus=5.0, poisson_ratio=0.3, element_size=3.0,
                                     thickness=2.0), 10.0 * K2, rtol=1e-13, atol=1e-13)
    K3 = h8_stiffness(youngs_modulus=1.0, poisson_ratio=0.3, element_size=1.0)
    assert np.allclose(h8_stiffness(youngs_modulus=4.0, poisson_ratio=0.3, element_size=0.5),
                       2.0 * K3, rtol=1e-13, atol=1e-13)


@pytest.mark.parametrize(("kwargs", "word"), [
    ({"youngs_modulus": 0.0, "poisson_ratio": 0.3, "element_size": 1.0}, "youngs_modulus"),
    ({"youngs_modulus": 1.0, "poisson_ratio": 0.5, "element_size": 1.0}, "poisson_ratio"),
    ({"youngs_modulus": 1.0, "poisson_ratio": -1.0, "element_size": 1.0}, "poisson_ratio"),
    ({"youngs_modulus": 1.0, "poisson_ratio": 0.3, "element_size": -1.0}, "element_size"),
])
def test_bad_arguments_name_the_argument(kwargs, word):
    # STYLE.md: library code raises ValueError naming the argument.
    for dim in (2, 3):
        with pytest.raises(ValueError, match=word):
            element_stiffness(dim, **kwargs)


def test_element_matrix_matches_direct_quadrature_of_shape_functions():
    # Independent re-derivation (common practice): integrate B^T D B with 3-point Gauss
    # (exact beyond need) from shape functions written here, not the module's B matrix.
    pts, wts = np.polynomial.legendre.leggauss(3)
    for dim in (2, 3):
        h, E, nu = 0.8, 3.0, 0.27
        signs = 2.0 * LOCAL_NODES[dim] - 1.0
        D = elasticity_matrix(dim, youngs_modulus=E, poisson_ratio=nu)
        n = dim * 2**dim
        K = np.zeros((n, n))
        for idx in itertools.product(range(3), repeat=dim):
            xi = pts[list(idx)]
            w = np.prod(wts[list(idx)]) * (h / 2) ** dim
            grad = np.empty((2**dim, dim))  # dN/dx
            for k in range(2**dim):
                for a in range(dim):
                    others = [1 + signs[k, b] * xi[b] for b in range(dim) if b != a]
                    grad[k, a] = signs[k, a] * np.prod(others) / 2**dim * 2 / h
            # Strain rows as in elasticity_matrix's documented order.
            pairs = [(0, 0), (1, 1), (0, 1)] if dim == 2 else \
                [(0, 0), (1, 1), (2, 2), (1, 2), (0, 2), (0, 1)]
            B = np.zeros((len(pairs), n))
            for r, (i, j) in enumerate(pairs):
                B[r, i::dim] += grad[:, j]
                if i != j:
                    B[r, j::dim] += grad[:, i]
            K += w * B.T @ D @ B
        got = element_stiffness(dim, youngs_modulus=E, poisson_ratio=nu, element_size=h)
        assert np.max(np.abs(got - K)) < 1e-12 * np.max(np.abs(K))
