"""Every file in ``examples/`` loads, and each runs a few iterations without error.

Source: common practice (STYLE.md: every example is run on a small grid by a test). A
problem file is loaded with :func:`topopt.load_problem` and optimised for three
iterations on its own grid (on a coarsened copy above 5000 elements); a study file (a
table with ``problem`` and ``[vary]``) must point at a problem file that loads, and
every case it describes must validate, two of them (the first and the last) are run for
two iterations. Example scripts (``*.py``) are imported, which must not start any long
computation.
"""

from __future__ import annotations

import importlib.util
import itertools
import math
import re
import tomllib
from pathlib import Path

import numpy as np
import pytest

from topopt import load_problem, optimize
from topopt.problem import with_settings

EXAMPLES = Path(__file__).resolve().parents[2] / "examples"
TOML_FILES = sorted(EXAMPLES.glob("*.toml"))
SCRIPTS = sorted(EXAMPLES.glob("*.py"))


def is_study(table: dict) -> bool:
    return "vary" in table or "problem" in table


def test_the_documented_examples_exist():
    names = {p.name for p in TOML_FILES}
    assert {"wall-bracket-2d.toml", "mbb-beam.toml", "bracket-3d.toml"} <= names


#: A citation in an example's opening lines: an author ("Name et al." or "Name & Name")
#: followed by a year.
CITATION = re.compile(r"[A-Z][a-z]+ (?:et al\.|& [A-Z][a-z]+),?[^\n]{0,40}?\b(?:19|20)\d\d\b")


def names_its_origin(text: str) -> bool:
    """True when the opening lines say the scenario is invented or cite its source."""
    head = text[:1500]
    return "invented" in head.lower() or CITATION.search(head) is not None


def test_origin_check_can_fail():
    assert names_its_origin("# Invented scenario: a bracket")
    assert names_its_origin("# The half MBB beam (Bendsoe & Sigmund 2003)")
    assert names_its_origin("# settings of Andreassen et al., SMO 43:1-16, 2011")
    assert not names_its_origin("# A classic benchmark beam")
    assert not names_its_origin("# see et al. somewhere")


def test_every_example_names_itself_invented_or_published():
    # Examples are scenarios of our own (marked invented) or published benchmarks
    # (which cite their source).
    for path in TOML_FILES + SCRIPTS:
        assert names_its_origin(path.read_text()), path.name


#: Larger examples run on a coarsened copy (same extent in length units, element size
#: times an integer) so the default test run stays fast.
MAX_ELEMENTS = 5000


def coarsened(problem):
    """``problem`` on at most about MAX_ELEMENTS elements (unchanged if already small)."""
    grid = problem.grid
    factor = math.ceil((grid.n_elements / MAX_ELEMENTS) ** (1.0 / grid.dim))
    if factor <= 1:
        return problem
    shape = [max(1, round(n / factor)) for n in grid.shape]
    return with_settings(problem, {"domain.shape": shape,
                                   "domain.element_size": grid.element_size * factor})


def _run_briefly(problem, iterations: int):
    problem = coarsened(problem)
    assert problem.grid.n_elements <= 2 * MAX_ELEMENTS
    quick = with_settings(problem, {"optimize.max_iterations": iterations})
    result = optimize(quick)
    assert result.iterations == iterations
    assert np.isfinite(result.compliance) and result.compliance > 0
    assert result.density.shape == problem.grid.shape
    assert np.all((result.density >= 0) & (result.density <= 1))
    if not problem.build.active or problem.build.keep_in == "held":
        # Passive regions hold their state (with keep_in = "supported" the printability
        # filter comes after them in the chain and may lower unprintable solid).
        assert np.all(result.density[problem.passive_solid] == 1.0)
    if not problem.build.active:
        assert np.all(result.density[problem.passive_void] == 0.0)
    # OC keeps the volume at the target from the first update on (linear chain); a
    # nonlinear chain (projection, printability) may drift a little in three steps, and
    # MMA (the default with a build direction) reaches the target over a few more.
    slack = 0.1 if problem.optimize.method == "mma" and problem.build.active else 0.05
    assert abs(result.volume_fraction - problem.optimize.volume_fraction) < slack
    return result


@pytest.mark.parametrize("path", TOML_FILES, ids=[p.name for p in TOML_FILES])
def test_example_file_loads_and_runs(path):
    table = tomllib.loads(path.read_text())
    if not is_study(table):
        problem = load_problem(path)
        _run_briefly(problem, 3)
        return
    # A study: the base problem, the fixed settings and every varied case validate.
    base = load_problem(path.parent / table["problem"])
    fixed = dict(table.get("set", {}))
    base = with_settings(base, fixed) if fixed else base
    vary = table.get("vary", {})
    assert vary, "a study varies at least one key"
    keys = list(vary)
    if table.get("mode", "product") == "product":
        combos = list(itertools.product(*(vary[k] for k in keys)))
    else:  # cases side by side
        combos = list(zip(*(vary[k] for k in keys), strict=True))
    cases = [with_settings(base, dict(zip(keys, c, strict=True))) for c in combos]
    assert len(cases) == len(combos) > 0
    for case in (cases[0], cases[-1]):
        _run_briefly(case, 2)


@pytest.mark.parametrize("path", SCRIPTS, ids=[p.name for p in SCRIPTS])
def test_example_script_imports(path, tmp_path):
    spec = importlib.util.spec_from_file_location(f"example_{path.stem.replace('-', '_')}", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    # scripts with a main(out_dir, quick=...) run on a small grid (STYLE.md: every
    # example script is imported and run small by a test)
    if hasattr(module, "main"):
        rows = module.main(tmp_path / "out", quick=True)
        assert rows and all(r["compliance"] > 0 for r in rows)
