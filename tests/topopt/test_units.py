"""Unit systems: masses in kg and the powder price per kg, whatever the problem's units.

Checks by hand (geometry and arithmetic, no outside source needed beyond the densities):

* Bundled examples: the mass of the full design domain, length x width x height x
  density, converted to kg.
* A 10 mm titanium cube (Ti-6Al-4V, 4430 kg/m^3, a handbook value quoted from memory;
  the test only needs it to be the same number in both systems) standing on the plate,
  inspected for +z: 1000 mm^3 = 1e-6 m^3, mass 4.43e-3 kg, no support, cost
  4.43e-3 kg x 300 per kg = 1.329; build time 334 layers x 10 s + 1000 mm^3 / 10000
  mm^3/h + 1 h, the same in mm and in m (the length-based defaults are converted).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from topopt.build import PROCESS_DEFAULTS
from topopt.cli import main
from topopt.problem import ProcessSettings, load_problem, problem_from_dict
from topopt.stress import structural_results

EXAMPLES = Path(__file__).resolve().parents[2] / "examples"


@pytest.mark.parametrize(("name", "size_mm", "density_t_per_mm3"), [
    ("bracket-3d.toml", (32.0, 16.0, 8.0), 7.9e-9),  # steel, as the file says
    ("wall-bracket-2d.toml", (60.0, 30.0, 5.0), 2.67e-9),  # aluminium, thickness 5 mm
])
def test_mass_of_bundled_examples_by_hand(name, size_mm, density_t_per_mm3):
    problem = load_problem(EXAMPLES / name)
    mass = structural_results(problem, np.ones(problem.grid.shape)).mass
    by_hand = np.prod(size_mm) * density_t_per_mm3 * 1000.0  # t -> kg
    assert mass == pytest.approx(by_hand, rel=1e-12)


def test_process_defaults_have_one_source():
    assert PROCESS_DEFAULTS == {k: getattr(ProcessSettings(), k)
                                for k in ProcessSettings.__dataclass_fields__}
    metres = ProcessSettings.defaults_for("m-N-Pa-kg")
    assert metres.layer_thickness == pytest.approx(3e-5)
    assert metres.part_rate == pytest.approx(1e-5)  # 10000 mm^3/h in m^3/h
    assert metres.powder_price == ProcessSettings().powder_price  # per kg everywhere


CUBE = {
    "mm-N-MPa-tonne": dict(h=1.0, E=114000.0, rho=4.43e-9, force=-100.0),
    "m-N-Pa-kg": dict(h=1e-3, E=114e9, rho=4430.0, force=-100.0),
}


def _cube_problem(units: str) -> str:
    c = CUBE[units]
    side = 10 * c["h"]
    return (f'units = "{units}"\nname = "titanium cube (invented)"\n'
            f'[domain]\nshape = [10, 10, 10]\nelement_size = {c["h"]!r}\n'
            f'[material]\nyoungs_modulus = {c["E"]!r}\npoisson_ratio = 0.34\n'
            f'mass_density = {c["rho"]!r}\n'
            f'[[restraints]]\nwhere = {{ z = [0.0, 0.0] }}\n'
            f'[[loads]]\nwhere = {{ z = [{side!r}, {side!r}] }}\nforce = [0.0, 0.0, {c["force"]!r}]\n'
            f'[optimize]\nvolume_fraction = 0.5\n'
            f'[process]\npowder_price = 300.0\n')


def test_titanium_cube_cost_is_the_same_in_two_unit_systems(tmp_path, capsys):
    reports = {}
    for units in CUBE:
        folder = tmp_path / units
        folder.mkdir()
        (folder / "problem.toml").write_text(_cube_problem(units))
        np.save(folder / "cube.npy", np.ones((10, 10, 10)))
        out = folder / "report"
        assert main(["inspect", str(folder / "cube.npy"), "--problem", str(folder / "problem.toml"),
                     "--out", str(out), "--directions", "+z"]) == 0
        reports[units] = json.loads((out / "inspect.json").read_text())["directions"][0]
        problem = load_problem(folder / "problem.toml")
        assert structural_results(problem, np.ones((10, 10, 10))).mass == pytest.approx(4.43e-3)
    capsys.readouterr()
    for r in reports.values():
        assert r["part_mass"] == pytest.approx(4.43e-3, rel=1e-12)  # kg, by hand
        assert r["support_volume"] == 0.0
        assert r["material_cost"] == pytest.approx(4.43e-3 * 300.0, rel=1e-12)  # 1.329
        assert r["layers"] == 334
        assert r["build_time_h"] == pytest.approx(334 * 10.0 / 3600 + 0.1 + 1.0, rel=1e-9)
    mm, m = reports["mm-N-MPa-tonne"], reports["m-N-Pa-kg"]
    assert mm["part_volume"] == pytest.approx(m["part_volume"] * 1e9, rel=1e-12)


def test_default_cost_of_a_metal_part_is_sensible():
    # The default price (per kg) gives a 45 g part a cost of a few currency units, not
    # 1e-6 as when the price was per tonne: 0.045 kg x 100 per kg = 4.5 (arithmetic).
    assert 0.045 * ProcessSettings().powder_price == pytest.approx(4.5)


def test_unknown_unit_system_is_one_line_error():
    table = {"units": "inch-lbf-psi", "domain": {"shape": [4, 2], "element_size": 1.0},
             "material": {"youngs_modulus": 1.0, "poisson_ratio": 0.3},
             "restraints": [{"where": {"x": [0.0, 0.0]}}],
             "loads": [{"where": {"x": [4.0, 4.0]}, "force": [0.0, -1.0]}],
             "optimize": {"volume_fraction": 0.5}}
    with pytest.raises(ValueError, match=r"units: .*mm-N-MPa-tonne") as info:
        problem_from_dict(table, source="p.toml")
    assert "\n" not in str(info.value)


def test_inspect_units_option_without_problem_file(tmp_path, capsys):
    # A 10 mm cube given in metres: the m-N-Pa-kg defaults give the same layers (334)
    # and build time as the same cube in mm with the mm defaults.
    np.save(tmp_path / "cube.npy", np.ones((10, 10, 10)))
    times = []
    for units, size in (("m-N-Pa-kg", "0.001"), (None, "1.0")):
        out = tmp_path / f"r{len(times)}"
        extra = ["--units", units] if units else []
        assert main(["inspect", str(tmp_path / "cube.npy"), "--element-size", size,
                     "--directions", "+z", "--out", str(out), *extra]) == 0
        row = json.loads((out / "inspect.json").read_text())["directions"][0]
        assert row["layers"] == 334
        times.append(row["build_time_h"])
    assert times[0] == pytest.approx(times[1], rel=1e-12)
    assert main(["inspect", str(tmp_path / "cube.npy"), "--element-size", "1", "--units",
                 "furlong", "--out", str(tmp_path / "bad")]) == 2
    assert "--units" in capsys.readouterr().err
