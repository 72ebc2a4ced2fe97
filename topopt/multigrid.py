"""Geometric multigrid-preconditioned conjugate gradients for the voxel grid.

The method follows Amir, Aage & Lazarov, "On multigrid-CG for efficient topology
optimization", SMO 49:815-829, 2014: a hierarchy of grids coarsened by 2 per axis,
prolongation by bilinear / trilinear interpolation, Galerkin coarse operators
A_c = P^T A P, a smoother on each level, a direct factorisation on the coarsest level,
and CG preconditioned by one V-cycle. Our own choices:

* **Odd sizes.** An axis of n elements becomes ceil(n / 2) coarse elements; when n is
  odd the last coarse node lies half an element outside the domain and only carries
  interpolation to the last fine node. An axis of one element is not coarsened.
* **Restraints.** Fixed dofs are removed from every level. A coarse dof is fixed when
  the fine dof at the same place is fixed (or when nothing interpolates from it), and
  the prolongation is restricted to free rows and free columns, so A_c = P_r^T A P_r
  stays symmetric positive definite and corrections never move a fixed dof.
* **Galerkin products by elements.** With element-wise interpolation the Galerkin
  operator is the assembly of coarse element matrices sum_c Q_c^T K_c Q_c over the
  (up to 2**dim) children c of each coarse element; on the first coarsening
  K_c = s_c K0, so a coarse element matrix is a combination of 2**dim fixed matrices.
  This avoids the sparse triple product on the finest level, which at 1e6 elements
  is the memory peak of the whole iteration. Without element moduli the hierarchy
  falls back to the sparse product.
* **Smoother.** Chebyshev polynomial of D^-1 A (Jacobi-preconditioned), the same
  before and after the coarse correction so the V-cycle is symmetric and CG applies.
  Its upper bound is a power-iteration estimate plus 20 %; when CG meets a
  non-positive r^T M^-1 r or p^T A p (an indefinite V-cycle: the bound was too low)
  it restarts with Gershgorin bounds.
* **Matrix-free finest grid.** Given the element matrix, the finest operator is
  applied element by element (:class:`~topopt.assembly.ElementOperator`) in the full
  dof numbering with zeros at fixed dofs; only the coarse grids are assembled. The
  smoother's products on the finest grid are done in single precision, CG's in
  double, so the computed compliance is that of the double-precision system.
* **Stopping rule.** The optimiser needs the compliance and the element energies.
  PCG gives r^T M^-1 r, an estimate of r^T A^-1 r = ||u - u_k||_A^2; we stop when
  sqrt(r^T M^-1 r / f.u_k) <= ``tolerance``, a relative energy-norm error. From a warm
  start f.u_k is off by a term of first order in the error; the optimiser therefore
  takes the compliance as 2 f.u_k - u_k^T A u_k = f.u - ||u - u_k||_A^2 (the potential
  energy identity; :meth:`topopt.objective.ComplianceModel.evaluate`), whose error is
  of second order. The default tolerance was chosen by comparing with CHOLMOD
  (tests/topopt/test_multigrid.py) and with a tightly solved converged design of the
  large 3D example, 1e-9 voids: at 1e-5 the compliance was within 5.6e-10 of it from
  a warm start (f.u_k alone: 1.1e-8) and 5.4e-9 from a cold one, in 22 and 64 CG
  iterations against 31 and 141 at 1e-6. The estimate r^T M^-1 r is optimistic on such
  designs (5.4e-9 is the square of 7e-5, not of 1e-5), which is why the margin is kept.
  The iterates of the design loop are solved to the looser ``LOOP_TOLERANCE`` (1e-4);
  every reported value is solved again to the default.
"""

from __future__ import annotations

import numba
import numpy as np
from scipy import sparse

from topopt.assembly import ElementOperator, StructuredPattern
from topopt.grid import LOCAL_NODES, Grid

#: Default relative energy-norm tolerance of the CG iteration (see module docstring).
DEFAULT_TOLERANCE = 1e-5

#: Tolerance for the iterates of the design loop. The optimiser needs sensitivities and
#: a compliance good enough for the stop rules, not compliances to 1e-8; the reported
#: design is solved again at DEFAULT_TOLERANCE (the accuracy of the analysis tied to what
#: the optimisation needs: Amir, Aage & Lazarov, Struct Multidisc Optim 49:815-829,
#: 2014). Measured on the 1e6-voxel hoist bracket near convergence (8 iterations from
#: the same state): 4 CG iterations per solve instead of 9-10, 4.0 s per design
#: iteration instead of 5.2 (means of 7), compliances equal to 5e-7; a 128,000-voxel
#: version of it ran to convergence in 253 iterations at 418.6 N mm against 261 at 418.1 with 1e-5,
#: the two histories within 0.2 % of each other over the first 160 iterations.
LOOP_TOLERANCE = 1e-4

#: Degree of the Chebyshev smoother on the finest grid (the coarser grids use the
#: ``degree`` of :func:`multigrid_cg`, 2). One step before and one after the coarse
#: correction costs two fine-grid products instead of four; CG then needs a few more
#: iterations but each is cheaper. Measured on the converged large 3D example
#: (221,184 elements, 1e-9 voids, a warm start as in the optimiser, tolerance 1e-5):
#: degree 2 everywhere 22 CG iterations in 3.3-3.4 s, degree 1 on the finest grid 22
#: in 2.4 s; from a cold start 63 in 9.2-9.3 s against 69 in 7.2-7.7 s.
FINE_DEGREE = 1


# ----------------------------------------------------------------------------- grids


def coarsen_factors(shape: tuple[int, ...]) -> tuple[int, ...]:
    """Coarsening factor per axis: 2, or 1 for an axis of a single element.

    Examples
    --------
    >>> coarsen_factors((8, 5, 1))
    (2, 2, 1)
    """
    return tuple(2 if n >= 2 else 1 for n in shape)


def coarse_shape(shape: tuple[int, ...]) -> tuple[int, ...]:
    """Element shape of the next coarser grid (ceil(n / 2) per coarsened axis).

    Examples
    --------
    >>> coarse_shape((8, 5, 1))
    (4, 3, 1)
    """
    return tuple(-(-n // f) for n, f in zip(shape, coarsen_factors(shape), strict=True))


def _interpolation_1d(n: int, factor: int) -> sparse.csr_matrix:
    """Linear interpolation from the coarse nodes of one axis to its n + 1 fine nodes."""
    if factor == 1:
        return sparse.identity(n + 1, format="csr")
    m = -(-n // 2)
    fine = np.arange(n + 1)
    left = fine // 2
    even = fine % 2 == 0
    rows = np.concatenate([fine[even], fine[~even], fine[~even]])
    cols = np.concatenate([left[even], left[~even], left[~even] + 1])
    vals = np.concatenate([np.ones(even.sum()), np.full(2 * (~even).sum(), 0.5)])
    return sparse.csr_matrix((vals, (rows, cols)), shape=(n + 1, m + 1))


def prolongation(shape: tuple[int, ...]) -> sparse.csr_matrix:
    """Interpolation of all dofs from the next coarser grid to the grid of ``shape``.

    Nodes are numbered in C order and dof = node * dim + component, so the operator is
    the Kronecker product of the axis interpolations and the identity on components.

    Examples
    --------
    >>> prolongation((2, 2)).shape
    (18, 8)
    """
    dim = len(shape)
    factors = coarsen_factors(shape)
    P = sparse.identity(1, format="csr")
    for n, f in zip(shape, factors, strict=True):
        P = sparse.kron(P, _interpolation_1d(n, f), format="csr")
    return sparse.kron(P, sparse.identity(dim, format="csr"), format="csr")


def _child_interpolations(dim: int, factors: tuple[int, ...]):
    """For each child position c of a coarse element: c and Q_c (nd x nd).

    Q_c maps the coarse element's dofs to the dofs of the fine element at position c
    inside it (trilinear interpolation, identity along an axis that is not coarsened).
    """
    local = LOCAL_NODES[dim]
    positions = np.array(np.meshgrid(*[np.arange(f) for f in factors], indexing="ij"))
    positions = positions.reshape(dim, -1).T
    out = []
    for c in positions:
        q = np.ones((local.shape[0], local.shape[0]))
        for a in range(dim):
            t = (c[a] + local[:, a]) / factors[a]  # child node coordinate, coarse units
            w = np.where(local[None, :, a] == 0, 1.0 - t[:, None], t[:, None])
            q *= w
        Q = np.kron(q, np.eye(dim))
        out.append((tuple(int(v) for v in c), Q))
    return out


def _child_elements(shape: tuple[int, ...], child: tuple[int, ...]) -> np.ndarray:
    """Fine element number of child ``child`` of every coarse element (-1 if absent)."""
    factors = coarsen_factors(shape)
    cshape = coarse_shape(shape)
    index = np.indices(cshape).reshape(len(shape), -1)
    fine = index * np.array(factors)[:, None] + np.array(child)[:, None]
    inside = np.all(fine < np.array(shape)[:, None], axis=0)
    out = np.full(index.shape[1], -1, dtype=np.int64)
    out[inside] = np.ravel_multi_index(tuple(fine[:, inside]), shape)
    return out


def _coarse_free_dofs(shape, free_dofs, P_free_rows) -> np.ndarray:
    """Free dofs of the coarse grid: not at a fixed fine dof, and interpolating somewhere."""
    dim = len(shape)
    factors = coarsen_factors(shape)
    cgrid = Grid(coarse_shape(shape), 1.0)
    fine_nodes = tuple(n + 1 for n in shape)
    fixed_fine = np.ones(int(np.prod(fine_nodes)) * dim, dtype=bool)
    fixed_fine[free_dofs] = False
    cidx = np.indices(cgrid.node_shape).reshape(dim, -1) * np.array(factors)[:, None]
    coincident = np.all(cidx < np.array(fine_nodes)[:, None], axis=0)
    fixed_c = np.zeros(cgrid.n_dofs, dtype=bool)
    fine_node = np.ravel_multi_index(tuple(cidx[:, coincident]), fine_nodes)
    cnodes = np.flatnonzero(coincident)
    for a in range(dim):
        fixed_c[cnodes * dim + a] = fixed_fine[fine_node * dim + a]
    used = np.diff(P_free_rows.tocsc().indptr) > 0
    return np.flatnonzero(~fixed_c & used)


# ------------------------------------------------------------------- kernels (numba)


@numba.njit(parallel=True, cache=True)
def _csr_matvec(indptr, indices, data, x, y):  # pragma: no cover - compiled
    for i in numba.prange(indptr.size - 1):
        acc = 0.0
        for t in range(indptr[i], indptr[i + 1]):
            acc += data[t] * x[indices[t]]
        y[i] = acc


@numba.njit(cache=True)
def _csr_matvec_serial(indptr, indices, data, x, y):  # pragma: no cover - compiled
    for i in range(indptr.size - 1):
        acc = 0.0
        for t in range(indptr[i], indptr[i + 1]):
            acc += data[t] * x[indices[t]]
        y[i] = acc


def _csr_matvec_add_py(indptr, indices, data, x, y):  # pragma: no cover - compiled
    for i in numba.prange(indptr.size - 1):
        acc = 0.0
        for t in range(indptr[i], indptr[i + 1]):
            acc += data[t] * x[indices[t]]
        y[i] += acc


# the prolongation adds its correction in place (x += P e), saving a pass over x. A
# separate kernel, not a flag of _csr_matvec: one kernel with an ``add`` argument made
# five warm solves of the 1e6 cantilever 15 % slower (22.9-23.2 s against 19.0-19.6 s).
_csr_matvec_add = numba.njit(parallel=True, cache=True)(_csr_matvec_add_py)
_csr_matvec_add_serial = numba.njit(cache=True)(_csr_matvec_add_py)


#: Sparse products with fewer stored entries run on one thread: starting the threads
#: costs more than the product, and on a shared machine a parallel region waits for
#: every thread to be scheduled (measured: 12 ms for a 22,000-entry product at load 8
#: on 2 cores, where the serial loop takes well under 1 ms).
SERIAL_NNZ = 1 << 20


@numba.njit(parallel=True, cache=True)
def _csr_diagonal_kernel(indptr, indices, data, out):  # pragma: no cover - compiled
    for i in numba.prange(indptr.size - 1):
        out[i] = 0.0
        for t in range(indptr[i], indptr[i + 1]):
            if indices[t] == i:
                out[i] = data[t]
                break


def _csr_diagonal(A: sparse.csr_matrix) -> np.ndarray:
    """Diagonal of a CSR matrix in double precision, on numba's threads.

    scipy's ``diagonal`` took 0.08 s per hierarchy update at 1e6 fine elements.
    """
    out = np.empty(A.shape[0])
    _csr_diagonal_kernel(A.indptr, A.indices, A.data, out)
    return out


def _matvec(A: sparse.csr_matrix, x: np.ndarray, out: np.ndarray | None = None, *,
            add: bool = False) -> np.ndarray:
    """A x into ``out`` (a new array if None); with ``add``, out += A x instead."""
    y = np.empty(A.shape[0]) if out is None else out
    if add:
        kernel = _csr_matvec_add_serial if A.nnz < SERIAL_NNZ else _csr_matvec_add
    else:
        kernel = _csr_matvec_serial if A.nnz < SERIAL_NNZ else _csr_matvec
    kernel(A.indptr, A.indices, A.data, x, y)
    return y


# ------------------------------------------------------------------------ hierarchy


#: Power steps for the smoother's eigenvalue estimate from the previous iteration's
#: eigenvector (at 1e6 voxels each step costs one fine-grid product, about 0.07 s).
WARM_POWER_STEPS = 4


class _Level:
    """One grid of the hierarchy: operator, smoother data and the map to the next grid.

    The operator is either an assembled CSR matrix ``A`` or, on the finest grid, an
    :class:`~topopt.assembly.ElementOperator` (``A`` is then None) working in the full
    dof numbering with zeros at the fixed dofs.
    """

    def __init__(self, A: sparse.csr_matrix | None, start: np.ndarray | None = None, *,
                 operator: ElementOperator | None = None):
        self.A = A
        self.operator = operator
        if operator is not None:
            diag = operator.diagonal()
            self.inv_diag = np.divide(1.0, diag, out=np.zeros_like(diag), where=diag != 0)
            self.n = operator.n
        else:
            self.inv_diag = 1.0 / _csr_diagonal(A)
            self.n = A.shape[0]
        # The Chebyshev smoother needs an upper bound of the spectrum of D^-1 A: a
        # smaller value amplifies the modes above it and can make the V-cycle
        # indefinite, and CG then stops early on a wrong answer (seen: 12 power steps
        # gave 2.94 for a true 3.47 on a grey random field, and the compliance was off
        # by 1e-4). Power iteration approaches the largest eigenvalue from below, so we
        # take 30 steps from a random start (4 from the previous eigenvector: the design
        # changes little between optimisation iterations; on a 40 x 20 x 20 grid with
        # the moduli perturbed by 10 %, 4 warm steps gave 0.989-1.000 of the eigenvalue
        # and 8 gave 0.993-1.000) and add 20 %. If CG still meets a non-positive
        # curvature, :meth:`MultigridHierarchy.use_safe_bounds` switches to Gershgorin
        # bounds (never too small).
        lam, self.eigenvector = _jacobi_spectral_radius(
            self, start=start, iterations=30 if start is None else WARM_POWER_STEPS)
        self.lmax = 1.2 * lam
        self.P: sparse.csr_matrix | None = None
        self.R: sparse.csr_matrix | None = None

    def allocate(self) -> None:
        """Work arrays of the V-cycle on this level (reused by every cycle)."""
        n = self.n
        self.x, self.r, self.d, self.Ad = (np.empty(n) for _ in range(4))
        self.coarse_rhs = np.empty(self.R.shape[0])

    def gershgorin_bound(self) -> float:
        """max_i sum_j |A_ij| / A_ii, an upper bound of the spectrum of D^-1 A."""
        if self.operator is not None:
            sums = self.operator.absolute_row_sums()
        else:
            sums = abs(self.A) @ np.ones(self.n)
        return float((sums * self.inv_diag).max())

    def matvec(self, x: np.ndarray, out: np.ndarray | None = None, *,
               single: bool = False) -> np.ndarray:
        """Operator times x (``single``: single-precision element products if matrix-free)."""
        if self.operator is not None:
            return self.operator.matvec(x, out, single=single)
        return _matvec(self.A, x, out)


def _jacobi_spectral_radius(level: _Level, *, start=None, iterations: int = 12):
    """Largest eigenvalue of D^-1 A by power iteration (seeded, for reproducibility)."""
    if start is None or start.shape[0] != level.n:
        start = np.random.default_rng(12345).random(level.n)
    x = start * (level.inv_diag != 0)
    x /= np.linalg.norm(x)
    y = np.empty_like(x)
    lam = 1.0
    for _ in range(iterations):
        # single precision on a matrix-free finest grid: the smoother applies that
        # operator, and the product is cheaper
        level.matvec(x, y, single=True)
        y *= level.inv_diag
        lam = float(np.linalg.norm(y))
        x, y = y / lam, x
    return lam, x


@numba.njit(parallel=True, cache=True)
def _combine_rows(S, M, out):  # pragma: no cover - compiled
    """Write S @ M into ``out`` for a thin S (n x 8).

    The product is bound by writing ``out``, which a threaded loop does faster than
    single-threaded BLAS (the solve keeps BLAS on one thread). Measured at 1e6 fine
    elements, with ``out`` reused between iterations: 0.3 s against 1.8 s.
    """
    for e in numba.prange(S.shape[0]):
        for k in range(M.shape[1]):
            acc = 0.0
            for c in range(S.shape[1]):
                acc += S[e, c] * M[c, k]
            out[e, k] = acc


@numba.njit(cache=True)
def _add_weighted_rows(target, source, fine_node, coarse_node, weight, count,
                       dim):  # pragma: no cover - compiled
    """Add Q^T source to target, with Q = q (x) I_dim given by the nonzeros of q.

    For t < count: rows dim * fine_node[t] + j of source, times weight[t], are added to
    rows dim * coarse_node[t] + j of target.
    """
    for t in range(count):
        w = weight[t]
        src = fine_node[t] * dim
        dst = coarse_node[t] * dim
        for j in range(dim):
            for y in range(source.shape[1]):
                target[dst + j, y] += w * source[src + j, y]


@numba.njit(parallel=True, cache=True)
def _galerkin_children(mats, children, fine_node, coarse_node, weight, n_weights, dim,
                       out):  # pragma: no cover - compiled
    """out[e] += sum_c Q_c^T mats[children[c, e]] Q_c with Q_c = q_c (x) I_dim.

    The node weights q_c are given as lists of their nonzeros (t < n_weights[c]):
    q_c[fine_node[c, t], coarse_node[c, t]] = weight[c, t]; a child shares few nodes
    with the far corners of its parent, so 27 of the 64 weights of an H8 child are
    nonzero. Both products are done as sums of whole rows, using the symmetry of the
    matrices: V = Q^T M row by row, then Q^T V^T = Q^T M Q. Every inner loop runs over
    a contiguous row of nd entries (measured at 1e6 fine elements: 0.41 s per update
    with the weights tested inside the innermost loop, the earlier form).
    """
    n_children, n_coarse = children.shape
    nd = mats.shape[1]
    for e in numba.prange(n_coarse):
        v = np.empty((nd, nd))
        u = np.empty((nd, nd))
        for c in range(n_children):
            f = children[c, e]
            if f < 0:
                continue
            v[:] = 0.0
            _add_weighted_rows(v, mats[f], fine_node[c], coarse_node[c], weight[c],
                               n_weights[c], dim)
            for x in range(nd):
                for y in range(nd):
                    u[x, y] = v[y, x]
            _add_weighted_rows(out[e], u, fine_node[c], coarse_node[c], weight[c],
                               n_weights[c], dim)


def _weight_lists(q: np.ndarray):
    """Nonzeros of node-weight matrices q (n_children, nn, nn) as padded lists."""
    count = (q != 0).sum(axis=(1, 2))
    width = int(count.max())
    fine = np.zeros((q.shape[0], width), dtype=np.int64)
    coarse = np.zeros_like(fine)
    weight = np.zeros((q.shape[0], width))
    for c in range(q.shape[0]):
        m, b = np.nonzero(q[c])
        fine[c, :m.size], coarse[c, :m.size], weight[c, :m.size] = m, b, q[c, m, b]
    return fine, coarse, weight, count.astype(np.int64)


class _Coarsening:
    """What the element-wise Galerkin product of one grid needs, computed once."""

    def __init__(self, shape: tuple[int, ...], free_dofs: np.ndarray):
        grid = Grid(shape, 1.0)
        self.shape = shape
        self.n_coarse = int(np.prod(coarse_shape(shape)))
        self.children = [(_child_elements(shape, c), Q)
                         for c, Q in _child_interpolations(grid.dim, coarsen_factors(shape))]
        fixed = np.ones(grid.n_dofs, dtype=bool)
        fixed[free_dofs] = False
        # Elements with a fixed dof, and which of their local dofs are fixed.
        local_fixed = fixed[grid.element_dofs]
        self.touched = np.flatnonzero(local_fixed.any(axis=1))
        self.keep = ~local_fixed[self.touched]
        # Child matrices of the first coarsening: M_c = Q_c^T K0 Q_c (set per K0).
        self._K0 = None
        self._M = None
        self._node_weights = None
        self._child_table = None
        self._first_out = None

    def first(self, K0: np.ndarray, scale: np.ndarray) -> np.ndarray:
        """Coarse element matrices for fine element matrices scale[e] * K0.

        The result is a buffer of this object, overwritten by the next call.
        """
        nd = K0.shape[0]
        if self._K0 is None or not np.array_equal(self._K0, K0):
            self._K0 = K0.copy()
            self._M = np.stack([(Q.T @ K0 @ Q).ravel() for _, Q in self.children])
        S = np.zeros((self.n_coarse, len(self.children)))
        for c, (child, _) in enumerate(self.children):
            present = child >= 0
            S[present, c] = scale[child[present]]
        # the same buffer every iteration: a fresh one costs its page faults again
        # (0.6 GB at 1e6 fine elements)
        if self._first_out is None or self._first_out.shape[1] != nd:
            self._first_out = np.empty((self.n_coarse, nd, nd))
        out = self._first_out
        _combine_rows(S, self._M, out.reshape(self.n_coarse, nd * nd))
        if self.touched.size:
            # Elements with a fixed dof: replace s K0 by its masked version.
            mats = scale[self.touched][:, None, None] * K0[None]
            delta = mats * (self.keep[:, :, None] * self.keep[:, None, :]) - mats
            self._add_to_parents(out, self.touched, delta)
        return out

    def next(self, mats: np.ndarray) -> np.ndarray:
        """Coarse element matrices for one fine element matrix per element.

        ``mats`` is overwritten (its elements with a fixed dof are masked in place: a
        copy would double the peak memory of the update; at 1e6 fine elements the
        second grid's matrices take 0.6 GB).
        """
        if self.touched.size:
            mats[self.touched] *= self.keep[:, :, None] * self.keep[:, None, :]
        if self._node_weights is None:
            # Q_c = q_c (x) I_dim: the node weights q_c are all the kernel needs
            dim = len(self.shape)
            self._node_weights = _weight_lists(
                np.stack([Q[::dim, ::dim] for _, Q in self.children]))
            self._child_table = np.stack([child for child, _ in self.children])
        out = np.zeros((self.n_coarse,) + mats.shape[1:])
        _galerkin_children(np.ascontiguousarray(mats), self._child_table,
                           *self._node_weights, len(self.shape), out)
        return out

    def _add_to_parents(self, out, elements, matrices):
        """Add Q_c^T M Q_c of the given fine elements to their coarse parents."""
        shape = self.shape
        factors = np.array(coarsen_factors(shape))
        index = np.array(np.unravel_index(elements, shape))  # (dim, n)
        parent = np.ravel_multi_index(tuple(index // factors[:, None]), coarse_shape(shape))
        position = np.ravel_multi_index(tuple(index % factors[:, None]), tuple(factors))
        for c, (_, Q) in enumerate(self.children):
            hit = position == c
            if hit.any():
                np.add.at(out, parent[hit],
                          np.matmul(np.matmul(Q.T[None], matrices[hit]), Q[None]))


class MultigridHierarchy:
    """Grids, Galerkin operators and transfer operators for one stiffness matrix.

    Parameters
    ----------
    grid : Grid
        The finest grid.
    free_dofs : ndarray of int
        Free dofs of the finest grid.
    coarse_dofs : int
        Coarsening stops once a grid has at most this many free dofs.
    max_levels : int
        Upper bound on the number of grids.
    element_matrix : ndarray, optional
        Element matrix of the solid material. With it the finest grid is never
        assembled: its operator is applied element by element
        (:class:`~topopt.assembly.ElementOperator`, in the full dof numbering), and
        :meth:`update` needs the element moduli instead of the matrix.
    """

    def __init__(self, grid: Grid, free_dofs: np.ndarray, *, coarse_dofs: int = 6000,
                 max_levels: int = 12, element_matrix: np.ndarray | None = None):
        self.grid = grid
        self.dim = grid.dim
        self.shapes = [grid.shape]
        self.free = [np.asarray(free_dofs, dtype=np.int64)]
        self.transfers: list[sparse.csr_matrix] = []
        self.restrictions: list[sparse.csr_matrix] = []
        self.coarsenings: list[_Coarsening] = []
        self.patterns: list[StructuredPattern | None] = [None]
        self.fine_operator = (None if element_matrix is None else
                              ElementOperator(grid, element_matrix, self.free[0]))
        shape = grid.shape
        while (len(self.shapes) < max_levels and self.free[-1].size > coarse_dofs
               and max(shape) >= 2):
            full = prolongation(shape)
            P = full[self.free[-1]]
            cfree = _coarse_free_dofs(shape, self.free[-1], P)
            if self.fine_operator is not None and not self.transfers:
                # Finest grid in the full numbering: the rows of fixed dofs stay empty.
                keep = np.zeros(grid.n_dofs)
                keep[self.free[0]] = 1.0
                T = (sparse.diags(keep) @ full[:, cfree]).tocsr()
                T.eliminate_zeros()
                self.transfers.append(T)
            else:
                self.transfers.append(P[:, cfree].tocsr())
            del full
            # Interpolation weights are 1, 1/2, 1/4 and 1/8: exact in single precision,
            # which halves what the V-cycle reads for them besides the indices.
            self.transfers[-1].data = self.transfers[-1].data.astype(np.float32)
            self.restrictions.append(self.transfers[-1].T.tocsr())
            self.coarsenings.append(_Coarsening(shape, self.free[-1]))
            shape = coarse_shape(shape)
            self.shapes.append(shape)
            self.free.append(cfree)
            self.patterns.append(StructuredPattern(Grid(shape, 1.0), cfree))
        self.levels: list[_Level] = []
        self._coarse_factor = None

    @property
    def n_levels(self) -> int:
        """Number of grids in the hierarchy."""
        return len(self.shapes)

    @property
    def full_numbering(self) -> bool:
        """Whether the finest grid works in the full dof numbering (matrix-free)."""
        return self.fine_operator is not None

    def update(self, K: sparse.spmatrix | None, *, element_matrix=None, moduli=None) -> None:
        """Build the operators of every level for the finest matrix ``K``.

        With ``element_matrix`` and ``moduli`` the coarse grids are built element by
        element; a hierarchy made with an element matrix needs ``moduli`` and ignores
        ``K`` (which may be None).
        """
        if self.fine_operator is not None:
            if moduli is None:
                raise ValueError("a matrix-free hierarchy needs the element moduli")
            self.fine_operator.set_moduli(moduli)
            element_matrix = self.fine_operator.element_matrix
            operators = [None]
        else:
            K = _symmetric_csr(K) if getattr(K, "format", "") == "csc" else sparse.csr_matrix(K)
            operators = [K]
        elementwise = element_matrix is not None and moduli is not None
        source = np.asarray(element_matrix, dtype=float)[None] if elementwise else None
        scale = np.asarray(moduli, dtype=float).ravel() if elementwise else None
        for level, P in enumerate(self.transfers):
            if elementwise:
                coarsening = self.coarsenings[level]
                if scale is not None:
                    source = coarsening.first(source[0], scale)
                    scale = None
                else:
                    source = coarsening.next(source)
                pattern = self.patterns[level + 1]
                # Single precision for all but the coarsest grid (see below), written
                # so directly: converting afterwards cost 0.5 s per update at 1e6.
                last = level == len(self.transfers) - 1
                A = pattern.matrix(source, np.ones(source.shape[0]),
                                   dtype=np.float64 if last else np.float32)
                operators.append(_symmetric_csr(A))
            else:
                P = P.astype(float)
                A = (P.T @ operators[-1] @ P).tocsr()
                A.sort_indices()
                operators.append(A)
        previous = self.levels
        self.levels = []
        for level, A in enumerate(operators):
            if level < len(operators) - 1:
                if level > 0 and A.dtype != np.float32:
                    # Coarse grids serve only the V-cycle (CG works on the finest grid):
                    # their matrices are kept in single precision, which cuts what a
                    # product reads from 12 to 8 bytes per entry. The coarsest grid's
                    # factorisation below stays in double.
                    A = sparse.csr_matrix((A.data.astype(np.float32), A.indices, A.indptr),
                                          shape=A.shape)
                lev = _Level(A, previous[level].eigenvector if previous else None,
                             operator=self.fine_operator if level == 0 else None)
                lev.P = self.transfers[level]
                lev.R = self.restrictions[level]
                lev.allocate()
                self.levels.append(lev)
        self._coarse_factor = _factorise(operators[-1])

    def use_safe_bounds(self) -> None:
        """Smooth with Gershgorin bounds of the spectra (guaranteed, if loose)."""
        for lev in self.levels:
            lev.lmax = max(lev.lmax, lev.gershgorin_bound())

    def release(self) -> None:
        """Drop the operators (kept: eigenvector estimates for the next update).

        Between optimisation iterations this frees the finest matrix, which otherwise
        stays alive while the next one is assembled (2 GB at 1e6 H8 elements).
        """
        for lev in self.levels:
            lev.A = None
            lev.operator = None
            lev.x = lev.r = lev.d = lev.Ad = lev.coarse_rhs = None
        self._coarse_factor = None

    def vcycle(self, b: np.ndarray, level: int = 0, *, degree: int = 2,
               fine_degree: int = FINE_DEGREE) -> np.ndarray:
        """Apply one symmetric V-cycle (an approximation of A^-1 b).

        ``fine_degree`` is the smoother's degree on the finest grid, ``degree`` on the
        coarser ones. The result lives in a work array of the level and is overwritten
        by the next call: copy it to keep it.
        """
        if level == len(self.levels):
            return self._coarse_factor(b)
        lev = self.levels[level]
        d = fine_degree if level == 0 else degree
        x = _chebyshev(lev, b, None, d, residual=True)  # lev.r = b - A x
        correction = self.vcycle(_matvec(lev.R, lev.r, lev.coarse_rhs), level + 1,
                                 degree=degree)
        _matvec(lev.P, correction, x, add=True)
        return _chebyshev(lev, b, x, d)


def _symmetric_csr(A: sparse.csc_matrix) -> sparse.csr_matrix:
    """View a symmetric CSC matrix as CSR without copying (CSC of A = CSR of A^T = A)."""
    return sparse.csr_matrix((A.data, A.indices, A.indptr), shape=A.shape)


def _factorise(A: sparse.spmatrix):
    """Direct solver for the coarsest grid: CHOLMOD if available, else SuperLU."""
    A = sparse.csc_matrix(A)
    try:
        from sksparse.cholmod import cholesky
    except ImportError:
        from scipy.sparse.linalg import splu

        lu = splu(A, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
                  options={"SymmetricMode": True})
        return lu.solve
    return cholesky(A)


# Vector kernels of the smoother and of CG. Each fuses what would be two to four numpy
# passes over the vectors into one threaded pass: at 1e6 H8 elements a pass over a
# vector of the finest grid (3e6 dofs) takes 3-5 ms, and the numpy form spent about a
# tenth of each CG iteration on them (profile of the 1e6 bracket). The gain is modest
# (measured on that bracket: 2.6 s against 3.2 s over six solves of 40 s of products;
# benchmarks/notes.md) but costs nothing in accuracy.


def _chebyshev_step_py(x, d, r, Ad, inv_diag, a, c):  # pragma: no cover - compiled
    for i in numba.prange(x.size):
        x[i] += d[i]
        r[i] -= Ad[i]
        d[i] = a * d[i] + c * inv_diag[i] * r[i]


def _chebyshev_start_zero_py(b, x, r, d, inv_diag, scale):  # pragma: no cover - compiled
    """Set x = 0, r = b, d = scale D^-1 b."""
    for i in numba.prange(b.size):
        x[i] = 0.0
        r[i] = b[i]
        d[i] = scale * inv_diag[i] * b[i]


def _chebyshev_start_py(b, Ad, r, d, inv_diag, scale):  # pragma: no cover - compiled
    """Set r = b - A x (A x given in Ad), d = scale D^-1 r."""
    for i in numba.prange(b.size):
        ri = b[i] - Ad[i]
        r[i] = ri
        d[i] = scale * inv_diag[i] * ri


def _add_py(x, d):  # pragma: no cover - compiled
    for i in numba.prange(x.size):
        x[i] += d[i]


def _add_and_subtract_py(x, d, r, Ad):  # pragma: no cover - compiled
    """Add d to x and subtract Ad from r."""
    for i in numba.prange(x.size):
        x[i] += d[i]
        r[i] -= Ad[i]


def _cg_step_py(x, r, p, Ap, alpha, b):  # pragma: no cover - compiled
    """Step x += alpha p, r -= alpha Ap; return b . x (the stopping rule's energy)."""
    acc = 0.0
    for i in numba.prange(x.size):
        x[i] += alpha * p[i]
        r[i] -= alpha * Ap[i]
        acc += b[i] * x[i]
    return acc


def _direction_py(p, z, beta):  # pragma: no cover - compiled
    """Set p = z + beta p."""
    for i in numba.prange(p.size):
        p[i] = z[i] + beta * p[i]


def _dot_py(a, b):  # pragma: no cover - compiled
    acc = 0.0
    for i in numba.prange(a.size):
        acc += a[i] * b[i]
    return acc


#: Vector updates shorter than this run on one thread (see :data:`SERIAL_NNZ`).
SERIAL_LENGTH = 1 << 17


class _VectorKernel:
    """A vector kernel compiled twice: threaded for long vectors, serial for short ones."""

    def __init__(self, function):
        self.parallel = numba.njit(parallel=True, cache=True)(function)
        self.serial = numba.njit(cache=True)(function)

    def __call__(self, *args):
        n = args[0].size
        return (self.parallel if n >= SERIAL_LENGTH else self.serial)(*args)


_chebyshev_step = _VectorKernel(_chebyshev_step_py)
_chebyshev_start_zero = _VectorKernel(_chebyshev_start_zero_py)
_chebyshev_start = _VectorKernel(_chebyshev_start_py)
_add = _VectorKernel(_add_py)
_add_and_subtract = _VectorKernel(_add_and_subtract_py)
_cg_step = _VectorKernel(_cg_step_py)
_direction = _VectorKernel(_direction_py)
_dot = _VectorKernel(_dot_py)


def _chebyshev(lev: _Level, b: np.ndarray, x: np.ndarray | None, degree: int, *,
               residual: bool = False) -> np.ndarray:
    """Chebyshev smoothing of D^-1 A on [lmax / 30, lmax] (x None means zero start).

    Works in the level's arrays: returns ``lev.x`` (x, if given, must be ``lev.x``);
    with ``residual`` also leaves b - A x in ``lev.r``, at the cost of the product the
    last step would otherwise skip. On the finest grid of a matrix-free hierarchy the
    products are done in single precision (the smoother only steers the
    preconditioner; CG itself uses the double-precision operator).
    """
    lmax = lev.lmax
    lmin = lmax / 30.0
    theta = 0.5 * (lmax + lmin)
    delta = 0.5 * (lmax - lmin)
    sigma = theta / delta
    rho = 1.0 / sigma
    r, d, Ad = lev.r, lev.d, lev.Ad
    if x is None:
        x = lev.x
        _chebyshev_start_zero(b, x, r, d, lev.inv_diag, 1.0 / theta)
    else:
        lev.matvec(x, Ad, single=True)
        _chebyshev_start(b, Ad, r, d, lev.inv_diag, 1.0 / theta)
    for k in range(degree):
        if k == degree - 1:
            if residual:
                lev.matvec(d, Ad, single=True)
                _add_and_subtract(x, d, r, Ad)
            else:
                _add(x, d)
            break
        lev.matvec(d, Ad, single=True)
        rho_new = 1.0 / (2.0 * sigma - rho)
        _chebyshev_step(x, d, r, Ad, lev.inv_diag, rho_new * rho, 2.0 * rho_new / delta)
        rho = rho_new
    return x


def multigrid_cg(hierarchy: MultigridHierarchy, b: np.ndarray, x0: np.ndarray | None = None,
                 *, tolerance: float = DEFAULT_TOLERANCE, max_iterations: int = 500,
                 degree: int = 2, fine_degree: int = FINE_DEGREE) -> tuple[np.ndarray, int, bool]:
    """Solve A x = b by CG preconditioned with one V-cycle of ``hierarchy``.

    Parameters
    ----------
    hierarchy : MultigridHierarchy
        Built for A with :meth:`MultigridHierarchy.update`.
    b : ndarray
        Right-hand side (one column).
    x0 : ndarray, optional
        Start vector (e.g. the previous solution: a warm start).
    tolerance : float
        Stop when the estimated relative energy-norm error
        sqrt(r^T M^-1 r / b^T x) is at most this.
    max_iterations : int
        Iteration limit.
    degree, fine_degree : int
        Degree of the Chebyshev smoother on the coarser grids and on the finest grid.

    Returns
    -------
    x, iterations, converged
    """
    b = np.asarray(b, dtype=float)
    if not hierarchy.levels:  # the finest grid is already the coarsest: direct solve
        return hierarchy._coarse_factor(b), 0, True
    if not np.any(b):
        return np.zeros_like(b), 0, True
    if hierarchy.full_numbering:
        free = hierarchy.free[0]
        n = hierarchy.grid.n_dofs
        b_full = np.zeros(n)
        b_full[free] = b
        x_full = None
        if x0 is not None:
            x_full = np.zeros(n)
            x_full[free] = x0
        x, its, ok = _safe_pcg(hierarchy, b_full, x_full, tolerance, max_iterations,
                                   (degree, fine_degree))
        return x[free], its, ok
    return _safe_pcg(hierarchy, b, x0, tolerance, max_iterations, (degree, fine_degree))


class _Indefinite(Exception):
    """CG met r^T M^-1 r <= 0 or p^T A p <= 0: the preconditioner is not SPD."""


def _safe_pcg(hierarchy, b, x0, tolerance, max_iterations, degrees):
    try:
        return _pcg(hierarchy, b, x0, tolerance, max_iterations, degrees)
    except _Indefinite:
        hierarchy.use_safe_bounds()
        x, its, ok = _pcg(hierarchy, b, x0, tolerance, max_iterations, degrees)
        return x, its, ok


def _pcg(hierarchy, b, x0, tolerance, max_iterations, degrees):
    degree, fine_degree = degrees
    lev = hierarchy.levels[0]
    x = np.zeros_like(b) if x0 is None else np.array(x0, dtype=float)
    r = b - lev.matvec(x) if x0 is not None else b.copy()
    z = hierarchy.vcycle(r, degree=degree, fine_degree=fine_degree)
    p = z.copy()
    Ap = np.empty_like(b)
    rz = _dot(r, z)
    if rz <= 0.0:
        raise _Indefinite
    energy = _dot(b, x)
    if x0 is not None and energy > 0 and rz <= tolerance**2 * energy:
        return x, 0, True
    for it in range(1, max_iterations + 1):
        lev.matvec(p, Ap)
        pAp = _dot(p, Ap)
        if pAp <= 0.0:
            raise _Indefinite
        alpha = rz / pAp
        energy = _cg_step(x, r, p, Ap, alpha, b)
        z = hierarchy.vcycle(r, degree=degree, fine_degree=fine_degree)
        rz_new = _dot(r, z)
        if rz_new <= 0.0:
            raise _Indefinite
        if energy > 0 and rz_new <= tolerance**2 * energy:
            return x, it, True
        _direction(p, z, rz_new / rz)
        rz = rz_new
    return x, max_iterations, False
