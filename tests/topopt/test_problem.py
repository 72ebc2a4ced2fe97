"""Problem files: valid files parse as documented; every bad file is one clear line.

Sources: the problem-file contract of DESIGN.md ("Problem file (TOML)") and issue 2,
"Checks that must pass": each class of bad file (unknown keys, wrong types, out-of-range
values, a region that selects nothing, a load with the wrong number of components, no
restraint, passive regions that leave no design freedom, invalid TOML, missing file,
binary garbage) gives exit code 2 from ``topopt.cli.main``, exactly one line on stderr
naming the key, no traceback, and leaves an existing results folder untouched (bytes
and modification times compared). Treating input as untrusted data is common practice.
"""

from __future__ import annotations

import os
import tomllib
from pathlib import Path

import numpy as np
import pytest
from helpers import refused

from topopt.cli import main
from topopt.problem import ProblemError, load_problem, problem_from_dict, to_toml

BASE = """\
name = "small bracket"

[domain]
shape = [12, 6]
element_size = 1.0
thickness = 2.0

[material]
youngs_modulus = 100.0
poisson_ratio = 0.3

[[restraints]]
where = { x = [0.0, 0.0] }
fix = ["x", "y"]

[[loads]]
where = { x = [12.0, 12.0], y = [0.0, 0.0] }
force = [0.0, -1.0]

[[passive]]
where = { center = [6.0, 3.0], radius = 1.0 }
state = "void"

[optimize]
volume_fraction = 0.4
filter_radius = 1.5
max_iterations = 3
"""

LEFT = "where = { x = [0.0, 0.0] }"
CORNER = "where = { x = [0.0, 0.0], y = [0.0, 0.0] }"
TIP = "where = { x = [12.0, 12.0], y = [0.0, 0.0] }"
LOAD = f"[[loads]]\n{TIP}\nforce = [0.0, -1.0]\n"
RESTRAINT = '[[restraints]]\nwhere = { x = [0.0, 0.0] }\nfix = ["x", "y"]\n'
PASSIVE = '[[passive]]\nwhere = { center = [6.0, 3.0], radius = 1.0 }\nstate = "void"\n'


def edit(old: str, new: str):
    def apply(text: str) -> str:
        assert old in text, old
        return text.replace(old, new, 1)
    return apply


# (case id, edit of BASE, text the single error line must contain)
BAD_FILES = [
    ("unknown top-level key", lambda t: 'colour = "red"\n' + t, "colour"),
    ("unknown material key",
     edit("poisson_ratio = 0.3", "poisson_ratio = 0.3\nyoungs_modulos = 3.0"),
     "material.youngs_modulos"),
    ("unknown restraint key", edit('fix = ["x", "y"]', 'fix = ["x", "y"]\nstrength = 2'),
     "restraints[0].strength"),
    ("unknown region key", edit("where = { x = [0.0, 0.0] }", "where = { x = [0.0, 0.0], w = 1 }"),
     "restraints[0].where.w"),
    ("unknown optimize key", edit("max_iterations = 3", "max_iterations = 3\nvolfrac = 0.4"),
     "optimize.volfrac"),
    ("volume fraction a string", edit("volume_fraction = 0.4", 'volume_fraction = "half"'),
     "optimize.volume_fraction"),
    ("shape a string", edit("shape = [12, 6]", 'shape = "big"'), "domain.shape"),
    ("shape with fractions", edit("shape = [12, 6]", "shape = [12.5, 6]"), "domain.shape"),
    ("modulus a boolean", edit("youngs_modulus = 100.0", "youngs_modulus = true"),
     "material.youngs_modulus"),
    ("iterations fractional", edit("max_iterations = 3", "max_iterations = 2.5"),
     "optimize.max_iterations"),
    ("fix not a list", edit('fix = ["x", "y"]', 'fix = "xy"'), "restraints[0].fix"),
    ("domain not a table", edit("[domain]\nshape = [12, 6]\nelement_size = 1.0\nthickness = 2.0\n",
                                 ""), "domain"),
    ("volume fraction 0", edit("volume_fraction = 0.4", "volume_fraction = 0.0"),
     "optimize.volume_fraction"),
    ("volume fraction 1", edit("volume_fraction = 0.4", "volume_fraction = 1.0"),
     "optimize.volume_fraction"),
    ("volume fraction 1.5", edit("volume_fraction = 0.4", "volume_fraction = 1.5"),
     "optimize.volume_fraction"),
    ("volume fraction negative", edit("volume_fraction = 0.4", "volume_fraction = -0.2"),
     "optimize.volume_fraction"),
    ("volume fraction nan", edit("volume_fraction = 0.4", "volume_fraction = nan"),
     "optimize.volume_fraction"),
    ("negative filter radius", edit("filter_radius = 1.5", "filter_radius = -1.5"),
     "optimize.filter_radius"),
    ("zero filter radius", edit("filter_radius = 1.5", "filter_radius = 0.0"),
     "optimize.filter_radius"),
    ("negative region radius", edit("radius = 1.0", "radius = -1.0"), "passive[0].where.radius"),
    ("zero element size", edit("element_size = 1.0", "element_size = 0.0"), "domain.element_size"),
    ("negative thickness", edit("thickness = 2.0", "thickness = -2.0"), "domain.thickness"),
    ("poisson ratio 0.5", edit("poisson_ratio = 0.3", "poisson_ratio = 0.5"),
     "material.poisson_ratio"),
    ("poisson ratio -1", edit("poisson_ratio = 0.3", "poisson_ratio = -1.0"),
     "material.poisson_ratio"),
    ("poisson ratio 0.7", edit("poisson_ratio = 0.3", "poisson_ratio = 0.7"),
     "material.poisson_ratio"),
    ("negative modulus", edit("youngs_modulus = 100.0", "youngs_modulus = -100.0"),
     "material.youngs_modulus"),
    ("penalty below 1", edit("max_iterations = 3", "max_iterations = 3\npenalty = 0.5"),
     "optimize.penalty"),
    ("unknown method", edit("max_iterations = 3", 'max_iterations = 3\nmethod = "sgd"'),
     "optimize.method"),
    ("unknown solver", edit("max_iterations = 3", 'max_iterations = 3\nsolver = "fast"'),
     "optimize.solver"),
    ("3D direction in 2D", lambda t: t + '\n[build]\ndirection = "+z"\n', "build.direction"),
    ("unknown passive state", edit('state = "void"', 'state = "hollow"'), "passive[0].state"),
    ("restraint selects nothing", edit(LEFT, "where = { x = [20.0, 20.0] }"),
     "restraints[0].where"),
    ("load selects nothing", edit(TIP, "where = { x = [12.0, 12.0], y = [-3.0, -2.0] }"),
     "loads[0].where"),
    ("passive selects nothing", edit("center = [6.0, 3.0]", "center = [50.0, 50.0]"),
     "passive[0].where"),
    ("load on passive void only", edit("where = { x = [12.0, 12.0], y = [0.0, 0.0] }",
                                       "where = { x = [6.0, 6.0], y = [3.0, 3.0] }"),
     "loads[0].where"),
    ("load with 3 components", edit("force = [0.0, -1.0]", "force = [0.0, -1.0, 0.0]"),
     "loads[0].force"),
    ("load with 1 component", edit("force = [0.0, -1.0]", "force = [1.0]"), "loads[0].force"),
    ("zero force", edit("force = [0.0, -1.0]", "force = [0.0, 0.0]"), "loads[0].force"),
    ("load on clamped nodes only", edit(TIP, CORNER), "loads[0].where"),
    ("no restraint", edit(RESTRAINT, ""), "restraints"),
    ("restraint in x only", edit('fix = ["x", "y"]', 'fix = ["x"]'), "restraints"),
    # One pinned node (or a pin plus a roller along the line to it) lets the part turn.
    ("restraint at one node", edit(LEFT, CORNER), "restraints"),
    ("pin and parallel roller",
     edit(RESTRAINT, RESTRAINT.replace(LEFT, CORNER) + f'\n[[restraints]]\n{TIP}\nfix = ["x"]\n'),
     "restraints"),
    ("no load", edit(LOAD, ""), "loads"),
    ("passive solid everywhere", edit(PASSIVE, '[[passive]]\nwhere = { x = [0.0, 12.0] }\n'
                                               'state = "solid"\n'), "passive"),
    ("passive solid and void everywhere",
     edit(PASSIVE, '[[passive]]\nwhere = { x = [0.0, 6.0] }\nstate = "void"\n\n'
                   '[[passive]]\nwhere = { x = [6.0, 12.0] }\nstate = "solid"\n'), "passive"),
    ("passive solid above the volume fraction",
     edit(PASSIVE, '[[passive]]\nwhere = { x = [0.0, 7.0] }\nstate = "solid"\n'),
     "optimize.volume_fraction"),
    ("invalid TOML", edit("shape = [12, 6]", "shape = [12, 6"), "TOML"),
    ("empty file", lambda t: "", "domain"),
]


@pytest.fixture(scope="module")
def results_folder(tmp_path_factory):
    """A finished results folder of the valid base problem."""
    root = tmp_path_factory.mktemp("existing")
    problem = root / "base.toml"
    problem.write_text(BASE)
    out = root / "results"
    assert main(["optimize", str(problem), "--out", str(out), "--quiet"]) == 0
    assert (out / "summary.json").exists()
    return out


def run_bad(path: Path, out: Path, capsys) -> str:
    assert any(out.iterdir())
    return refused(capsys, ["optimize", str(path), "--out", str(out), "--overwrite", "--quiet"],
                   out)


@pytest.mark.parametrize(("change", "key"), [c[1:] for c in BAD_FILES],
                         ids=[c[0] for c in BAD_FILES])
def test_bad_problem_file(tmp_path, results_folder, capsys, change, key):
    path = tmp_path / "bad.toml"
    path.write_text(change(BASE))
    line = run_bad(path, results_folder, capsys)
    assert key in line, line
    assert str(path) in line, line


def test_missing_file(tmp_path, results_folder, capsys):
    path = tmp_path / "nowhere.toml"
    line = run_bad(path, results_folder, capsys)
    assert str(path) in line and "not found" in line


def test_binary_garbage(tmp_path, results_folder, capsys):
    path = tmp_path / "garbage.toml"
    path.write_bytes(np.random.default_rng(0).bytes(4096))
    line = run_bad(path, results_folder, capsys)
    assert str(path) in line


def test_folder_instead_of_file(tmp_path, results_folder, capsys):
    line = run_bad(tmp_path, results_folder, capsys)
    assert str(tmp_path) in line


def test_base_problem_is_valid_and_parsed_as_written(tmp_path):
    path = tmp_path / "base.toml"
    path.write_text(BASE)
    problem = load_problem(path)
    assert problem.name == "small bracket"
    assert problem.grid.shape == (12, 6) and problem.grid.thickness == 2.0
    assert problem.optimize.volume_fraction == 0.4 and problem.optimize.max_iterations == 3
    # Defaults documented in DESIGN.md.
    assert problem.material.void_stiffness == 1e-9
    assert problem.optimize.penalty == 3.0 and problem.optimize.method == "oc"
    assert problem.build.direction == "none"
    # Restraint: both components of the 7 nodes on x = 0.
    assert problem.fixed_dofs().size == 14
    assert problem.free_dofs().size == problem.grid.n_dofs - 14
    # Load: one node, the full force.
    F = problem.load_vectors()
    assert F.shape == (problem.grid.n_dofs, 1)
    node = 12 * 7 + 0  # C order over (i, j): node (12, 0)
    assert F[node * 2 + 1, 0] == -1.0 and np.count_nonzero(F) == 1
    # Passive void: element centres within radius 1 of (6, 3): the four around it.
    assert problem.passive_void.sum() == 4
    assert problem.passive_void[5:7, 2:4].all()
    assert not problem.passive_solid.any()


def test_loads_split_equally_and_cases_kept_apart():
    table = tomllib.loads(BASE)
    table["loads"] = [
        {"where": {"x": [12.0, 12.0]}, "force": [0.0, -7.0], "case": "down"},
        {"where": {"x": [0.0, 12.0], "y": [6.0, 6.0]}, "force": [2.6, 0.0], "case": "side"},
        {"where": {"x": [12.0, 12.0], "y": [0.0, 0.0]}, "force": [0.0, -1.0], "case": "down"},
    ]
    problem = problem_from_dict(table, source="t")
    assert problem.load_cases == ("down", "side")
    F = problem.load_vectors()
    assert np.allclose(F.sum(axis=0), [-8.0, 2.6])
    # 7 nodes on x = 12 share -7: -1 each; the corner node also gets the extra -1.
    ys = F[1::2, 0].reshape(13, 7)
    assert np.allclose(ys[12, 1:], -1.0) and np.isclose(ys[12, 0], -2.0)
    assert np.allclose(F[0::2, 1].reshape(13, 7)[:, 6], 0.2)


def test_later_passive_regions_win():
    # DESIGN.md example: a solid ring cut by a void hole listed after it.
    table = tomllib.loads(BASE)
    table["passive"] = [
        {"where": {"center": [6.0, 3.0], "radius": 2.5}, "state": "solid"},
        {"where": {"center": [6.0, 3.0], "radius": 1.0}, "state": "void"},
    ]
    problem = problem_from_dict(table, source="t")
    assert problem.passive_void.sum() == 4
    assert not (problem.passive_void & problem.passive_solid).any()
    assert problem.passive_solid.sum() > 4


def test_source_round_trips_through_toml():
    table = tomllib.loads(BASE)
    problem = problem_from_dict(table, source="t")
    again = problem_from_dict(tomllib.loads(to_toml(problem.source)), source="t")
    assert again.source == problem.source
    assert np.array_equal(again.load_vectors(), problem.load_vectors())


def test_library_raises_problem_error_not_exit(tmp_path):
    # STYLE.md: library code raises a ValueError subclass; it never exits.
    path = tmp_path / "bad.toml"
    path.write_text(BASE.replace("volume_fraction = 0.4", "volume_fraction = 2.0"))
    with pytest.raises(ProblemError, match="optimize.volume_fraction") as info:
        load_problem(path)
    assert isinstance(info.value, ValueError)
    assert len(str(info.value).splitlines()) == 1
    assert os.fspath(path) in str(info.value)
