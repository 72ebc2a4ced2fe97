"""Global stiffness and compliance against an independent assembly by scikit-fem.

Source: scikit-fem (Gustafsson & McBain, "scikit-fem: A Python package for finite
element assembly", Journal of Open Source Software 5(52):2369, 2020) used as a reference
library: ElementQuad1 / ElementHex1 in an ElementVector with a piecewise-constant
modulus (ElementQuad0 / ElementHex0 field), see ``tests/conftest.py``. Tolerance: relative
difference < 1e-8 (both are exact quadratures of the same bilinear / trilinear
elements, so only round-off separates them).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import sparse

from topopt.assembly import Assembler
from topopt.elements import element_stiffness
from topopt.grid import Grid
from topopt.objective import ComplianceModel, simp_modulus
from topopt.problem import problem_from_dict

CASES = [
    # shape, element size, thickness, E, nu
    ((7, 5), 0.5, 2.5, 70000.0, 0.33),
    ((4, 3, 5), 1.5, 1.0, 210.0, 0.28),
]


@pytest.mark.parametrize(("shape", "h", "t", "E", "nu"), CASES)
def test_global_stiffness_matches_scikit_fem(skfem_reference, shape, h, t, E, nu):
    rng = np.random.default_rng(11)
    grid = Grid(shape, h, t)
    moduli = 1e-3 + rng.random(grid.n_elements)
    # Remove an irregular set of dofs (as restraints do) to check the reduced numbering.
    free = np.sort(rng.choice(grid.n_dofs, size=grid.n_dofs - 7, replace=False))
    Ke = element_stiffness(grid.dim, youngs_modulus=E, poisson_ratio=nu, element_size=h,
                           thickness=t)
    K = Assembler(grid, Ke, free).assemble(moduli)

    ref = skfem_reference.model(shape, h, t)
    K_ref = ref.stiffness(moduli, youngs_modulus=E, poisson_ratio=nu).tocsr()
    sel = ref.dof_map[free]
    K_ref = K_ref[sel][:, sel]
    diff = sparse.linalg.norm(K - K_ref) / sparse.linalg.norm(K_ref)
    assert diff < 1e-8, diff
    # The full (unrestrained) matrices agree too, entry pattern included.
    everything = np.arange(grid.n_dofs)
    K_all = Assembler(grid, Ke, everything).assemble(moduli)
    K_all_ref = ref.stiffness(moduli, youngs_modulus=E, poisson_ratio=nu).tocsr()
    K_all_ref = K_all_ref[ref.dof_map][:, ref.dof_map]
    diff_all = sparse.linalg.norm(K_all - K_all_ref) / sparse.linalg.norm(K_all_ref)
    assert diff_all < 1e-8, diff_all


def _problem_table(shape):
    """A problem with two load cases, a partial restraint and passive regions."""
    dim = len(shape)
    lx = shape[0] * 1.0
    if dim == 2:
        return {
            "domain": {"shape": list(shape), "element_size": 1.0, "thickness": 3.0},
            "material": {"youngs_modulus": 1000.0, "poisson_ratio": 0.3, "void_stiffness": 1e-6},
            "restraints": [
                {"where": {"x": [0.0, 0.0]}, "fix": ["x", "y"]},
                {"where": {"x": [lx, lx], "y": [0.0, 0.0]}, "fix": ["y"]},
            ],
            "loads": [
                {"where": {"x": [lx / 2, lx / 2], "y": [shape[1], shape[1]]}, "force": [0.0, -2.0],
                 "case": "down"},
                {"where": {"x": [lx, lx]}, "force": [1.5, 0.5], "case": "side"},
                {"where": {"x": [2.0, 4.0], "y": [shape[1], shape[1]]}, "force": [0.3, 0.0],
                 "case": "down"},
            ],
            "passive": [{"where": {"center": [3.0, 2.0], "radius": 1.2}, "state": "void"}],
            "optimize": {"volume_fraction": 0.4, "penalty": 3.0},
        }
    return {
        "domain": {"shape": list(shape), "element_size": 1.0},
        "material": {"youngs_modulus": 50.0, "poisson_ratio": 0.25},
        "restraints": [{"where": {"x": [0.0, 0.0]}}],
        "loads": [
            {"where": {"x": [lx, lx], "y": [0.0, 0.0]}, "force": [0.0, -1.0, 0.2], "case": "a"},
            {"where": {"x": [lx, lx], "z": [shape[2], shape[2]]}, "force": [0.5, 0.0, 0.0],
             "case": "b"},
        ],
        "passive": [{"where": {"center": [2.0, 1.5], "radius": 1.0, "axis": "z"},
                     "state": "solid"}],
        "optimize": {"volume_fraction": 0.4, "penalty": 3.0},
    }


@pytest.mark.parametrize("shape", [(10, 6), (6, 3, 4)])
def test_compliance_matches_scikit_fem(skfem_reference, shape):
    table = _problem_table(shape)
    problem = problem_from_dict(table, source="reference")
    rng = np.random.default_rng(5)
    rho = rng.random(problem.grid.shape)
    model = ComplianceModel(problem, solver="scipy")
    mine = model.evaluate(rho).compliance
    ref = skfem_reference.compliance(table, rho)
    assert abs(mine - ref) / abs(ref) < 1e-8, (mine, ref)
    # The auto-selected solver gives the same number.
    auto = ComplianceModel(problem, solver="auto").evaluate(rho).compliance
    assert abs(auto - ref) / abs(ref) < 1e-8, (auto, ref)


def test_simp_modulus_matches_formula():
    # DESIGN.md convention: E(rho) = E * (void + (1 - void) * rho**p).
    rho = np.array([0.0, 0.25, 1.0])
    got = simp_modulus(rho, penalty=3.0, void_stiffness=1e-3)
    assert np.allclose(got, 1e-3 + (1 - 1e-3) * rho**3, rtol=1e-15, atol=0)
