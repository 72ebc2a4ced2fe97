"""The MBB-beam benchmark at the standard settings (``examples/mbb-beam.toml``).

Sources
-------
- Settings and published result: Andreassen, Clausen, Schevenels, Lazarov & Sigmund,
  "Efficient topology optimization in MATLAB using 88 lines of code", SMO 43:1-16, 2011
  (half beam 60 x 20, volume fraction 0.5, penalty 3, filter radius 1.5, E = 1,
  nu = 0.3, unit load, OC with move 0.2, stop when the largest change < 0.01). The final
  compliances reported there are about 2.2e2 (recalled from memory as about 217 with the
  sensitivity filter and about 234 with the density filter, not read from the paper
  here), so the band is wide: 190 <= c <= 260.
- Symmetry (common practice): the full beam on two supports with a central load is
  symmetric, so its optimised density must be mirror-symmetric up to round-off, and the
  half beam with symmetry restraints must carry half the load with half the compliance.
  The two differ only near the symmetry line, where the half model's filter is
  normalised at the cut instead of reaching across it (measured: compliance ratio
  0.99985, densities differ by at most 0.04), so the tolerance there is 2 %.
- Volume constraint met to 1e-3 (issue 2).
"""

from __future__ import annotations

import copy
from pathlib import Path

import numpy as np
import pytest

from topopt import load_problem, optimize
from topopt.problem import problem_from_dict

EXAMPLE = Path(__file__).resolve().parents[2] / "examples" / "mbb-beam.toml"


@pytest.fixture(scope="module")
def half_beam():
    problem = load_problem(EXAMPLE)
    return problem, optimize(problem)


def test_mbb_settings_are_the_standard_ones(half_beam):
    problem, _ = half_beam
    assert problem.grid.shape == (60, 20) and problem.grid.element_size == 1.0
    assert problem.material.youngs_modulus == 1.0 and problem.material.poisson_ratio == 0.3
    opt = problem.optimize
    assert (opt.volume_fraction, opt.penalty, opt.filter_radius) == (0.5, 3.0, 1.5)
    assert opt.method == "oc" and opt.change_tolerance == 0.01 and opt.move_limit == 0.2
    F = problem.load_vectors()
    assert np.isclose(F.sum(), -1.0) and np.count_nonzero(F) == 1


def test_mbb_compliance_in_published_band(half_beam):
    # Andreassen et al. 2011, from memory: about 2.2e2; band 190..260. Measured: 217.78
    # after 290 iterations.
    _, result = half_beam
    assert result.converged, result.message
    assert 190.0 <= result.compliance <= 260.0, result.compliance
    # The run improves on the uniform start by a large factor.
    assert result.history[0]["compliance"] > 1.5 * result.compliance


def test_mbb_volume_constraint(half_beam):
    _, result = half_beam
    assert abs(result.volume_fraction - 0.5) < 1e-3
    assert abs(np.mean(result.density) - 0.5) < 1e-3
    assert result.density.min() >= 0.0 and result.density.max() <= 1.0


def test_full_beam_is_symmetric_and_matches_half_beam(half_beam):
    problem, half = half_beam
    table = copy.deepcopy(dict(problem.source))
    table["domain"]["shape"] = [120, 20]
    # Rollers under both bottom corners; the load point is held horizontally, which the
    # symmetric solution satisfies anyway (it only removes the rigid sliding).
    table["restraints"] = [
        {"where": {"x": [0.0, 0.0], "y": [0.0, 0.0]}, "fix": ["y"]},
        {"where": {"x": [120.0, 120.0], "y": [0.0, 0.0]}, "fix": ["y"]},
        {"where": {"x": [60.0, 60.0], "y": [20.0, 20.0]}, "fix": ["x"]},
    ]
    table["loads"] = [{"where": {"x": [60.0, 60.0], "y": [20.0, 20.0]}, "force": [0.0, -2.0]}]
    full = optimize(problem_from_dict(table, source="full MBB beam"))
    rho = full.density
    # Measured asymmetry: 3e-9.
    assert np.max(np.abs(rho - rho[::-1, :])) < 1e-6
    assert abs(full.volume_fraction - 0.5) < 1e-3
    # Each half of the full beam is the half beam: twice the load on twice the span
    # gives twice the compliance.
    assert abs(full.compliance / (2.0 * half.compliance) - 1.0) < 0.02
    # Measured: mean density difference 2e-4, no element classified differently.
    right_half = rho[60:, :]
    assert np.mean(np.abs(right_half - half.density)) < 0.005
    assert np.mean((right_half > 0.5) != (half.density > 0.5)) < 0.01
