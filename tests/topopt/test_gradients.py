"""Compliance and volume sensitivities through the whole filter chain vs finite differences.

Source: adjoint sensitivity of compliance, dc/drho_e = -dE_e/drho u_e^T K0_e u_e
(Bendsoe & Sigmund, Topology Optimization: Theory, Methods and Applications, 2003),
carried to the design variables by the chain rule through the density filter (Bruns &
Tortorelli, CMAME 190:3443-3459, 2001) and the passive values; checked against central
finite differences (common practice). Tolerance: relative error < 1e-5.

The problems are small and random (fixed seeds) with passive solid and void regions
and two load cases, in 2D and 3D; the chain is the production one from
``driver.build_filter_chain`` and the model is ``objective.ComplianceModel``.
"""

from __future__ import annotations

import numpy as np
import pytest

from topopt.driver import build_filter_chain
from topopt.objective import ComplianceModel
from topopt.problem import problem_from_dict

PROBLEMS = {
    "2d": {
        "domain": {"shape": [14, 9], "element_size": 0.5, "thickness": 2.0},
        "material": {"youngs_modulus": 200.0, "poisson_ratio": 0.3},
        "restraints": [{"where": {"x": [0.0, 0.0]}, "fix": ["x", "y"]}],
        "loads": [
            {"where": {"x": [7.0, 7.0], "y": [0.0, 0.0]}, "force": [0.0, -1.0], "case": "tip"},
            {"where": {"x": [3.0, 5.0], "y": [4.5, 4.5]}, "force": [0.7, -0.2], "case": "top"},
        ],
        "passive": [
            {"where": {"center": [2.0, 2.25], "radius": 0.8}, "state": "void"},
            {"where": {"x": [6.0, 7.0], "y": [0.0, 1.0]}, "state": "solid"},
        ],
        "optimize": {"volume_fraction": 0.4, "filter_radius": 1.1, "penalty": 3.0},
    },
    "3d": {
        "domain": {"shape": [7, 4, 5], "element_size": 1.0},
        "material": {"youngs_modulus": 1.0, "poisson_ratio": 0.35},
        "restraints": [{"where": {"x": [0.0, 0.0]}}],
        "loads": [
            {"where": {"x": [7.0, 7.0], "y": [0.0, 0.0]}, "force": [0.0, -1.0, 0.0], "case": "a"},
            {"where": {"x": [7.0, 7.0], "z": [5.0, 5.0]}, "force": [0.2, 0.0, -0.5],
             "case": "b"},
        ],
        "passive": [
            {"where": {"center": [3.0, 2.0], "radius": 1.0, "axis": "z"}, "state": "void"},
            {"where": {"x": [6.0, 7.0], "y": [0.0, 1.0]}, "state": "solid"},
        ],
        "optimize": {"volume_fraction": 0.4, "filter_radius": 1.6, "penalty": 3.0},
    },
}


# The same 2D problem printed in +y: the printability filter joins the chain as its last
# link (Langelaar, SMO 55:871-883, 2017), so its adjoint is checked here too.
PROBLEMS["2d-printable"] = {**PROBLEMS["2d"], "build": {"direction": "+y", "overhang_angle": 45.0}}
# Smoothed Heaviside projection after the density filter (Wang, Lazarov & Sigmund, SMO
# 43:767-784, 2011), at a sharpness where its derivative varies strongly.
PROBLEMS["2d-projected"] = {
    **PROBLEMS["2d"],
    "optimize": {**PROBLEMS["2d"]["optimize"], "projection": {"beta_start": 8.0, "eta": 0.4}},
}
# Every link at once in 3D: density filter, projection, passive values, printability.
PROBLEMS["3d-all-links"] = {
    **PROBLEMS["3d"],
    "optimize": {**PROBLEMS["3d"]["optimize"], "projection": {"beta_start": 4.0, "eta": 0.5}},
    "build": {"direction": "+z", "overhang_angle": 45.0},
}
# with a build direction the projection continuation is on by default: one link more
LINKS = {"2d": 2, "3d": 2, "2d-printable": 4, "2d-projected": 3, "3d-all-links": 4}
CASES = list(LINKS)


def _setup(name):
    problem = problem_from_dict(PROBLEMS[name], source=name)
    assert len(problem.load_cases) == 2
    assert problem.passive_solid.any() and problem.passive_void.any()
    model = ComplianceModel(problem)
    chain = build_filter_chain(problem)
    assert len(chain.links) == LINKS[name], [type(link).__name__ for link in chain.links]
    rng = np.random.default_rng(2024)
    x = 0.1 + 0.9 * rng.random(problem.grid.shape)
    return problem, model, chain, x


def _compliance(model, chain, x):
    return model.evaluate(chain.forward(x)).compliance


@pytest.mark.parametrize("name", CASES)
def test_compliance_gradient_matches_central_differences(name):
    problem, model, chain, x = _setup(name)
    ev = model.evaluate(chain.forward(x))
    grad = chain.backward(ev.gradient)
    assert grad.shape == x.shape
    # A fixed random sample of variables, passive ones included: design variables under
    # passive elements still reach their neighbours through the density filter.
    rng = np.random.default_rng(1)
    passive = problem.passive_solid | problem.passive_void
    flat = np.concatenate([rng.choice(np.flatnonzero(~passive.ravel()), 30, replace=False),
                           rng.choice(np.flatnonzero(passive.ravel()), 6, replace=False)])
    step = 1e-6
    fd = np.zeros(flat.size)
    for k, i in enumerate(flat):
        idx = np.unravel_index(i, x.shape)
        xp, xm = x.copy(), x.copy()
        xp[idx] += step
        xm[idx] -= step
        fd[k] = (_compliance(model, chain, xp) - _compliance(model, chain, xm)) / (2 * step)
    an = grad.ravel()[flat]
    componentwise = np.max(np.abs(an - fd)) / np.max(np.abs(fd))
    normwise = np.linalg.norm(an - fd) / np.linalg.norm(fd)
    assert componentwise < 1e-5, componentwise
    assert normwise < 1e-5, normwise
    if problem.build.direction != "none":
        return  # the printability link after the passive values may change them slightly
    # Passive elements hold their values whatever the design variables are.
    physical = chain.forward(rng.random(x.shape))
    assert np.all(physical[problem.passive_solid] == 1.0)
    assert np.all(physical[problem.passive_void] == 0.0)


@pytest.mark.parametrize("name", CASES)
def test_directional_derivative_and_volume_gradient(name):
    problem, model, chain, x = _setup(name)
    rng = np.random.default_rng(9)
    direction = rng.normal(size=x.shape)
    ev = model.evaluate(chain.forward(x))
    grad = chain.backward(ev.gradient)
    n = x.size
    dv = chain.backward(np.full(x.shape, 1.0 / n))
    step = 1e-6
    c_plus = _compliance(model, chain, x + step * direction)
    c_minus = _compliance(model, chain, x - step * direction)
    fd = (c_plus - c_minus) / (2 * step)
    exact = float(np.sum(grad * direction))
    assert abs(fd - exact) / abs(exact) < 1e-5, (fd, exact)
    # Volume gradient: central differences are exact for a linear chain and accurate to
    # O(step**2) ~ 1e-12 through projection and printability.
    v_plus = np.mean(chain.forward(x + step * direction))
    v_minus = np.mean(chain.forward(x - step * direction))
    fd_v = (v_plus - v_minus) / (2 * step)
    assert abs(fd_v - np.sum(dv * direction)) < 1e-8 * np.sum(np.abs(dv * direction))
    # The load cases sum: the total is the sum of the per-case compliances.
    assert np.isclose(ev.compliance, ev.case_compliance.sum(), rtol=1e-14)
    assert ev.case_compliance.size == 2 and np.all(ev.case_compliance > 0)
