"""Smoothed STL export keeps the part in its design domain and its restrained faces in place.

Source: geometry (common practice: a part exported for printing must still fit the
design space it was optimised in and bolt to the same flat faces). The design is a
wedge-shaped block (invented) that touches the domain faces x = 0 (restrained), z = 0,
y = 0 and y = max and has a stair-stepped sloping top that smoothing should round.
"""

from __future__ import annotations

import numpy as np
import pytest
from helpers import refused, small_problem, write_problem

from topopt.cli import main
from topopt.surface import is_closed, isosurface, mesh_volume, read_stl

PROBLEM = small_problem((16, 6, 10), element_size=0.5, name="wedge block (invented)")


def wedge() -> np.ndarray:
    density = np.zeros((16, 6, 10))
    for i in range(16):
        density[i, :, : max(2, 10 - i * 8 // 16)] = 1.0  # top falls from z = 10 to 2 layers
    return density


@pytest.mark.parametrize("passes", [10, 30])
def test_smoothed_stl_stays_in_the_domain_and_keeps_boundary_faces(tmp_path, passes):
    h = 0.5
    size = np.array([16, 6, 10]) * h
    folder = tmp_path / "run"
    folder.mkdir()
    write_problem(folder, PROBLEM, name="problem.toml")
    np.savez(folder / "result.npz", density=wedge(), design=wedge())
    assert main(["export", str(folder), "--format", "stl", "--smooth", str(passes)]) == 0
    v, f = read_stl(folder / "design.stl")  # float32 in the file
    assert is_closed(f)
    tol32 = 1e-6 * size.max()  # float32 round-off of the STL file
    assert np.all(v >= -tol32) and np.all(v <= size + tol32)
    # The same mesh in float64: no vertex outside, and face vertices still on their face.
    rough, _ = isosurface(wedge(), element_size=h)
    from topopt.problem import load_problem

    problem = load_problem(folder / "problem.toml")
    keep = problem.grid.node_coordinates()[np.unique(problem.restraints[0].nodes)]
    smooth, faces = isosurface(wedge(), element_size=h, smoothing_iterations=passes,
                               keep_points=keep)
    assert np.all(smooth >= 0.0) and np.all(smooth <= size)
    for axis in range(3):
        for plane in (0.0, size[axis]):
            on = np.abs(rough[:, axis] - plane) <= 1e-9 * h
            assert np.all(np.abs(smooth[on, axis] - plane) <= 1e-9 * h)
    # the restrained face x = 0 is still planar and unmoved within one element of it
    restrained = rough[:, 0] <= 1e-9 * h
    assert restrained.sum() > 20
    assert np.abs(smooth[restrained] - rough[restrained]).max() <= 1e-9 * h
    # smoothing did smooth: the sloping top moved, and the volume is kept within 1 %
    assert np.abs(smooth - rough).max() > 0.05 * h
    assert mesh_volume(smooth, faces) == pytest.approx(mesh_volume(rough, faces), rel=0.01)


def test_export_refuses_to_overwrite(tmp_path, capsys):
    folder = tmp_path / "run"
    folder.mkdir()
    write_problem(folder, PROBLEM, name="problem.toml")
    np.savez(folder / "result.npz", density=wedge(), design=wedge())
    assert main(["export", str(folder), "--format", "stl"]) == 0
    before = (folder / "design.stl").read_bytes()
    refused(capsys, ["export", str(folder), "--format", "stl", "--smooth", "5"], folder,
            "--overwrite")
    assert main(["export", str(folder), "--format", "stl", "--smooth", "5", "--overwrite"]) == 0
    assert (folder / "design.stl").read_bytes() != before
