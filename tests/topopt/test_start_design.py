"""optimize.start_from: a run that starts from the design of an earlier run.

The design is carried over to the new grid by linear interpolation between element
centres (:func:`topopt.grid.resample`); a design optimised on a coarser grid then needs
only the final sharp phase on the fine one.
"""

from __future__ import annotations

import copy
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from topopt import load_problem, optimize
from topopt.arrays import ResultsError, read_start_design
from topopt.grid import resample
from topopt.problem import problem_from_dict, problem_table
from topopt.results import write_results

EXAMPLES = Path(__file__).resolve().parents[2] / "examples"
MBB = EXAMPLES / "mbb-beam.toml"


def _mbb(element_size: float, **optimize_keys) -> dict:
    """The 60 x 20 half MBB beam of the example on elements of ``element_size``."""
    data = copy.deepcopy(dict(load_problem(MBB).source))
    n = round(60 / element_size)
    data["domain"] = {"shape": [n, n // 3], "element_size": element_size}
    data["optimize"].update(method="mma", filter_radius=3.0, max_iterations=300,
                            **optimize_keys)
    return data


# ------------------------------------------------------------------------ resampling


def test_resample_reproduces_a_linear_field_between_the_outer_centres():
    # Exact identity: linear interpolation reproduces a linear function (common
    # practice). Values are the x coordinates of 6 element centres on [0, 1]; carried
    # over to 15 elements, every new centre between the outer old centres gets its own
    # coordinate, and the ones beyond them the edge value.
    old = (np.arange(6) + 0.5) / 6
    values = np.tile(old[:, None], (1, 3))
    new = resample(values, (15, 3))
    centres = (np.arange(15) + 0.5) / 15
    inside = (centres >= old[0]) & (centres <= old[-1])
    assert np.allclose(new[inside, 1], centres[inside], atol=1e-12)
    assert np.allclose(new[centres < old[0], 1], old[0])
    assert np.allclose(new[centres > old[-1], 1], old[-1])
    assert np.allclose(new, new[:, :1])                     # constant across y stays so


def test_resample_keeps_shape_constants_and_range():
    rng = np.random.default_rng(3)
    values = rng.random((9, 5, 4))
    assert np.array_equal(resample(values, (9, 5, 4)), values)
    out = resample(values, (15, 8, 7))
    assert out.shape == (15, 8, 7)
    assert values.min() <= out.min() and out.max() <= values.max()
    assert np.allclose(resample(np.full((6, 3, 3), 0.3), (10, 5, 5)), 0.3)
    with pytest.raises(ValueError, match="2D values for a 3D grid"):
        resample(values[:, :, 0], (9, 5, 4))


# --------------------------------------------------------------------------- runs


@pytest.fixture(scope="module")
def coarse_folder(tmp_path_factory):
    """A converged self-made design of the beam on 30 x 10 elements, written as results."""
    data = _mbb(2.0, projection=dict(beta_start=1.0, beta_max=16.0, every=15))
    problem = problem_from_dict(data, source="coarse.toml")
    result = optimize(problem)
    assert result.converged, result.message
    folder = tmp_path_factory.mktemp("start") / "coarse"
    write_results(result, problem, folder)
    return folder


def test_a_coarse_design_starts_the_fine_run_and_saves_iterations(coarse_folder):
    # The fine run (60 x 20) started from the coarse design with a short continuation
    # (beta 4 to 16) needs fewer iterations than the same run from a uniform start with
    # the whole continuation (beta 1 to 16), and ends as stiff (within 1 %); both stop
    # on the compliance rule. Common practice: grid sequencing (nested iteration) of a
    # continuation method. Measured when written: 47 against 82 iterations, compliance
    # 189.50 against 189.36. Without the compliance rule the creeping boundary elements
    # at beta 16 decide (171 against 196), and starting at beta 16 itself froze the
    # coarse layout (compliance 1.4 % higher).
    scratch = optimize(problem_from_dict(
        _mbb(1.0, projection=dict(beta_start=1.0, beta_max=16.0, every=15),
             compliance_tolerance=1e-3),
        source="fine.toml"))
    started = optimize(problem_from_dict(
        _mbb(1.0, projection=dict(beta_start=4.0, beta_max=16.0, every=10),
             compliance_tolerance=1e-3, start_from=str(coarse_folder)),
        source="fine.toml"))
    assert scratch.converged and started.converged, (scratch.message, started.message)
    assert started.iterations < 0.75 * scratch.iterations
    assert started.compliance <= 1.01 * scratch.compliance
    assert started.grey_level <= 0.02


def test_the_start_design_is_read_from_the_folder_or_its_file(coarse_folder, tmp_path):
    via_folder = read_start_design(coarse_folder, (60, 20))
    via_file = read_start_design(coarse_folder / "result.npz", (60, 20))
    assert np.array_equal(via_folder, via_file)
    assert via_folder.shape == (60, 20) and 0.0 <= via_folder.min() <= via_folder.max() <= 1.0
    # relative paths are taken from the problem file's folder; the saved problem keeps
    # the absolute path and reads back without the folder being read
    problem_file = tmp_path / "sub" / "fine.toml"
    problem_file.parent.mkdir()
    data = _mbb(1.0, start_from=os.path.relpath(coarse_folder, problem_file.parent))
    p = problem_from_dict(data, source=str(problem_file))
    assert p.optimize.start_from == str(coarse_folder.resolve())
    again = problem_from_dict(problem_table(p))
    assert again.optimize.start_from == p.optimize.start_from


# ---------------------------------------------------------------------- bad input


def _bad_npz(path: Path, **arrays) -> Path:
    np.savez(path, **arrays)
    return path


@pytest.mark.parametrize(("make", "words"), [
    (lambda d: d / "missing", "file not found"),
    (lambda d: _bad_npz(d / "wrong-axes.npz", design=np.full((60, 20, 3), 0.5)),
     "expected 2 axes"),
    (lambda d: _bad_npz(d / "other-domain.npz", design=np.full((30, 30), 0.5)),
     "does not cover the domain"),
    (lambda d: _bad_npz(d / "nan.npz", design=np.full((30, 10), np.nan)), "NaN"),
    (lambda d: _bad_npz(d / "no-design.npz", density=np.full((30, 10), 0.5)),
     "no array named 'design'"),
    (lambda d: _bad_npz(d / "objects.npz", design=np.array([{"a": 1}], dtype=object)),
     "design"),
])
def test_a_bad_start_design_is_one_line_exit_2_and_no_folder(tmp_path, make, words):
    start = make(tmp_path)
    with pytest.raises(ResultsError, match=words):
        read_start_design(start, (60, 20))
    text = MBB.read_text().replace("[optimize]", f'[optimize]\nstart_from = "{start}"', 1)
    problem_file = tmp_path / "p.toml"
    problem_file.write_text(text)
    out = tmp_path / "out"
    run = subprocess.run([sys.executable, "-m", "topopt.cli", "optimize", str(problem_file),
                          "--out", str(out)], capture_output=True, text=True)
    assert run.returncode == 2, run.stderr
    assert "Traceback" not in run.stderr and len(run.stderr.strip().splitlines()) == 1
    assert words.split()[0] in run.stderr
    assert not out.exists()


@pytest.mark.parametrize("bad", [3, "", "  "])
def test_start_from_must_be_a_path_string(bad):
    with pytest.raises(ValueError, match="optimize.start_from"):
        problem_from_dict(_mbb(1.0, start_from=bad), source="t.toml")
