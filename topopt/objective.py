"""Compliance over load cases and volume, with sensitivities.

Modified SIMP: E(rho) = E * (void + (1 - void) * rho**p). For a load case with force
f and displacement u, compliance is f.u = u^T K u, and its derivative with respect to
the physical density of element e is -dE_e/drho * u_e^T K0_e u_e (K0_e: the element
matrix of solid material), because the loads do not depend on the design
(Bendsoe & Sigmund 2003, ch. 1).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from topopt.assembly import Assembler, element_energies
from topopt.elements import element_stiffness
from topopt.solvers import make_solver


def simp_modulus(rho: np.ndarray, *, penalty: float, void_stiffness: float) -> np.ndarray:
    """Relative modulus E(rho)/E of modified SIMP.

    Examples
    --------
    >>> simp_modulus(np.array([0.0, 1.0]), penalty=3.0, void_stiffness=1e-9).tolist()
    [1e-09, 1.0]
    """
    return void_stiffness + (1.0 - void_stiffness) * rho**penalty


def simp_modulus_derivative(rho: np.ndarray, *, penalty: float, void_stiffness: float) -> np.ndarray:
    """Derivative of :func:`simp_modulus` with respect to rho."""
    return (1.0 - void_stiffness) * penalty * rho ** (penalty - 1.0)


@dataclass
class Evaluation:
    """Compliance of one physical density field."""

    compliance: float
    case_compliance: np.ndarray
    gradient: np.ndarray
    displacements: np.ndarray


class ComplianceModel:
    """The finite-element model of a problem: assembly, solver and loads, built once.

    Parameters
    ----------
    problem : Problem
        A validated problem.
    solver : str, optional
        Overrides ``problem.optimize.solver``.
    """

    def __init__(self, problem, *, solver: str | None = None):
        grid = problem.grid
        self.problem = problem
        self.grid = grid
        self.penalty = problem.optimize.penalty
        self.void_stiffness = problem.material.void_stiffness
        self.element_matrix = element_stiffness(
            grid.dim,
            youngs_modulus=problem.material.youngs_modulus,
            poisson_ratio=problem.material.poisson_ratio,
            element_size=grid.element_size,
            thickness=grid.thickness,
        )
        self.free = problem.free_dofs()
        self.assembler = Assembler(grid, self.element_matrix, self.free)
        self.forces = problem.load_vectors()
        self.solver = make_solver(solver or problem.optimize.solver, grid=grid, free_dofs=self.free,
                                  element_matrix=self.element_matrix)

    def moduli(self, physical: np.ndarray) -> np.ndarray:
        """Relative element moduli of a physical density (flat)."""
        return simp_modulus(np.ravel(physical), penalty=self.penalty,
                            void_stiffness=self.void_stiffness)

    def displacements(self, physical: np.ndarray, *, moduli: np.ndarray | None = None,
                      loop: bool = False) -> np.ndarray:
        """Global displacements for every load case, shape (n_dofs, n_cases).

        ``moduli`` (from :meth:`moduli`) saves computing them again when the caller has
        them. ``loop``: an iterate of the design loop (an iterative solver may stop at
        its looser loop tolerance); everything reported is solved with ``loop=False``.
        """
        if moduli is None:
            moduli = self.moduli(physical)
        # A matrix-free solver (multigrid with the element matrix) never needs K.
        K = None if getattr(self.solver, "matrix_free", False) else self.assembler.assemble(moduli)
        U = np.zeros_like(self.forces)
        U[self.free] = self.solver.solve(K, self.forces[self.free], moduli=moduli,
                                          loop=loop).reshape(
            self.free.size, -1)
        return U

    def element_energy(self, U: np.ndarray) -> np.ndarray:
        """u_e^T K0_e u_e per element and load case, shape (n_elements, n_cases)."""
        return element_energies(U, self.grid.element_dofs, self.element_matrix)

    def evaluate(self, physical: np.ndarray, *, loop: bool = False) -> Evaluation:
        """Compliance summed over load cases and its gradient in grid shape.

        ``loop``: an iterate of the design loop (see :meth:`displacements`).
        """
        rho = np.asarray(physical, dtype=float)
        moduli = self.moduli(rho)
        U = self.displacements(rho, moduli=moduli, loop=loop)
        case_energy = self.element_energy(U)
        case_c = energy_compliances(self.forces, U, moduli, case_energy)
        energy = case_energy.sum(axis=1)
        dE = simp_modulus_derivative(rho.ravel(), penalty=self.penalty, void_stiffness=self.void_stiffness)
        gradient = (-dE * energy).reshape(rho.shape)
        return Evaluation(float(case_c.sum()), case_c, gradient, U)


def energy_compliances(forces: np.ndarray, U: np.ndarray, moduli: np.ndarray,
                       case_energy: np.ndarray) -> np.ndarray:
    """Compliance of each load case as 2 f.u - u^T K u.

    Equal to f.u for the exact u; for an iterative u_h it is f.u - ||u - u_h||_K^2,
    an error of second order where f.u alone errs to first order after a warm start
    (principle of minimum potential energy; see topopt/multigrid.py). ``case_energy``
    holds u_e^T K0 u_e per element and case, so u^T K u = moduli @ case_energy.

    Examples
    --------
    >>> f = np.array([[1.0], [0.0]])
    >>> energy_compliances(f, np.array([[0.5], [0.0]]), np.array([1.0]), np.array([[0.5]]))
    array([0.5])
    """
    return 2.0 * np.einsum("dc,dc->c", forces, U) - moduli @ case_energy


def volume_fraction(physical: np.ndarray) -> float:
    """Mean physical density over all elements (passive ones included)."""
    return float(np.mean(physical))


def grey_level(physical: np.ndarray) -> float:
    """Share of elements with 0.1 < rho < 0.9 (a non-discreteness measure; cf. Sigmund 2007)."""
    rho = np.asarray(physical)
    return float(np.mean((rho > 0.1) & (rho < 0.9)))
