"""Shared helpers for the tests: an independent finite-element reference built on scikit-fem.

The reference (scikit-fem's ElementQuad1 / ElementHex1 in an ElementVector, with a
piecewise-constant modulus) is written here from the problem-file contract of
DESIGN.md only: it reads the TOML table itself, selects nodes itself and never calls
:mod:`topopt` for geometry, assembly, loads or solves. It is used by
``tests/topopt/test_fem_reference.py`` and ``tests/topopt/test_cli_optimize.py``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from types import SimpleNamespace

import numpy as np
import pytest

AXES = "xyz"


@dataclass
class ReferenceModel:
    """A scikit-fem model of a structured box mesh plus the maps to buttress numbering.

    ``node_map[n]`` is the scikit-fem node of buttress node ``n`` (C order over the node
    lattice); ``element_map[e]`` the scikit-fem element of buttress element ``e``;
    ``dof_map[n * dim + c]`` the scikit-fem dof of buttress dof ``n * dim + c``.
    """

    mesh: object
    basis: object
    dim: int
    element_size: float
    thickness: float
    node_map: np.ndarray
    element_map: np.ndarray
    dof_map: np.ndarray

    def stiffness(self, moduli: np.ndarray, *, youngs_modulus: float, poisson_ratio: float):
        """Global stiffness (scikit-fem numbering) for element moduli in buttress order."""
        from skfem import BilinearForm
        from skfem.helpers import ddot, sym_grad, trace

        E, nu = float(youngs_modulus), float(poisson_ratio)
        mu = E / (2.0 * (1.0 + nu))
        if self.dim == 2:
            lam = E * nu / (1.0 - nu**2)  # plane-stress Lame constant
        else:
            lam = E * nu / ((1.0 + nu) * (1.0 - 2.0 * nu))
        from skfem import ElementHex0, ElementQuad0

        basis0 = self.basis.with_element(ElementQuad0() if self.dim == 2 else ElementHex0())
        values = np.zeros(basis0.N)
        values[basis0.element_dofs[0, self.element_map]] = np.asarray(moduli, float).ravel()

        @BilinearForm
        def elasticity(u, v, w):
            eu, ev = sym_grad(u), sym_grad(v)
            return w["modulus"] * (lam * trace(eu) * trace(ev) + 2.0 * mu * ddot(eu, ev))

        K = elasticity.assemble(self.basis, modulus=basis0.interpolate(values))
        return K * self.thickness if self.dim == 2 else K


def reference_model(shape, element_size: float, thickness: float = 1.0) -> ReferenceModel:
    """The scikit-fem mesh and basis of a box of ``shape`` elements of edge ``element_size``."""
    from skfem import Basis, ElementHex1, ElementQuad1, ElementVector, MeshHex, MeshQuad

    dim = len(shape)
    h = float(element_size)
    lines = [np.arange(n + 1) * h for n in shape]
    mesh = MeshQuad.init_tensor(*lines) if dim == 2 else MeshHex.init_tensor(*lines)
    basis = Basis(mesh, ElementVector(ElementQuad1() if dim == 2 else ElementHex1()))
    # Nodes: integer lattice index from coordinates -> buttress node number (C order).
    index = np.rint(mesh.p / h).astype(int)
    ours = np.ravel_multi_index(tuple(index), tuple(n + 1 for n in shape))
    node_map = np.empty(mesh.p.shape[1], dtype=int)
    node_map[ours] = np.arange(mesh.p.shape[1])
    centres = mesh.p[:, mesh.t].mean(axis=1)
    eidx = np.floor(centres / h).astype(int)
    ours_el = np.ravel_multi_index(tuple(eidx), tuple(shape))
    element_map = np.empty(mesh.t.shape[1], dtype=int)
    element_map[ours_el] = np.arange(mesh.t.shape[1])
    # basis.nodal_dofs[c, node] is the dof of component c at a scikit-fem node.
    dof_map = basis.nodal_dofs[:, node_map].T.ravel()
    return ReferenceModel(mesh, basis, dim, h, float(thickness), node_map, element_map, dof_map)


def _select(points: np.ndarray, where: Mapping, tol: float) -> np.ndarray:
    """Box / disk / cylinder selection written from the DESIGN.md wording."""
    dim = points.shape[0]
    inside = np.ones(points.shape[1], dtype=bool)
    for a in range(dim):
        if AXES[a] in where:
            lo, hi = where[AXES[a]]
            inside &= (points[a] >= lo - tol) & (points[a] <= hi + tol)
    if "center" in where:
        across = [a for a in range(dim) if dim == 2 or AXES[a] != where.get("axis", "z")]
        centre = list(where["center"])
        if len(centre) == 3:
            centre = [centre[a] for a in across]
        d2 = sum((points[a] - c) ** 2 for a, c in zip(across, centre, strict=True))
        inside &= np.sqrt(d2) <= where["radius"] + tol
    return inside


def reference_compliance(table: Mapping, density: np.ndarray, *,
                         displacements: list | None = None) -> float:
    """Compliance of a physical density for a parsed problem file, solved by scikit-fem.

    Modified SIMP E(rho) = E (void + (1 - void) rho**p), loads split equally over the
    selected nodes, one solve per load case, compliance f.u summed over the cases
    (DESIGN.md, "Conventions" and "Problem file"). The displacement of each case (in
    scikit-fem numbering) is appended to ``displacements`` when a list is given.
    """
    from skfem import condense, solve

    dom = table["domain"]
    shape = tuple(dom["shape"])
    h = float(dom["element_size"])
    model = reference_model(shape, h, dom.get("thickness", 1.0) if len(shape) == 2 else 1.0)
    mat = table["material"]
    opt = table["optimize"]
    void = mat.get("void_stiffness", 1e-9)
    p = opt.get("penalty", 3.0)
    rho = np.asarray(density, float)
    moduli = void + (1.0 - void) * rho**p
    K = model.stiffness(moduli, youngs_modulus=mat["youngs_modulus"],
                        poisson_ratio=mat["poisson_ratio"])
    dim = model.dim
    points = model.mesh.p
    tol = 1e-6 * h
    fixed = []
    for r in table["restraints"]:
        nodes = np.flatnonzero(_select(points, r["where"], tol))
        for comp in r.get("fix", list(AXES[:dim])):
            fixed.append(model.basis.nodal_dofs[AXES.index(comp), nodes])
    fixed = np.unique(np.concatenate(fixed))
    cases: dict[str, np.ndarray] = {}
    for load in table["loads"]:
        f = cases.setdefault(load.get("case", "default"), np.zeros(model.basis.N))
        nodes = np.flatnonzero(_select(points, load["where"], tol))
        for c in range(dim):
            f[model.basis.nodal_dofs[c, nodes]] += load["force"][c] / nodes.size
    total = 0.0
    for f in cases.values():
        u = solve(*condense(K, f, D=fixed))
        total += float(f @ u)
        if displacements is not None:
            displacements.append(u)
    return total


def reference_von_mises(table: Mapping, density: np.ndarray) -> list[np.ndarray]:
    """Solid-material von Mises stress at element centres per load case, by scikit-fem.

    The displacement of each case is solved as in :func:`reference_compliance`; the
    strain is scikit-fem's ``sym_grad`` at a one-point (centre) quadrature, the stress
    the solid material's (plane stress in 2D), and the von Mises stress is computed from
    the principal stresses (eigenvalues of the stress tensor). Returned in buttress
    element order.
    """
    from skfem import Basis, ElementHex1, ElementQuad1, ElementVector
    from skfem.helpers import sym_grad

    solutions: list[np.ndarray] = []
    reference_compliance(table, density, displacements=solutions)
    dom = table["domain"]
    shape = tuple(dom["shape"])
    model = reference_model(shape, float(dom["element_size"]))
    dim = model.dim
    # one quadrature point at the centre of the reference element [0, 1]^dim
    centre = Basis(model.mesh, ElementVector(ElementQuad1() if dim == 2 else ElementHex1()),
                   quadrature=(np.full((dim, 1), 0.5), np.ones(1)))
    E = float(table["material"]["youngs_modulus"])
    nu = float(table["material"]["poisson_ratio"])
    mu = E / (2.0 * (1.0 + nu))
    lam = E * nu / (1.0 - nu**2) if dim == 2 else E * nu / ((1.0 + nu) * (1.0 - 2.0 * nu))
    out = []
    for u in solutions:
        eps = np.asarray(sym_grad(centre.interpolate(u)))[..., 0]  # (dim, dim, n_el), 1 point
        sigma = lam * np.trace(eps)[None, None] * np.eye(dim)[:, :, None] + 2.0 * mu * eps
        tensor = np.zeros((eps.shape[2], 3, 3))
        tensor[:, :dim, :dim] = np.moveaxis(sigma, -1, 0)  # plane stress: s_zz = 0
        s = np.linalg.eigvalsh(tensor)
        vm = np.sqrt(((s[:, 0] - s[:, 1]) ** 2 + (s[:, 1] - s[:, 2]) ** 2
                      + (s[:, 2] - s[:, 0]) ** 2) / 2.0)
        out.append(vm[model.element_map])
    return out


@pytest.fixture
def skfem_reference():
    """The scikit-fem reference: ``model(shape, h, t)`` and ``compliance(table, density)``."""
    return SimpleNamespace(model=reference_model, compliance=reference_compliance,
                           von_mises=reference_von_mises)
