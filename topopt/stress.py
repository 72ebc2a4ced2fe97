"""Structural results of a design: displacements at the loads, von Mises stress, mass.

Which stress is reported. A SIMP element of density rho has the stiffness
E(rho) = E * (void + (1 - void) * rho**p), so its "average" stress E(rho) * eps goes to
zero in void and is not what the printed part carries. We report the stress the solid
material would carry at the element's strain, sigma = C0 * eps (C0: the solid
constitutive matrix), and only for solid elements (density >= 0.5, the level at which
the part is printed). This is the microstructure-consistent ("relaxed") convention of
Duysinx & Bendsoe, Topology optimization of continuum structures with local stress
constraints, IJNME 43(8):1453-1478, 1998 (the local stress of a porous element is the
solid-material stress at its strain); in void elements it has no meaning.

Stress is evaluated at the element centre (the one-point value of the bilinear /
trilinear element, its most accurate point for the constant part of the stress).
On voxel boundaries the stair steps create re-entrant corners, so the largest element
stresses there depend on the mesh and are only indicative; the 99th percentile of the
solid elements is reported beside the plain maximum as a steadier figure (common
practice).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numpy as np

from topopt.elements import _strain_displacement, elasticity_matrix

#: Elements at or above this physical density count as solid (printed).
SOLID_LEVEL = 0.5
#: Percentile of the solid elements' von Mises stress reported as the robust maximum.
ROBUST_PERCENTILE = 99.0


def element_strains(grid, displacements: np.ndarray) -> np.ndarray:
    """Engineering strains at the element centres.

    Parameters
    ----------
    grid : Grid
        The structured grid.
    displacements : ndarray, shape (n_dofs,) or (n_dofs, n_cases)
        Global displacement vector(s).

    Returns
    -------
    ndarray, shape (n_elements, n_strain, n_cases)
        Strain order as in :func:`topopt.elements.elasticity_matrix`.

    Examples
    --------
    >>> from topopt.grid import Grid
    >>> g = Grid((1, 1), 1.0)
    >>> u = np.array([0.0, 0.0, 0.0, 0.0, 0.1, 0.0, 0.1, 0.0])  # nodes at x = 1 move: stretch along x
    >>> np.round(element_strains(g, u)[0, :, 0], 12).tolist()
    [0.1, 0.0, 0.0]
    """
    U = np.asarray(displacements, dtype=float)
    if U.ndim == 1:
        U = U[:, None]
    if U.shape[0] != grid.n_dofs:
        raise ValueError(f"displacements must have {grid.n_dofs} rows, got {U.shape[0]}")
    B = _strain_displacement(grid.dim, np.zeros(grid.dim), grid.element_size)
    ue = U[grid.element_dofs]  # (n_el, n_edof, n_cases)
    return np.einsum("si,eic->esc", B, ue)


def von_mises(stress: np.ndarray, dim: int) -> np.ndarray:
    """Von Mises equivalent stress of stress components along axis 1.

    2D (plane stress, components sxx, syy, sxy): sqrt(sxx^2 - sxx syy + syy^2 + 3 sxy^2).
    3D (sxx, syy, szz, syz, sxz, sxy): sqrt(((sxx-syy)^2 + (syy-szz)^2 + (szz-sxx)^2) / 2
    + 3 (syz^2 + sxz^2 + sxy^2)).

    Examples
    --------
    >>> float(von_mises(np.array([[0.0, 0.0, 1.0]]), 2)[0])  # pure shear: sqrt(3) tau
    1.7320508075688772
    """
    s = np.asarray(stress, dtype=float)
    if dim == 2:
        sx, sy, txy = s[:, 0], s[:, 1], s[:, 2]
        return np.sqrt(np.maximum(sx * sx - sx * sy + sy * sy + 3.0 * txy * txy, 0.0))
    sx, sy, sz, tyz, txz, txy = (s[:, i] for i in range(6))
    return np.sqrt(0.5 * ((sx - sy) ** 2 + (sy - sz) ** 2 + (sz - sx) ** 2)
                   + 3.0 * (tyz**2 + txz**2 + txy**2))


def solid_von_mises(problem, displacements: np.ndarray) -> np.ndarray:
    """Von Mises stress of the solid material at every element centre, per load case.

    Returns an array of shape (n_elements, n_cases): sigma = C0 * eps at the element
    centre (see the module notes; meaningful for solid elements only).
    """
    grid = problem.grid
    D = elasticity_matrix(grid.dim, youngs_modulus=problem.material.youngs_modulus,
                          poisson_ratio=problem.material.poisson_ratio)
    strain = element_strains(grid, displacements)
    stress = np.einsum("ts,esc->etc", D, strain)
    return np.stack([von_mises(stress[:, :, c], grid.dim) for c in range(stress.shape[2])], axis=1)


@dataclass(frozen=True)
class CaseResult:
    """Structural figures of one load case (lengths, forces, stresses in the problem's units).

    ``displacement_along_load`` is the force-weighted mean, over the case's loads, of the
    mean displacement of each load's nodes along that load's direction; it equals the
    case compliance divided by the sum of the load magnitudes (for one load: how far the
    loaded nodes move along the force, on average). ``max_displacement`` is the largest
    displacement magnitude at any loaded node. Stresses are over solid elements only.
    """

    name: str
    compliance: float
    max_displacement: float
    displacement_along_load: float
    von_mises_max: float | None
    von_mises_p99: float | None
    von_mises_max_at: tuple[float, ...] | None
    displacement: np.ndarray = field(repr=False)  # (n_nodes, dim)
    von_mises: np.ndarray = field(repr=False)  # grid shape, NaN outside solid elements

    def as_dict(self) -> dict:
        """The JSON-ready figures (no arrays)."""
        return {
            "name": self.name,
            "compliance": self.compliance,
            "max_displacement": self.max_displacement,
            "displacement_along_load": self.displacement_along_load,
            "von_mises_max": self.von_mises_max,
            "von_mises_p99": self.von_mises_p99,
            "von_mises_max_at": None if self.von_mises_max_at is None else list(self.von_mises_max_at),
        }


@dataclass(frozen=True)
class StructuralResults:
    """Structural results of a density field: one :class:`CaseResult` per load case."""

    cases: tuple[CaseResult, ...]
    solid_volume: float
    mass: float | None  # kg


def structural_results(problem, density: np.ndarray, *, solver: str | None = None) -> StructuralResults:
    """Solve every load case for a physical density and collect the figures.

    Parameters
    ----------
    problem : Problem
        The problem the density belongs to.
    density : ndarray
        Physical density in grid shape.
    solver : str, optional
        Linear solver name; the problem's by default.

    Returns
    -------
    StructuralResults

    Examples
    --------
    >>> from topopt.problem import problem_from_dict
    >>> p = problem_from_dict({"domain": {"shape": [8, 2], "element_size": 1.0},
    ...     "material": {"youngs_modulus": 1000.0, "poisson_ratio": 0.3},
    ...     "restraints": [{"where": {"x": [0, 0]}, "fix": ["x", "y"]}],
    ...     "loads": [{"where": {"x": [8, 8]}, "force": [0.0, -1.0]}],
    ...     "optimize": {"volume_fraction": 0.5}})
    >>> r = structural_results(p, np.ones((8, 2)))
    >>> r.cases[0].displacement_along_load > 0
    True
    """
    rho = np.asarray(density, dtype=float)
    grid = problem.grid
    if rho.shape != grid.shape:
        raise ValueError(f"density must have shape {grid.shape}, got {rho.shape}")
    # The results writers ask for the same figures more than once (summary and VTU):
    # keep the last answer so the model is solved once per design.
    key = (hashlib.sha256(np.ascontiguousarray(rho).tobytes()).hexdigest(), solver)
    cached = _LAST.get("entry")
    if cached is not None and cached[0] is problem and cached[1] == key:
        return cached[2]
    results = _solve_and_measure(problem, rho, solver)
    _LAST["entry"] = (problem, key, results)
    return results


_LAST: dict = {}


def _solve_and_measure(problem, rho: np.ndarray, solver: str | None) -> StructuralResults:
    from topopt.objective import ComplianceModel

    grid = problem.grid
    model = ComplianceModel(problem, solver=solver)
    U = model.displacements(rho)
    case_compliance = np.einsum("dc,dc->c", model.forces, U)
    stress = solid_von_mises(problem, U)
    solid = rho.ravel() >= SOLID_LEVEL
    centers = grid.element_centers()
    d = grid.dim
    cases = []
    for c, name in enumerate(problem.load_cases):
        nodal = U[:, c].reshape(-1, d)
        loads = [load for load in problem.loads if load.case == name]
        loaded = np.unique(np.concatenate([load.nodes for load in loads]))
        magnitude = sum(float(np.linalg.norm(load.force)) for load in loads)
        if solid.any():
            values = stress[solid, c]
            top = int(np.argmax(values))
            vm_max = float(values[top])
            vm_p99 = float(np.percentile(values, ROBUST_PERCENTILE))
            at = tuple(float(v) for v in centers[np.flatnonzero(solid)[top]])
        else:
            vm_max = vm_p99 = at = None
        field_values = np.where(solid, stress[:, c], np.nan).reshape(grid.shape)
        cases.append(CaseResult(
            name=name,
            compliance=float(case_compliance[c]),
            max_displacement=float(np.linalg.norm(nodal[loaded], axis=1).max()),
            displacement_along_load=float(case_compliance[c] / magnitude) if magnitude > 0 else 0.0,
            von_mises_max=vm_max,
            von_mises_p99=vm_p99,
            von_mises_max_at=at,
            displacement=nodal,
            von_mises=field_values,
        ))
    solid_volume = float(solid.sum()) * grid.element_volume
    mass_density = problem.material.mass_density
    # masses are reported in kg whatever the problem's unit system
    mass = (None if mass_density is None
            else solid_volume * float(mass_density) * problem.units.kg_per_mass)
    return StructuralResults(tuple(cases), solid_volume, mass)


def structural_summary(results: StructuralResults) -> dict:
    """``summary.json`` fields: ``load_cases`` (list of figures), ``solid_volume``, ``mass`` (kg)."""
    return {
        "load_cases": [case.as_dict() for case in results.cases],
        "stress_convention": (
            f"von Mises stress of the solid material (C0 * strain) at element centres, "
            f"elements with density >= {SOLID_LEVEL}; p99 = {ROBUST_PERCENTILE:g}th percentile"),
        "solid_volume": results.solid_volume,
        "mass": results.mass,
        "mass_unit": "kg",
    }
