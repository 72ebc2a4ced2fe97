"""Linear solvers for K u = f behind one interface, found by name in :data:`SOLVERS`.

Every solver is made by a factory ``factory(*, grid, free_dofs) -> solver`` and has
``name``, ``iterations`` (of the last solve; 0 for direct solvers) and
``solve(K, F) -> U`` for a symmetric positive definite CSC matrix over the free dofs and
right-hand sides ``F`` of shape (n_free, n_cases).
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

    def __init__(self, *, grid: Grid | None = None, free_dofs: np.ndarray | None = None):
        from sksparse.cholmod import analyze  # noqa: F401  (fail early if missing)

        self._factor = None
        self.iterations = 0

    def solve(self, K: sparse.spmatrix, F: np.ndarray) -> np.ndarray:
        """Solve K U = F."""
        from sksparse.cholmod import analyze

        K = sparse.csc_matrix(K)
        if self._factor is None:
            self._factor = analyze(K, mode="supernodal")
        self._factor.cholesky_inplace(K)
        return np.asarray(self._factor(np.asarray(F, dtype=float)))


class ScipySolver:
    """SuperLU from SciPy with a symmetric ordering (fallback when CHOLMOD is missing)."""

    name = "scipy"

    def __init__(self, *, grid: Grid | None = None, free_dofs: np.ndarray | None = None):
        self.iterations = 0

    def solve(self, K: sparse.spmatrix, F: np.ndarray) -> np.ndarray:
        """Solve K U = F."""
        lu = sla.splu(
            sparse.csc_matrix(K),
            permc_spec="MMD_AT_PLUS_A",
            diag_pivot_thresh=0.0,
            options={"SymmetricMode": True},
        )
        return lu.solve(np.asarray(F, dtype=float))


#: Solver factories by name. Other modules register more (e.g. multigrid).
SOLVERS: dict[str, Callable[..., object]] = {
    "cholmod": CholmodSolver,
    "scipy": ScipySolver,
}


def choose_solver(*, grid: Grid, free_dofs: np.ndarray) -> str:
    """Name of the solver ``"auto"`` picks for this problem."""
    return "cholmod" if cholmod_available() else "scipy"


def make_solver(name: str, *, grid: Grid, free_dofs: np.ndarray):
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
    return SOLVERS[name](grid=grid, free_dofs=free_dofs)


def blas_info() -> str:
    """A one-line description of the BLAS numpy (and so SciPy) is using."""
    try:
        from threadpoolctl import threadpool_info

        libs = [f"{i.get('internal_api')} {i.get('version') or ''}".strip()
                for i in threadpool_info() if i.get("user_api") == "blas"]
        return ", ".join(libs) or "unknown"
    except Exception:  # pragma: no cover - diagnostic only
        return "unknown"


def cholmod_blas() -> str:
    """Which BLAS library the CHOLMOD binding is linked to (from the shared-library map)."""
    try:
        import sksparse.cholmod as ch
    except ImportError:
        return "not installed"
    import subprocess

    try:
        out = subprocess.run(["ldd", ch.__file__], capture_output=True, text=True, timeout=10).stdout
    except (OSError, subprocess.SubprocessError):
        return "unknown"
    # ldd lists libcholmod's own dependencies too, so the BLAS it resolves to shows here.
    names = [line.split()[0] for line in out.splitlines() if "blas" in line.lower()]
    resolved = []
    import os

    for line in out.splitlines():
        if "blas" in line.lower() and "=>" in line:
            target = line.split("=>")[1].split("(")[0].strip()
            resolved.append(os.path.realpath(target))
    if any("openblas" in r for r in resolved):
        return "OpenBLAS"
    if resolved:
        return "reference BLAS (" + ", ".join(sorted(set(resolved))) + ")"
    return ", ".join(names) or "unknown"
