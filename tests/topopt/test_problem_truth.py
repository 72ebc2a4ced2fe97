"""One Problem: the typed fields are the truth, the table is derived, settings change
through one validated path, the optimiser comes from its registry (issue 15).

Sources
-------
- Problem-file contract: DESIGN.md ("Problem file"); STYLE.md ("Frozen dataclasses for
  data ... variants with dataclasses.replace"; "validate at the public boundary").
"""

from __future__ import annotations

import dataclasses
import os
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest
from helpers import small_problem, write_problem

from topopt.driver import optimize
from topopt.problem import load_problem, problem_from_dict, to_toml, with_settings

ROOT = Path(__file__).resolve().parents[2]

#: element_size stays the integer 1 in the file (nothing may respell it)
PLATE = small_problem((12, 6), element_size=1, max_iterations=3, name="plate (invented)")


@pytest.fixture
def problem(tmp_path):
    return load_problem(write_problem(tmp_path, PLATE, name="plate.toml"))


def test_table_of_an_unchanged_problem_is_the_file(problem):
    # nothing is added or respelt (element_size stays the integer 1): digests and
    # study case ids of existing folders do not change
    assert problem.source == tomllib.loads(PLATE)


def test_replace_is_seen_by_the_table_and_by_with_settings(problem):
    changed = dataclasses.replace(
        problem, optimize=dataclasses.replace(problem.optimize, volume_fraction=0.3),
        name="renamed")
    assert changed.source["optimize"]["volume_fraction"] == 0.3
    assert changed.source["name"] == "renamed"
    # a later with_settings starts from the replaced values, not the file's
    again = with_settings(changed, {"optimize.penalty": 4.0})
    assert again.optimize.volume_fraction == 0.3 and again.optimize.penalty == 4.0
    assert again.name == "renamed"
    # and the table written to problem.toml loads back as the same problem
    back = problem_from_dict(tomllib.loads(to_toml(again.source)), source="back")
    assert back.optimize == again.optimize and back.name == "renamed"


def test_replace_of_the_build_direction_is_written_back(problem):
    built = dataclasses.replace(problem, build=dataclasses.replace(problem.build, direction="+y"))
    assert built.source["build"]["direction"] == "+y"


@pytest.mark.parametrize("field, value", [
    ("method", "nonsense"), ("volume_fraction", 1.5), ("penalty", 0.5),
    ("max_iterations", 0), ("max_iterations", 2.5), ("filter_radius", -1.0),
    ("change_tolerance", float("nan")),
])
def test_typed_settings_are_validated_on_construction(problem, field, value):
    with pytest.raises((ValueError, TypeError), match=f"OptimizeSettings.{field}"):
        dataclasses.replace(problem.optimize, **{field: value})


def test_material_is_validated_on_construction(problem):
    with pytest.raises(ValueError, match="Material.poisson_ratio"):
        dataclasses.replace(problem.material, poisson_ratio=0.5)


def test_unknown_method_never_runs_as_oc(problem):
    # even bypassing the dataclass check, the driver finds the rule by name or refuses
    settings = problem.optimize
    object.__setattr__(settings, "method", "nonsense")
    with pytest.raises(ValueError, match="optimize.method"):
        optimize(problem)


def test_passive_masks_must_match_the_grid(problem):
    import numpy as np

    with pytest.raises(ValueError, match="passive_solid"):
        dataclasses.replace(problem, passive_solid=np.zeros((3, 3), dtype=bool))


CUT = PLATE.replace("max_iterations = 3", "max_iterations = 2") + """
[[passive]]
where = { x = [5.0, 7.0] }
state = "void"
"""


def test_passive_void_cutting_the_load_path_is_a_warning(tmp_path):
    path = write_problem(tmp_path, CUT, name="cut.toml")
    with pytest.warns(UserWarning, match=r"loads\[0\].where: passive void cuts"):
        load_problem(path)
    # the command runs (valid input) and says so in one line
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.run(
        [sys.executable, "-m", "topopt.cli", "optimize", str(path), "--out",
         str(tmp_path / "out"), "--quiet"],
        cwd=ROOT, env=env, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("buttress: warning:") and str(path) in lines[0]


def test_no_warning_when_the_load_path_is_whole(tmp_path):
    import warnings

    path = write_problem(tmp_path, PLATE + '\n[[passive]]\nwhere = { x = [5.0, 7.0], y = [0.0, 3.0] }\n'
                         'state = "void"\n', name="whole.toml")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        load_problem(path)


@pytest.mark.parametrize("path", sorted(p for p in (ROOT / "examples").glob("*.toml")
                                        if "study" not in p.name), ids=lambda p: p.name)
def test_examples_table_is_unchanged(path):
    # the derived table adds nothing the reader would add itself (defaults, the default
    # projection with a build direction), so digests of existing runs stay valid
    problem = load_problem(path)
    assert problem.source == tomllib.loads(path.read_text())
