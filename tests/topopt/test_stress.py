"""Structural results: von Mises stress, displacement at the loads, mass.

Outside references named beside each check:

* Cantilever with an end load P, built in at x = 0, length L, height H, width b:
  bending stress sigma_x = M y / I with M = P (L - x), shear stress
  tau = 3P/(2A) (1 - (2y/H)^2), tip deflection P L^3/(3EI) + P L/(kappa G A), kappa = 5/6.
  Young, Budynas & Sadegh, Roark's Formulas for Stress and Strain, 8th ed., McGraw-Hill,
  2012 (ch. 8, straight beams; shear deflection sec. 8.10 [section number from memory]);
  Timoshenko & Goodier, Theory of Elasticity, 3rd ed., 1970, sec. 21.
* scikit-fem (Gustafsson & McBain, JOSS 5(52):2369, 2020) as an independent solver and
  strain recovery, with von Mises computed from the principal stresses.
* Von Mises stress from principal stresses: sqrt(((s1-s2)^2 + (s2-s3)^2 + (s3-s1)^2)/2)
  (any strength-of-materials text, e.g. Roark's 8th ed., ch. 3 [from memory]).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from topopt.elements import elasticity_matrix
from topopt.grid import Grid
from topopt.problem import problem_from_dict
from topopt.stress import element_strains, structural_results, von_mises

LENGTH, HEIGHT, WIDTH = 8.0, 1.0, 1.0
E, NU, LOAD = 1000.0, 0.3, 1.0


def cantilever(dim: int, n: int):
    """A full-clamp cantilever problem with an end load split over the end-face nodes."""
    h = HEIGHT / n
    shape = [round(LENGTH / h), n] if dim == 2 else [round(LENGTH / h), n, round(WIDTH / h)]
    domain = {"shape": shape, "element_size": h}
    if dim == 2:
        domain["thickness"] = WIDTH
    table = {
        "domain": domain,
        "material": {"youngs_modulus": E, "poisson_ratio": NU, "mass_density": 4.43e-9},
        "restraints": [{"where": {"x": [0.0, 0.0]}}],
        "loads": [{"where": {"x": [LENGTH, LENGTH]},
                   "force": [0.0, -LOAD] if dim == 2 else [0.0, -LOAD, 0.0], "case": "tip"}],
        "optimize": {"volume_fraction": 0.5},
    }
    return problem_from_dict(table, source="cantilever"), h


def beam_deflection() -> float:
    inertia = WIDTH * HEIGHT**3 / 12.0
    shear_modulus = E / (2.0 * (1.0 + NU))
    return (LOAD * LENGTH**3 / (3.0 * E * inertia)
            + LOAD * LENGTH / (5.0 / 6.0 * shear_modulus * WIDTH * HEIGHT))


def beam_von_mises(x: np.ndarray, y: float) -> np.ndarray:
    """Beam-theory von Mises stress at distance y from the neutral axis, section x."""
    inertia = WIDTH * HEIGHT**3 / 12.0
    sigma = LOAD * (LENGTH - x) * y / inertia
    tau = 1.5 * LOAD / (WIDTH * HEIGHT) * (1.0 - (2.0 * y / HEIGHT) ** 2)
    return np.sqrt(sigma**2 + 3.0 * tau**2)


@pytest.mark.parametrize(("dim", "n", "deflection_tol", "stress_tol"),
                         [(2, 8, 0.02, 0.02), (2, 16, 0.01, 0.01), (3, 6, 0.035, 0.025)])
def test_cantilever_against_beam_theory(dim, n, deflection_tol, stress_tol):
    # Tolerances: measured errors were 1.0 % / 0.4 % / 2.6 % (deflection) and at most
    # 0.8 % / 0.2 % / 1.6 % (stress), bilinear/trilinear elements being stiff in bending
    # (converging from below); the full clamp and the equal split of the end load differ
    # from beam theory within about one beam height of each end (Saint-Venant), so the
    # stress is compared from x = H to x = L - H.
    problem, h = cantilever(dim, n)
    case = structural_results(problem, np.ones(problem.grid.shape)).cases[0]
    reference = beam_deflection()
    assert abs(case.displacement_along_load / reference - 1.0) < deflection_tol
    assert case.max_displacement >= case.displacement_along_load
    # Top row of elements (the most stressed fibre the element centres sample).
    top = case.von_mises[:, -1] if dim == 2 else case.von_mises[:, -1, problem.grid.shape[2] // 2]
    x = (np.arange(problem.grid.shape[0]) + 0.5) * h
    inside = (x > HEIGHT) & (x < LENGTH - HEIGHT)
    expected = beam_von_mises(x[inside], HEIGHT / 2.0 - h / 2.0)
    error = np.abs(top[inside] / expected - 1.0)
    assert error.max() < stress_tol, error.max()
    # The root bending stress: the largest beam-theory stress at the element centres of
    # the section x = H (one beam height from the wall) within the same tolerance.
    root = np.argmin(np.abs(x - HEIGHT - h / 2.0))
    assert abs(top[root] / beam_von_mises(x[root], HEIGHT / 2 - h / 2) - 1.0) < stress_tol + 0.01
    # Robust maximum below the plain maximum; the plain maximum at the wall (clamp corner).
    assert case.von_mises_p99 <= case.von_mises_max
    assert case.von_mises_max_at[0] < HEIGHT


def test_von_mises_of_linear_fields_matches_principal_stresses():
    # A linear displacement field gives a constant strain (patch test, Zienkiewicz,
    # Taylor & Zhu, 7th ed., 2013); the von Mises formula is checked against the
    # principal-stress form with independent random fields.
    rng = np.random.default_rng(3)
    for dim in (2, 3):
        grid = Grid((3, 2) if dim == 2 else (2, 3, 2), 0.7)
        gradient = rng.normal(size=(dim, dim))
        u = (grid.node_coordinates() @ gradient.T).ravel()
        strain = element_strains(grid, u)[:, :, 0]
        sym = 0.5 * (gradient + gradient.T)
        if dim == 2:
            engineering = [sym[0, 0], sym[1, 1], 2 * sym[0, 1]]
        else:
            engineering = [sym[0, 0], sym[1, 1], sym[2, 2], 2 * sym[1, 2], 2 * sym[0, 2],
                           2 * sym[0, 1]]
        assert np.allclose(strain, engineering, atol=1e-12)
        D = elasticity_matrix(dim, youngs_modulus=210.0, poisson_ratio=0.3)
        stress = strain @ D.T
        tensor = np.zeros((3, 3))
        s = stress[0]
        if dim == 2:
            tensor[:2, :2] = [[s[0], s[2]], [s[2], s[1]]]
        else:
            tensor[:] = [[s[0], s[5], s[4]], [s[5], s[1], s[3]], [s[4], s[3], s[2]]]
        p = np.linalg.eigvalsh(tensor)
        expected = np.sqrt(((p[0] - p[1]) ** 2 + (p[1] - p[2]) ** 2 + (p[2] - p[0]) ** 2) / 2)
        assert np.allclose(von_mises(stress, dim), expected, rtol=1e-12)


def _reference_table(shape):
    dim = len(shape)
    lx = float(shape[0])
    table = {
        "domain": {"shape": list(shape), "element_size": 1.0},
        "material": {"youngs_modulus": 1000.0, "poisson_ratio": 0.3, "void_stiffness": 1e-6},
        "restraints": [{"where": {"x": [0.0, 0.0]}}],
        "loads": [
            {"where": {"x": [lx, lx], "y": [0.0, 0.0]},
             "force": [0.0, -2.0] if dim == 2 else [0.0, -2.0, 0.5], "case": "down"},
            {"where": {"x": [lx, lx]}, "force": [1.0, 0.5] if dim == 2 else [1.0, 0.5, 0.0],
             "case": "side"},
        ],
        "optimize": {"volume_fraction": 0.5, "penalty": 3.0},
    }
    return table


@pytest.mark.parametrize("shape", [(12, 6), (6, 4, 3)])
def test_von_mises_field_matches_scikit_fem(skfem_reference, shape):
    # Same density (random, then about a third set to void), solved and post-processed by
    # scikit-fem independently; relative difference < 1e-6 on every solid element
    # (round-off of two direct solves with a stiffness contrast of 1e6).
    table = _reference_table(shape)
    problem = problem_from_dict(table, source="reference")
    rng = np.random.default_rng(8)
    rho = rng.random(problem.grid.shape)
    rho[rho < 0.3] = 0.0
    mine = structural_results(problem, rho, solver="scipy")
    theirs = skfem_reference.von_mises(table, rho)
    solid = rho.ravel() >= 0.5
    assert solid.sum() > 10
    for case, ref in zip(mine.cases, theirs, strict=True):
        got = case.von_mises.ravel()
        assert np.all(np.isnan(got[~solid]))
        assert np.allclose(got[solid], ref[solid], rtol=1e-6, atol=1e-9 * ref.max())
        assert case.von_mises_max == pytest.approx(ref[solid].max(), rel=1e-6)
        assert case.von_mises_p99 == pytest.approx(np.percentile(ref[solid], 99), rel=1e-6)


def test_mass_of_solid_elements():
    # Mass by hand: solid volume times mass density, in kg (the default unit system is
    # mm-N-MPa-tonne, so t/mm^3 times 1000); with every element solid the volume is the
    # box 8 x 1 x 1 (2D: area times thickness).
    problem, _ = cantilever(2, 4)
    results = structural_results(problem, np.ones(problem.grid.shape))
    assert results.solid_volume == pytest.approx(LENGTH * HEIGHT * WIDTH)
    assert results.mass == pytest.approx(LENGTH * HEIGHT * WIDTH * 4.43e-9 * 1000.0)
    half = np.ones(problem.grid.shape)
    half[: problem.grid.shape[0] // 2 :, -1] = 0.2  # a void strip: not counted
    assert structural_results(problem, half).solid_volume < results.solid_volume


def test_optimize_writes_structural_fields(tmp_path):
    import meshio

    from topopt.cli import main

    problem_file = tmp_path / "p.toml"
    problem_file.write_text(
        '[domain]\nshape = [24, 8]\nelement_size = 1.0\n'
        '[material]\nyoungs_modulus = 1000.0\npoisson_ratio = 0.3\nmass_density = 2.7e-9\n'
        '[[restraints]]\nwhere = { x = [0.0, 0.0] }\n'
        '[[loads]]\nwhere = { x = [24.0, 24.0], y = [0.0, 0.0] }\nforce = [0.0, -1.0]\n'
        'case = "hang"\n'
        '[[loads]]\nwhere = { x = [24.0, 24.0], y = [8.0, 8.0] }\nforce = [1.0, 0.0]\n'
        'case = "pull"\n'
        '[optimize]\nvolume_fraction = 0.5\nmax_iterations = 5\n')
    out = tmp_path / "run"
    assert main(["optimize", str(problem_file), "--out", str(out), "--quiet"]) == 0
    summary = json.loads((out / "summary.json").read_text())
    names = [c["name"] for c in summary["load_cases"]]
    assert names == ["hang", "pull"]
    assert sum(c["compliance"] for c in summary["load_cases"]) == pytest.approx(
        summary["compliance"], rel=1e-6)
    for c in summary["load_cases"]:
        assert c["von_mises_p99"] <= c["von_mises_max"]
        assert c["max_displacement"] > 0
    density = np.load(out / "result.npz")["density"]
    assert summary["mass"] == pytest.approx((density >= 0.5).sum() * 2.7e-9 * 1000.0)
    assert summary["mass_unit"] == "kg" and summary["units"] == "mm-N-MPa-tonne"
    mesh = meshio.read(out / "design.vtu")
    assert {"von_mises_hang", "von_mises_pull", "density"} <= set(mesh.cell_data)
    assert mesh.point_data["displacement_hang"].shape == (25 * 9, 3)
