"""Hostile or careless input refused before any work (issue 15).

Each class: exit code 2, one line naming the file and the key, no traceback, the
previous results folder byte for byte unchanged, in under 5 s, and without allocating
more than a small fixed amount (traced by ``tracemalloc``, which numpy reports to).

Sources
-------
- The contract: DESIGN.md ("Every unknown key, wrong type, out-of-range value ... one
  clear line naming the file, the key and what is expected; exit code 2").
- Double precision range (about 1e-308 ... 1e308; subnormal below): IEEE 754-2008.
- Memory estimate counting rules: common practice (see topopt/memory.py).
"""

from __future__ import annotations

import shutil
import struct
import tracemalloc
from pathlib import Path

import numpy as np
import pytest
from helpers import SMALL, write_problem
from helpers import refused as check_refused

from topopt.cli import main
from topopt.memory import estimate_memory
from topopt.problem import MAX_DEPTH, ProblemError, problem_from_dict, read_toml

#: allocation allowed for refusing an input (generous: parsing and the checks)
SMALL_AMOUNT = 64 * 2**20


@pytest.fixture(scope="module")
def previous(tmp_path_factory):
    root = tmp_path_factory.mktemp("previous")
    out = root / "runs" / "out"
    assert main(["optimize", str(write_problem(root)), "--out", str(out), "--quiet"]) == 0
    return out


@pytest.fixture
def out(tmp_path, previous):
    copy = tmp_path / "runs" / "out"
    shutil.copytree(previous, copy)
    return copy


def refused(capsys, argv: list[str], folder: Path, *needles: str, trace: bool = True) -> str:
    """:func:`helpers.refused` with the small allocation cap (``trace=False`` where tracing
    itself would take the time: the TOML parser allocates per character)."""
    return check_refused(capsys, argv, folder, *needles,
                         max_bytes=SMALL_AMOUNT if trace else None)


ABSURD = [
    # (replace, with, key named)
    ("force = [0.0, -1.0]", "force = [0.0, -1e200]", "loads[0].force"),
    ("force = [0.0, -1.0]", "force = [0.0, -1e-320]", "loads[0].force"),
    ("youngs_modulus = 1000.0", "youngs_modulus = 1e-320", "material.youngs_modulus"),
    ("youngs_modulus = 1000.0", "youngs_modulus = 1e250", "material.youngs_modulus"),
    ("element_size = 1.0", "element_size = 1e-200", "domain.element_size"),
    ("element_size = 1.0", "element_size = 1e200", "domain.element_size"),
    ("poisson_ratio = 0.3", "poisson_ratio = 0.3\nvoid_stiffness = 1e-300",
     "material.void_stiffness"),
]


@pytest.mark.parametrize("old, new, key", ABSURD, ids=[a[1].split("\n")[-1] for a in ABSURD])
def test_finite_but_absurd_numbers(tmp_path, out, capsys, old, new, key):
    bad = write_problem(tmp_path, SMALL.replace(old, new), name="bad.toml")
    refused(capsys, ["optimize", str(bad), "--out", str(out), "--overwrite", "--quiet"], out,
            str(bad), key)


def test_moderate_units_still_load():
    # SI units (Pa, N, m) of a steel part: far from every limit
    table = read_toml_text(SMALL.replace("youngs_modulus = 1000.0", "youngs_modulus = 2.1e11")
                           .replace("element_size = 1.0", "element_size = 0.001")
                           .replace("x = [20.0, 20.0]", "x = [0.02, 0.02]")
                           .replace("x = [0.0, 0.0]", "x = [0.0, 0.0]")
                           .replace("force = [0.0, -1.0]", "force = [0.0, -5000.0]"))
    problem = problem_from_dict(table, source="si.toml")
    assert problem.grid.element_size == 0.001


def read_toml_text(text: str) -> dict:
    import tomllib

    return tomllib.loads(text)


@pytest.mark.parametrize("shape, key", [
    ("[10000, 5000]", "domain.shape"),            # 5e7 elements: beyond an 8 GB cap
    ("[4294967296, 4294967296]", "domain.shape"),  # wraps round in 64-bit integers
    ("[400, 400, 300]", "domain.shape"),
])
def test_memory_is_budgeted_before_work(tmp_path, out, capsys, shape, key):
    bad = write_problem(tmp_path, SMALL.replace("shape = [20, 10]", f"shape = {shape}"), name="bad.toml")
    refused(capsys, ["--max-memory", "8", "optimize", str(bad), "--out", str(out),
                     "--overwrite", "--quiet"], out, str(bad), key)


def test_memory_cap_from_the_environment(tmp_path, out, capsys, monkeypatch):
    monkeypatch.setenv("BUTTRESS_MAX_MEMORY", "0.001")
    bad = write_problem(tmp_path, SMALL.replace("shape = [20, 10]", "shape = [200, 100]")
                       .replace("x = [20.0, 20.0]", "x = [200.0, 200.0]"), name="bad.toml")
    refused(capsys, ["optimize", str(bad), "--out", str(out), "--overwrite", "--quiet"], out,
            str(bad), "domain.shape", "BUTTRESS_MAX_MEMORY")


def test_bad_memory_cap_is_one_line(tmp_path, out, capsys):
    refused(capsys, ["--max-memory", "lots", "optimize", str(tmp_path / "x.toml"), "--out",
                     str(out)], out, "--max-memory")


def test_memory_estimate_grows_with_the_problem():
    small = sum(estimate_memory((20, 10), filter_radius=1.5, element_size=1.0).values())
    large = sum(estimate_memory((200, 100), filter_radius=1.5, element_size=1.0).values())
    # 100 times the elements: between 50 and 200 times the memory (linear storage)
    assert 50 < large / small < 200
    # a filter radius far beyond the domain costs no more than one reaching across it
    across = estimate_memory((30, 10), filter_radius=30.0, element_size=1.0)["filter"]
    huge = estimate_memory((30, 10), filter_radius=1e4, element_size=1.0)["filter"]
    assert huge == across


def test_filter_radius_far_beyond_the_domain_runs(tmp_path, capsys):
    # was a 3 GiB allocation; the kernel now stops at the domain's size
    path = write_problem(tmp_path, SMALL.replace("max_iterations = 4",
                                                "max_iterations = 2\nfilter_radius = 1e4"), name="bad.toml")
    tracemalloc.start()
    try:
        code = main(["optimize", str(path), "--out", str(tmp_path / "o"), "--quiet"])
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert code == 0, capsys.readouterr().err
    assert peak < 200 * 2**20, peak


def test_nesting_5000_deep(tmp_path, out, capsys):
    bad = write_problem(tmp_path, SMALL + "\n[extra]\nx = " + "[" * 5000 + "]" * 5000 + "\n", name="bad.toml")
    refused(capsys, ["optimize", str(bad), "--out", str(out), "--overwrite", "--quiet"], out,
            str(bad), "nested")
    # below the parser's limit but deeper than any problem file needs
    shallow = write_problem(tmp_path, SMALL + "\n[extra]\nx = " + "[" * 40 + "]" * 40 + "\n", name="bad.toml")
    with pytest.raises(ProblemError, match=f"deeper than {MAX_DEPTH}"):
        read_toml(shallow, what="a problem file")


def test_study_nested_5000_deep(tmp_path, capsys):
    study = tmp_path / "study.toml"
    study.write_text('problem = "x.toml"\n[vary]\n"optimize.penalty" = ' + "[" * 5000
                     + "]" * 5000 + "\n")
    refused(capsys, ["sweep", str(study), "--out", str(tmp_path / "s" / "o")],
            tmp_path / "s" / "o", str(study), "nested")


def test_two_megabyte_name(tmp_path, out, capsys):
    bad = write_problem(tmp_path, f'name = "{"n" * 2_000_000}"\n' + SMALL.split("\n", 1)[1], name="bad.toml")
    refused(capsys, ["optimize", str(bad), "--out", str(out), "--overwrite", "--quiet"], out,
            str(bad), "name", trace=False)


# ---------------------------------------------------------------------------- arrays, STL


def binary_stl(path: Path, triangles: np.ndarray) -> Path:
    with open(path, "wb") as handle:
        handle.write(b"\0" * 80 + struct.pack("<I", len(triangles)))
        for tri in triangles:
            handle.write(struct.pack("<3f", 0, 0, 0) + tri.astype("<f4").tobytes() + b"\0\0")
    return path


def cube_triangles(size: float, offset: float = 0.0) -> np.ndarray:
    v = np.array([[x, y, z] for x in (0, size) for y in (0, size) for z in (0, size)],
                 float) + offset
    faces = [(0, 1, 3), (0, 3, 2), (4, 6, 7), (4, 7, 5), (0, 4, 5), (0, 5, 1),
             (2, 3, 7), (2, 7, 6), (0, 2, 6), (0, 6, 4), (1, 5, 7), (1, 7, 3)]
    return np.array([v[list(f)] for f in faces])


def test_stl_voxel_count_checked_before_voxelising(tmp_path, out, capsys):
    stl = binary_stl(tmp_path / "cube.stl", cube_triangles(4.0))
    # 400^3 voxels: refused under a 1 GB cap before any voxel exists
    refused(capsys, ["--max-memory", "1", "inspect", str(stl), "--element-size", "0.01",
                     "--out", str(out.parent / "report")], out, str(stl), "--element-size")


def test_stl_with_huge_coordinates(tmp_path, out, capsys):
    triangles = cube_triangles(4.0)
    triangles[0, 0] = [1e30, 1e30, 1e30]
    stl = binary_stl(tmp_path / "far.stl", triangles)
    refused(capsys, ["inspect", str(stl), "--element-size", "0.5", "--out",
                     str(out.parent / "report")], out, str(stl), "--element-size")


@pytest.mark.parametrize("shape", [(1, 1), (10, 1, 5)])
def test_arrays_too_small_for_a_gradient(tmp_path, out, capsys, shape):
    path = tmp_path / "small.npy"
    np.save(path, np.ones(shape))
    refused(capsys, ["inspect", str(path), "--element-size", "1", "--out",
                     str(out.parent / "report")], out, str(path), "2 elements")
