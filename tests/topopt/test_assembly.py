"""Structured (node-by-node) assembly against a plain triplet assembly written here."""

import numpy as np
import pytest
from scipy import sparse

from topopt.assembly import Assembler
from topopt.elements import element_stiffness
from topopt.grid import Grid


def triplet_assembly(grid, Ke, moduli, free):
    """Textbook assembly: K = sum_e s_e G_e^T Ke G_e by COO triplets, then restrict."""
    edofs = grid.element_dofs
    nd = edofs.shape[1]
    rows = np.repeat(edofs, nd, axis=1).ravel()
    cols = np.tile(edofs, (1, nd)).ravel()
    vals = (moduli[:, None] * Ke.ravel()[None, :]).ravel()
    K = sparse.coo_matrix((vals, (rows, cols)), shape=(grid.n_dofs, grid.n_dofs)).tocsr()
    return K[free][:, free]


SHAPES = [(5, 3), (1, 1), (4, 1), (4, 3, 2), (1, 2, 3), (3, 3, 3)]


@pytest.mark.parametrize("shape", SHAPES)
def test_equals_triplet_assembly(shape):
    # Reference: the element-by-element definition of the global matrix (common practice;
    # Cook et al., Concepts and Applications of FEA, 2002, ch. 2).
    rng = np.random.default_rng(11)
    grid = Grid(shape, 0.7)
    Ke = element_stiffness(grid.dim, youngs_modulus=5.0, poisson_ratio=0.25, element_size=0.7)
    free = np.sort(rng.choice(grid.n_dofs, max(1, grid.n_dofs * 3 // 4), replace=False))
    moduli = 10.0 ** rng.uniform(-9, 0, grid.n_elements)
    K = Assembler(grid, Ke, free).assemble(moduli)
    ref = triplet_assembly(grid, Ke, moduli, free)
    assert isinstance(K, sparse.csc_matrix)
    assert K.has_sorted_indices
    assert abs(K - ref).max() <= 1e-14 * abs(ref).max()
    # Same sparsity pattern as the element couplings (zero entries kept as structure).
    assert K.nnz == (abs(ref) + sparse.csr_matrix(
        (np.ones(ref.nnz), ref.indices, ref.indptr), shape=ref.shape)).nnz


def test_pattern_reused_values_rescale():
    grid = Grid((6, 4, 3), 1.0)
    Ke = element_stiffness(3, youngs_modulus=1.0, poisson_ratio=0.3, element_size=1.0)
    a = Assembler(grid, Ke, np.arange(grid.n_dofs))
    K1 = a.assemble(np.ones(grid.n_elements))
    K2 = a.assemble(np.full(grid.n_elements, 2.5))
    assert np.array_equal(K1.indices, K2.indices)
    assert np.allclose(K2.data, 2.5 * K1.data, rtol=1e-14, atol=1e-14 * K2.data.max())


@pytest.mark.parametrize(("shape", "modes"), [((4, 3), 3), ((3, 2, 2), 6)])
def test_rigid_body_modes_in_null_space(shape, modes):
    # An unrestrained structure has 3 (2D) / 6 (3D) zero eigenvalues
    # (Cook, Malkus, Plesha & Witt 2002).
    grid = Grid(shape, 1.0)
    Ke = element_stiffness(grid.dim, youngs_modulus=1.0, poisson_ratio=0.3, element_size=1.0)
    moduli = np.random.default_rng(2).uniform(0.1, 1.0, grid.n_elements)
    K = Assembler(grid, Ke, np.arange(grid.n_dofs)).assemble(moduli).toarray()
    w = np.linalg.eigvalsh(K)
    assert np.sum(np.abs(w) < 1e-10 * w.max()) == modes


def test_bad_input_raises():
    grid = Grid((2, 2), 1.0)
    Ke = element_stiffness(2, youngs_modulus=1.0, poisson_ratio=0.3, element_size=1.0)
    a = Assembler(grid, Ke, np.arange(grid.n_dofs))
    with pytest.raises(ValueError, match="moduli"):
        a.assemble(np.ones(3))
    with pytest.raises(ValueError, match="element_matrix"):
        Assembler(grid, np.eye(3), np.arange(grid.n_dofs))
    with pytest.raises(ValueError, match="free_dofs"):
        Assembler(grid, Ke, np.array([3, 1]))
