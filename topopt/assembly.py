"""Global stiffness assembly with the sparsity pattern computed once.

K = sum_e s_e * K_e, where K_e is the element matrix of the solid material and s_e the
element's relative modulus. The pattern (CSC over the free dofs) and the map from every
element-matrix entry to its slot in K are computed at construction; each call only
rescales and sums values.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse

from topopt.grid import Grid


class Assembler:
    """Assemble the stiffness matrix restricted to the free dofs.

    Parameters
    ----------
    grid : Grid
        The structured grid.
    element_matrix : ndarray
        Stiffness of one solid element (same for every element of the grid).
    free_dofs : ndarray of int
        Dofs kept in the system (fixed dofs are removed).

    Examples
    --------
    >>> from topopt.elements import q4_stiffness
    >>> g = Grid((2, 1), 1.0)
    >>> Ke = q4_stiffness(youngs_modulus=1.0, poisson_ratio=0.3, element_size=1.0)
    >>> a = Assembler(g, Ke, np.arange(4, g.n_dofs))
    >>> a.assemble(np.ones(2)).shape
    (8, 8)
    """

    def __init__(self, grid: Grid, element_matrix: np.ndarray, free_dofs: np.ndarray):
        self.grid = grid
        self.element_matrix = np.asarray(element_matrix, dtype=float)
        self.free_dofs = np.asarray(free_dofs, dtype=np.int64)
        n_free = self.free_dofs.size
        # Global dof -> free-dof index, -1 for fixed dofs.
        reduced = np.full(grid.n_dofs, -1, dtype=np.int64)
        reduced[self.free_dofs] = np.arange(n_free)
        edofs = reduced[grid.element_dofs]  # (n_el, nd)
        nd = edofs.shape[1]
        rows = np.repeat(edofs, nd, axis=1).ravel()
        cols = np.tile(edofs, (1, nd)).ravel()
        keep = (rows >= 0) & (cols >= 0)
        # Column-major keys sort into CSC order: by column, then by row.
        keys = cols[keep] * n_free + rows[keep]
        del rows, cols
        unique, self._slot = np.unique(keys, return_inverse=True)
        del keys
        self._keep = keep
        self._indices = (unique % n_free).astype(np.int32)
        counts = np.bincount(unique // n_free, minlength=n_free)
        self._indptr = np.concatenate([[0], np.cumsum(counts)]).astype(np.int32)
        self.shape = (n_free, n_free)
        self.nnz = unique.size

    def assemble(self, moduli: np.ndarray) -> sparse.csc_matrix:
        """Stiffness matrix for relative element moduli ``moduli`` (n_elements,)."""
        moduli = np.asarray(moduli, dtype=float).ravel()
        if moduli.size != self.grid.n_elements:
            raise ValueError(
                f"moduli must have {self.grid.n_elements} entries, got {moduli.size}"
            )
        values = np.multiply.outer(moduli, self.element_matrix.ravel()).ravel()[self._keep]
        data = np.bincount(self._slot, weights=values, minlength=self.nnz)
        return sparse.csc_matrix((data, self._indices, self._indptr), shape=self.shape)
