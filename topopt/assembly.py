"""Global stiffness assembly on the structured grid, node by node, without triplet arrays.

K = sum_e s_e * K_e, where K_e is the element matrix of the solid material and s_e the
element's relative modulus. On a structured grid every node couples only to the 3**dim
nodes around it, so the sparsity pattern of K (CSC over the free dofs) follows from the
grid alone: each column lists the free dofs of the neighbouring nodes in increasing
order. The pattern is computed once; each :meth:`Assembler.assemble` call fills the
values with a compiled loop over the nodes that sums the (at most 2**dim) element
blocks touching each node. Peak memory is the finished matrix plus O(n) work arrays;
a COO triplet array (dim * 2**dim)**2 entries per element long is never formed (at
1e6 H8 elements that array alone is 576e6 entries).

The same kernel assembles matrices with a different element matrix per element, which
the multigrid hierarchy (:mod:`topopt.multigrid`) uses for its Galerkin coarse levels.
"""

from __future__ import annotations

import numba
import numpy as np
from scipy import ndimage, sparse

from topopt.grid import LOCAL_NODES, Grid


def _padded(values, fill: int) -> np.ndarray:
    """Shape/offset tuple padded to 3 entries (2D grids are one node layer thick in z)."""
    out = np.full(3, fill, dtype=np.int64)
    out[: len(values)] = values
    return out


def _local_nodes3(dim: int) -> np.ndarray:
    local = np.zeros((2**dim, 3), dtype=np.int64)
    local[:, :dim] = LOCAL_NODES[dim]
    return local


@numba.njit(cache=True)
def _unravel3(n, shape):
    k = n % shape[2]
    r = n // shape[2]
    j = r % shape[1]
    i = r // shape[1]
    return i, j, k


@numba.njit(parallel=True, cache=True)
def _fill_indices(node_shape, dim, reduced, indptr, indices):  # pragma: no cover - compiled
    n_nodes = node_shape[0] * node_shape[1] * node_shape[2]
    for n in numba.prange(n_nodes):
        i, j, k = _unravel3(n, node_shape)
        rows = np.empty(27 * 3, dtype=np.int64)
        count = 0
        for di in range(-1, 2):
            qi = i + di
            if qi < 0 or qi >= node_shape[0]:
                continue
            for dj in range(-1, 2):
                qj = j + dj
                if qj < 0 or qj >= node_shape[1]:
                    continue
                for dk in range(-1, 2):
                    qk = k + dk
                    if qk < 0 or qk >= node_shape[2]:
                        continue
                    m = (qi * node_shape[1] + qj) * node_shape[2] + qk
                    for b in range(dim):
                        r = reduced[m * dim + b]
                        if r >= 0:
                            rows[count] = r
                            count += 1
        for a in range(dim):
            c = reduced[n * dim + a]
            if c >= 0:
                start = indptr[c]
                for t in range(count):
                    indices[start + t] = rows[t]


@numba.njit(parallel=True, cache=True)
def _fill_values(node_shape, element_shape, local, dim, reduced, indptr,
                 matrices, per_element, scale, data):  # pragma: no cover - compiled
    n_nodes = node_shape[0] * node_shape[1] * node_shape[2]
    n_local = local.shape[0]
    for n in numba.prange(n_nodes):
        any_free = False
        for a in range(dim):
            if reduced[n * dim + a] >= 0:
                any_free = True
        if not any_free:
            continue
        i, j, k = _unravel3(n, node_shape)
        block = np.zeros((27, 3, 3))
        for ln in range(n_local):
            ei = i - local[ln, 0]
            ej = j - local[ln, 1]
            ek = k - local[ln, 2]
            if ei < 0 or ej < 0 or ek < 0:
                continue
            if ei >= element_shape[0] or ej >= element_shape[1] or ek >= element_shape[2]:
                continue
            e = (ei * element_shape[1] + ej) * element_shape[2] + ek
            s = scale[e]
            if s == 0.0:
                continue
            mat = e if per_element else 0
            for lm in range(n_local):
                slot = ((local[lm, 0] - local[ln, 0] + 1) * 3
                        + (local[lm, 1] - local[ln, 1] + 1)) * 3 + (local[lm, 2] - local[ln, 2] + 1)
                for b in range(dim):
                    for a in range(dim):
                        block[slot, b, a] += s * matrices[mat, lm * dim + b, ln * dim + a]
        for a in range(dim):
            c = reduced[n * dim + a]
            if c < 0:
                continue
            pos = indptr[c]
            slot = 0
            for di in range(-1, 2):
                qi = i + di
                for dj in range(-1, 2):
                    qj = j + dj
                    for dk in range(-1, 2):
                        qk = k + dk
                        if (0 <= qi < node_shape[0] and 0 <= qj < node_shape[1]
                                and 0 <= qk < node_shape[2]):
                            m = (qi * node_shape[1] + qj) * node_shape[2] + qk
                            for b in range(dim):
                                if reduced[m * dim + b] >= 0:
                                    data[pos] = block[slot, b, a]
                                    pos += 1
                        slot += 1


def _checked_free_dofs(grid: Grid, free_dofs) -> np.ndarray:
    free_dofs = np.asarray(free_dofs, dtype=np.int64)
    if free_dofs.ndim != 1 or (free_dofs.size and (
            free_dofs.min() < 0 or free_dofs.max() >= grid.n_dofs
            or np.any(np.diff(free_dofs) <= 0))):
        raise ValueError("free_dofs must be sorted unique dof numbers of the grid")
    return free_dofs


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
        nd = grid.dim * 2**grid.dim
        self.element_matrix = np.asarray(element_matrix, dtype=float)
        if self.element_matrix.shape != (nd, nd):
            raise ValueError(
                f"element_matrix must have shape {(nd, nd)}, got {self.element_matrix.shape}"
            )
        self.free_dofs = _checked_free_dofs(grid, free_dofs)
        self.shape = (self.free_dofs.size, self.free_dofs.size)
        self._pattern: StructuredPattern | None = None

    @property
    def pattern(self) -> StructuredPattern:
        """The sparsity pattern, computed on first use.

        A matrix-free solver never needs it; at 1e6 H8 elements it holds 1 GB of indices.
        """
        if self._pattern is None:
            self._pattern = StructuredPattern(self.grid, self.free_dofs)
        return self._pattern

    @property
    def nnz(self) -> int:
        """Stored entries of the assembled matrix."""
        return self.pattern.nnz

    def assemble(self, moduli: np.ndarray) -> sparse.csc_matrix:
        """Stiffness matrix for relative element moduli ``moduli`` (n_elements,)."""
        moduli = np.asarray(moduli, dtype=float).ravel()
        if moduli.size != self.grid.n_elements:
            raise ValueError(
                f"moduli must have {self.grid.n_elements} entries, got {moduli.size}"
            )
        return self.pattern.matrix(self.element_matrix[None], moduli)


class StructuredPattern:
    """CSC sparsity pattern of a grid operator over the free dofs, and value filling.

    Parameters
    ----------
    grid : Grid
        The structured grid (only its shape is used).
    free_dofs : ndarray of int
        Sorted dofs kept in the system.

    Examples
    --------
    >>> p = StructuredPattern(Grid((1, 1), 1.0), np.arange(8))
    >>> p.nnz
    64
    """

    def __init__(self, grid: Grid, free_dofs: np.ndarray):
        dim = grid.dim
        free_dofs = _checked_free_dofs(grid, free_dofs)
        self.grid = grid
        self.dim = dim
        self.node_shape = _padded(grid.node_shape, 1)
        self.element_shape = _padded(grid.shape, 1)
        self.local = _local_nodes3(dim)
        n_free = free_dofs.size
        reduced = np.full(grid.n_dofs, -1, dtype=np.int64)
        reduced[free_dofs] = np.arange(n_free)
        self.reduced = reduced
        # Every column of node n holds the free dofs of the 3**dim nodes around n, so the
        # column length is a box sum of the free-dof count per node.
        free_per_node = (reduced.reshape(-1, dim) >= 0).sum(axis=1).reshape(grid.node_shape)
        per_node = ndimage.correlate(free_per_node, np.ones((3,) * dim, dtype=free_per_node.dtype),
                                     mode="constant", cval=0).ravel()
        counts = np.repeat(per_node, dim)[free_dofs]
        indptr = np.zeros(n_free + 1, dtype=np.int64)
        np.cumsum(counts, out=indptr[1:])
        self.nnz = int(indptr[-1])
        index_type = np.int32 if max(self.nnz, n_free) < 2**31 - 1 else np.int64
        indices = np.empty(self.nnz, dtype=np.int64)
        _fill_indices(self.node_shape, dim, reduced, indptr, indices)
        self.indices = indices.astype(index_type)
        self.indptr = indptr.astype(index_type)
        self._indptr64 = indptr
        self.shape = (n_free, n_free)

    def values(self, matrices: np.ndarray, scale: np.ndarray, *,
               dtype: type = np.float64) -> np.ndarray:
        """CSC values of sum_e scale[e] * matrices[e or 0] (one matrix or one per element).

        Each value is summed in double precision and stored with ``dtype``.
        """
        matrices = np.ascontiguousarray(matrices, dtype=float)
        scale = np.ascontiguousarray(scale, dtype=float)
        per_element = matrices.shape[0] > 1
        data = np.empty(self.nnz, dtype=dtype)
        _fill_values(self.node_shape, self.element_shape, self.local, self.dim, self.reduced,
                     self._indptr64, matrices, per_element, scale, data)
        return data

    def matrix(self, matrices: np.ndarray, scale: np.ndarray, *,
               dtype: type = np.float64) -> sparse.csc_matrix:
        """Assemble the matrix over the free dofs (see :meth:`values`)."""
        data = self.values(matrices, scale, dtype=dtype)
        return sparse.csc_matrix((data, self.indices, self.indptr), shape=self.shape)


# --------------------------------------------------------------- matrix-free operator


@numba.njit(parallel=True, fastmath=True, cache=True)
def _element_product(u, scale, K0, local, dim, y):  # pragma: no cover - compiled
    """Product sum_e scale[e] * K0 u_e on the structured grid (u, y: (n0, n1, n2, dim)).

    Elements are processed by slabs of constant first index. Slab i writes only the
    node planes i and i + 1, so slabs of the same parity never write the same node and
    run in parallel; each slab gathers its element vectors into a block, multiplies
    the block by K0 with one matrix product, and adds the result back. The block has
    the precision of K0 (float32 halves the work of the product; the sums into y stay
    in double).
    """
    e0, e1, e2 = scale.shape
    n_local = local.shape[0]
    nd = n_local * dim
    y[:] = 0.0
    m = e1 * e2
    for parity in range(2):
        for t in numba.prange((e0 - parity + 1) // 2):
            i = 2 * t + parity
            block = np.empty((m, nd), dtype=K0.dtype)
            for j in range(e1):
                for k in range(e2):
                    row = j * e2 + k
                    s = scale[i, j, k]
                    for ln in range(n_local):
                        for a in range(dim):
                            block[row, ln * dim + a] = s * u[i + local[ln, 0], j + local[ln, 1],
                                                              k + local[ln, 2], a]
            out = np.dot(block, K0)  # K0 is symmetric: row r of out is K0 @ (s u_e)
            for j in range(e1):
                for k in range(e2):
                    row = j * e2 + k
                    for ln in range(n_local):
                        for a in range(dim):
                            y[i + local[ln, 0], j + local[ln, 1], k + local[ln, 2], a] += \
                                out[row, ln * dim + a]


@numba.njit(parallel=True, cache=True)
def _element_energies(U, element_dofs, K0, out):  # pragma: no cover - compiled
    nd = K0.shape[0]
    for e in numba.prange(element_dofs.shape[0]):
        for c in range(U.shape[1]):
            acc = 0.0
            for i in range(nd):
                ui = U[element_dofs[e, i], c]
                row = 0.0
                for j in range(nd):
                    row += K0[i, j] * U[element_dofs[e, j], c]
                acc += ui * row
            out[e, c] = acc


def element_energies(U: np.ndarray, element_dofs: np.ndarray, element_matrix: np.ndarray
                     ) -> np.ndarray:
    """u_e^T K0 u_e per element and load case, shape (n_elements, n_cases).

    A compiled loop over the elements: the same numbers as gathering every u_e into one
    array and contracting with K0 (``np.einsum``), without the (n_elements, nd, n_cases)
    temporary (190 MB at 1e6 H8 elements) and on all of numba's threads.

    Examples
    --------
    >>> K0 = np.array([[1.0, -1.0], [-1.0, 1.0]])
    >>> element_energies(np.array([[0.0], [2.0], [3.0]]), np.array([[0, 1], [1, 2]]), K0)
    array([[4.],
           [1.]])
    """
    U = np.ascontiguousarray(U, dtype=float)
    if U.ndim == 1:
        U = U[:, None]
    out = np.empty((element_dofs.shape[0], U.shape[1]))
    _element_energies(U, np.ascontiguousarray(element_dofs),
                      np.ascontiguousarray(element_matrix, dtype=float), out)
    return out


@numba.njit(parallel=True, cache=True)
def _element_diagonal(scale, K0, local, dim, d):  # pragma: no cover - compiled
    """Add scale[e] * diag(K0) at the dofs of every element e (slabs as in the product)."""
    e0, e1, e2 = scale.shape
    for parity in range(2):
        for t in numba.prange((e0 - parity + 1) // 2):
            i = 2 * t + parity
            for j in range(e1):
                for k in range(e2):
                    s = scale[i, j, k]
                    for ln in range(local.shape[0]):
                        for a in range(dim):
                            d[i + local[ln, 0], j + local[ln, 1], k + local[ln, 2], a] += \
                                s * K0[ln * dim + a, ln * dim + a]


class ElementOperator:
    """The stiffness matrix as an operator, y = K x, without storing K.

    K = sum_e s_e K0_e is applied element by element (each product reads the element
    moduli and the vector, never a matrix), in the *full* dof numbering of the grid:
    vectors have one entry per dof, fixed dofs hold zero on input and get zero on
    output, so on the free dofs the product equals the assembled matrix of
    :class:`Assembler`. At 1e6 H8 elements the assembled matrix takes 2.9 GB (64-bit
    values, 32-bit indices); this operator keeps 8 MB of moduli.

    Parameters
    ----------
    grid : Grid
        The structured grid.
    element_matrix : ndarray
        Stiffness of one solid element (symmetric).
    free_dofs : ndarray of int
        Dofs kept in the system.

    Examples
    --------
    >>> from topopt.elements import q4_stiffness
    >>> g = Grid((3, 2), 1.0)
    >>> Ke = q4_stiffness(youngs_modulus=1.0, poisson_ratio=0.3, element_size=1.0)
    >>> free = np.arange(6, g.n_dofs)
    >>> op = ElementOperator(g, Ke, free)
    >>> op.set_moduli(np.ones(g.n_elements))
    >>> x = np.zeros(g.n_dofs); x[free] = 1.0
    >>> K = Assembler(g, Ke, free).assemble(np.ones(g.n_elements))
    >>> bool(np.allclose(op.matvec(x)[free], K @ x[free]))
    True
    """

    def __init__(self, grid: Grid, element_matrix: np.ndarray, free_dofs: np.ndarray):
        self.grid = grid
        self.dim = grid.dim
        self.element_matrix = np.ascontiguousarray(element_matrix, dtype=float)
        nd = grid.dim * 2**grid.dim
        if self.element_matrix.shape != (nd, nd):
            raise ValueError(f"element_matrix must have shape {(nd, nd)}")
        self.element_matrix32 = self.element_matrix.astype(np.float32)
        self.local = _local_nodes3(grid.dim)
        self.node_shape = tuple(_padded(grid.node_shape, 1)) + (grid.dim,)
        self.element_shape = tuple(_padded(grid.shape, 1))
        self.free = _checked_free_dofs(grid, free_dofs)
        fixed = np.ones(grid.n_dofs, dtype=bool)
        fixed[self.free] = False
        self.fixed = np.flatnonzero(fixed)
        self.scale: np.ndarray | None = None

    @property
    def n(self) -> int:
        """Length of the vectors (all dofs of the grid)."""
        return self.grid.n_dofs

    def set_moduli(self, moduli: np.ndarray) -> None:
        """Relative element moduli s_e (n_elements,)."""
        moduli = np.ascontiguousarray(moduli, dtype=float).ravel()
        if moduli.size != self.grid.n_elements:
            raise ValueError(f"moduli must have {self.grid.n_elements} entries")
        self.scale = moduli.reshape(self.element_shape)

    def matvec(self, x: np.ndarray, out: np.ndarray | None = None, *,
               single: bool = False) -> np.ndarray:
        """K x for a full-length vector x that is zero at the fixed dofs.

        ``single=True`` does the element products in float32 (relative error about
        1e-7; meant for smoothing, where the result only steers a preconditioner).
        """
        if out is None:
            out = np.empty(self.n)
        K0 = self.element_matrix32 if single else self.element_matrix
        _element_product(x.reshape(self.node_shape), self.scale, K0,
                         self.local, self.dim, out.reshape(self.node_shape))
        out[self.fixed] = 0.0
        return out

    def absolute_row_sums(self) -> np.ndarray:
        """An upper bound of sum_j |K_ij| per row (the |K0| entries summed per element)."""
        ones = np.zeros(self.n)
        ones[self.free] = 1.0
        out = np.empty(self.n)
        _element_product(ones.reshape(self.node_shape), self.scale, np.abs(self.element_matrix),
                         self.local, self.dim, out.reshape(self.node_shape))
        out[self.fixed] = 0.0
        return out

    def diagonal(self) -> np.ndarray:
        """Diagonal of K in the full numbering (zero at the fixed dofs)."""
        d = np.zeros(self.n)
        _element_diagonal(self.scale, self.element_matrix, self.local, self.dim,
                          d.reshape(self.node_shape))
        d[self.fixed] = 0.0
        return d
