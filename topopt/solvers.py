"""Linear solvers for K u = f behind one interface, found by name in :data:`SOLVERS`.

Every solver is made by a factory ``factory(*, grid, free_dofs, element_matrix=None)``
and has ``name``, ``iterations`` (of the last solve; 0 for direct solvers) and
``solve(K, F, *, moduli=None) -> U`` for a symmetric positive definite CSC matrix over
the free dofs and right-hand sides ``F`` of shape (n_free, n_cases). ``element_matrix``
and ``moduli`` (the relative element moduli K was assembled from) are optional hints
that the multigrid solver uses to build its coarse grids element by element; direct
solvers ignore them. A solver with ``matrix_free = True`` (multigrid given the element
matrix) applies the finest operator element by element and accepts ``K=None`` when the
moduli are given, so the caller need not assemble K (ComplianceModel does not).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from scipy import sparse
from scipy.sparse import linalg as sla

from topopt.grid import Grid


def cholmod_available() -> bool:
    """Whether scikit-sparse's CHOLMOD binding can be imported."""
    try:
        import sksparse.cholmod  # noqa: F401
    except ImportError:
        return False
    return True


class CholmodSolver:
    """Sparse Cholesky by CHOLMOD; the symbolic analysis is done once and reused.

    The sparsity pattern of K does not change between optimisation iterations, so only
    the numeric factorisation is repeated.
    """

    name = "cholmod"

    def __init__(self, *, grid: Grid | None = None, free_dofs: np.ndarray | None = None,
                 element_matrix: np.ndarray | None = None):
        from sksparse.cholmod import analyze  # noqa: F401  (fail early if missing)

        self._factor = None
        self.iterations = 0

    def solve(self, K: sparse.spmatrix, F: np.ndarray, *, moduli=None,
              loop: bool = False) -> np.ndarray:
        """Solve K U = F (exactly, ``loop`` or not)."""
        from sksparse.cholmod import analyze

        K = sparse.csc_matrix(K)
        if self._factor is None:
            self._factor = analyze(K, mode="supernodal")
        self._factor.cholesky_inplace(K)
        return np.asarray(self._factor(np.asarray(F, dtype=float)))


class ScipySolver:
    """SuperLU from SciPy with a symmetric ordering (fallback when CHOLMOD is missing)."""

    name = "scipy"

    def __init__(self, *, grid: Grid | None = None, free_dofs: np.ndarray | None = None,
                 element_matrix: np.ndarray | None = None):
        self.iterations = 0

    def solve(self, K: sparse.spmatrix, F: np.ndarray, *, moduli=None,
              loop: bool = False) -> np.ndarray:
        """Solve K U = F (exactly, ``loop`` or not)."""
        lu = sla.splu(
            sparse.csc_matrix(K),
            permc_spec="MMD_AT_PLUS_A",
            diag_pivot_thresh=0.0,
            options={"SymmetricMode": True},
        )
        return lu.solve(np.asarray(F, dtype=float))


class MultigridSolver:
    """CG preconditioned by a geometric multigrid V-cycle (see :mod:`topopt.multigrid`).

    Each load case starts from its solution of the previous call (a warm start: in an
    optimisation the design changes little between iterations).

    Parameters
    ----------
    grid : Grid
        The finest grid (required: the hierarchy is geometric).
    free_dofs : ndarray of int
        Free dofs of the finest grid.
    element_matrix : ndarray, optional
        Element matrix of the solid material; with the ``moduli`` passed to
        :meth:`solve` the coarse operators are built element by element.
    tolerance : float
        Relative energy-norm error at which CG stops (the looser
        :data:`~topopt.multigrid.LOOP_TOLERANCE` inside the design loop, if larger).
    max_iterations : int
        CG iteration limit; reaching it raises ``RuntimeError``.
    coarse_dofs : int
        Coarsening stops once a grid has at most this many free dofs.

    Examples
    --------
    >>> from topopt.elements import q4_stiffness
    >>> from topopt.assembly import Assembler
    >>> g = Grid((16, 8), 1.0)
    >>> free = np.arange(2 * 9, g.n_dofs)              # x = 0 column of nodes fixed
    >>> Ke = q4_stiffness(youngs_modulus=1.0, poisson_ratio=0.3, element_size=1.0)
    >>> K = Assembler(g, Ke, free).assemble(np.ones(g.n_elements))
    >>> s = MultigridSolver(grid=g, free_dofs=free, element_matrix=Ke, coarse_dofs=50)
    >>> u = s.solve(K, np.ones((free.size, 1)), moduli=np.ones(g.n_elements))
    >>> from scipy.sparse.linalg import spsolve
    >>> ref = spsolve(K.tocsc(), np.ones(free.size))
    >>> bool(abs(u.sum() - ref.sum()) < 1e-8 * ref.sum())  # compliance f.u, f = 1
    True
    """

    name = "multigrid"

    def __init__(self, *, grid: Grid, free_dofs: np.ndarray,
                 element_matrix: np.ndarray | None = None,
                 tolerance: float | None = None, max_iterations: int = 1000,
                 coarse_dofs: int = 6000):
        from topopt.multigrid import DEFAULT_TOLERANCE, LOOP_TOLERANCE, MultigridHierarchy

        if grid is None or free_dofs is None:
            raise ValueError("solver 'multigrid' needs the grid and the free dofs")
        # With the element matrix the finest grid is applied element by element and
        # never assembled (matrix_free): the caller may pass K=None with the moduli.
        self.hierarchy = MultigridHierarchy(grid, free_dofs, coarse_dofs=coarse_dofs,
                                            element_matrix=element_matrix)
        self.matrix_free = element_matrix is not None
        self._grid, self._free, self._coarse_dofs = grid, free_dofs, coarse_dofs
        self.element_matrix = element_matrix
        self.tolerance = DEFAULT_TOLERANCE if tolerance is None else float(tolerance)
        self.loop_tolerance = max(self.tolerance, LOOP_TOLERANCE)
        self.max_iterations = int(max_iterations)
        self.iterations = 0
        self._previous: np.ndarray | None = None

    def solve(self, K: sparse.spmatrix, F: np.ndarray, *, moduli=None,
              loop: bool = False) -> np.ndarray:
        """Solve K U = F (iterations of all load cases summed in ``iterations``).

        ``loop``: an iterate of the design loop, solved to ``loop_tolerance`` instead of
        ``tolerance`` (see :data:`topopt.multigrid.LOOP_TOLERANCE`).
        """
        # The vector operations of CG, the small coarse factorisation and the batched
        # 24 x 24 products are too small for threaded BLAS: on 2 cores, OpenBLAS threads
        # made a 33,000-dof solve 1.5-3x slower. The compiled matrix products keep their
        # own (numba) threads.
        from threadpoolctl import threadpool_limits

        with threadpool_limits(limits=1, user_api="blas"):
            return self._solve(K, F, moduli, self.loop_tolerance if loop else self.tolerance)

    def _solve(self, K, F, moduli, tolerance):
        from topopt.multigrid import MultigridHierarchy, multigrid_cg

        F = np.asarray(F, dtype=float)
        F2 = F.reshape(F.shape[0], -1)
        use_elements = moduli is not None and self.element_matrix is not None
        if self.matrix_free and not use_elements:
            # No moduli given: fall back to a hierarchy over the assembled matrix.
            if K is None:
                raise ValueError("solver 'multigrid' needs the matrix or the moduli")
            self.hierarchy = MultigridHierarchy(self._grid, self._free,
                                                coarse_dofs=self._coarse_dofs)
            self.matrix_free = False
        elif K is None and not self.matrix_free:
            raise ValueError("solver 'multigrid' needs the matrix or the moduli")
        self.hierarchy.update(K, element_matrix=self.element_matrix if use_elements else None,
                              moduli=moduli if use_elements else None)
        warm = self._previous is not None and self._previous.shape == F2.shape
        U = np.zeros_like(F2)
        self.iterations = 0
        for c in range(F2.shape[1]):
            x0 = self._previous[:, c] if warm else None
            U[:, c], its, ok = multigrid_cg(self.hierarchy, F2[:, c], x0,
                                            tolerance=tolerance,
                                            max_iterations=self.max_iterations)
            self.iterations += its
            if not ok:
                raise RuntimeError(
                    f"multigrid-CG did not converge in {self.max_iterations} iterations"
                )
        self._previous = U.copy()
        self.hierarchy.release()
        return U.reshape(F.shape)


#: Solver factories by name.
SOLVERS: dict[str, Callable[..., object]] = {
    "cholmod": CholmodSolver,
    "scipy": ScipySolver,
    "multigrid": MultigridSolver,
}

#: Free-dof counts above which "auto" picks multigrid-CG over the direct solver.
#: Measured with benchmarks/iteration.py (benchmarks/results.md, 2-core AMD EPYC, one
#: full iteration on the smooth cantilever field, CHOLMOD with its analysis reused):
#: 3D, quiet machine: multigrid 0.30 s vs CHOLMOD 0.78 s at 33,048 dofs, 1.4 s vs
#: 12.2 s at 190,464; single-threaded under load: 0.10 s vs 0.14 s (CPU) at 7,260
#: dofs. 2D, quiet: 0.05 s vs 0.07 s at 20,448 dofs, 0.13 s vs 0.25 s at 60,024, 0.34 s
#: vs 0.94 s at 201,600; single-threaded under load: equal (0.08 s) at 20,448. Below
#: these sizes both take about 0.1 s and the direct solve is exact.
AUTO_MULTIGRID_DOFS = {2: 50_000, 3: 10_000}


def choose_solver(*, grid: Grid, free_dofs: np.ndarray) -> str:
    """Name of the solver ``"auto"`` picks for this problem.

    Direct (CHOLMOD, else SciPy) below :data:`AUTO_MULTIGRID_DOFS` free dofs,
    multigrid-CG above. Without CHOLMOD the SciPy direct solver is several times slower
    (the spsolve column of benchmarks/results.md), so multigrid takes over at a tenth
    of that size (a rule of thumb, not a measured crossover).
    """
    n_free = int(np.asarray(free_dofs).size)
    limit = AUTO_MULTIGRID_DOFS[grid.dim]
    if cholmod_available():
        return "cholmod" if n_free <= limit else "multigrid"
    return "scipy" if n_free <= limit // 10 else "multigrid"


def make_solver(name: str, *, grid: Grid, free_dofs: np.ndarray,
                element_matrix: np.ndarray | None = None):
    """Create a solver by name (``"auto"`` picks the best available).

    Examples
    --------
    >>> g = Grid((2, 2), 1.0)
    >>> make_solver("scipy", grid=g, free_dofs=np.arange(6, g.n_dofs)).name
    'scipy'
    """
    if name == "auto":
        name = choose_solver(grid=grid, free_dofs=free_dofs)
    if name not in SOLVERS:
        raise ValueError(f"solver must be one of {sorted(SOLVERS) + ['auto']}, got {name!r}")
    if name == "cholmod" and not cholmod_available():
        raise ValueError("solver 'cholmod' requested but scikit-sparse is not installed")
    return SOLVERS[name](grid=grid, free_dofs=free_dofs, element_matrix=element_matrix)


def blas_info() -> str:
    """Describe in one line the BLAS numpy (and so SciPy) is using."""
    try:
        from threadpoolctl import threadpool_info

        libs = [f"{i.get('internal_api')} {i.get('version') or ''}".strip()
                for i in threadpool_info() if i.get("user_api") == "blas"]
        return ", ".join(libs) or "unknown"
    except Exception:  # pragma: no cover - diagnostic only
        return "unknown"


def cholmod_blas() -> str:
    """Which BLAS library the CHOLMOD binding is linked to (from the shared-library map)."""
    import os
    import subprocess

    try:
        import sksparse.cholmod as ch
    except ImportError:
        return "not installed"
    try:
        out = subprocess.run(["ldd", ch.__file__], capture_output=True, text=True,
                             timeout=10).stdout
    except (OSError, subprocess.SubprocessError):
        return "unknown"
    # ldd lists libcholmod's own dependencies too, so the BLAS it resolves to shows here.
    blas_lines = [line for line in out.splitlines() if "blas" in line.lower()]
    resolved = {os.path.realpath(line.split("=>")[1].split("(")[0].strip())
                for line in blas_lines if "=>" in line}
    if any("openblas" in r for r in resolved):
        return "OpenBLAS"
    if resolved:
        return "reference BLAS (" + ", ".join(sorted(resolved)) + ")"
    return ", ".join(line.split()[0] for line in blas_lines) or "unknown"
