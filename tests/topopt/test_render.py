"""The 3D print picture: build frame, support faces, plate and shading.

Sources: geometry (a rotation turns the build direction up; a horizontal ledge of area A
facing down needs A of support at any overhang angle, a vertical wall none, common
practice for the overhang rule) and the pictures themselves (pixels of the support
colour appear only when something needs support).
"""

from __future__ import annotations

import itertools

import matplotlib
import numpy as np
import pytest

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

from topopt.render import (  # noqa: E402
    SUPPORT_COLOUR,
    build_frame,
    draw_print_3d,
    support_faces,
)


@pytest.mark.parametrize("direction", ["+x", "-x", "+y", "-y", "+z", "-z", [0.0, 1.0, 1.0],
                                       [1.0, -2.0, 0.5]])
def test_build_frame_is_a_rotation_that_turns_the_direction_up(direction):
    R = build_frame(direction)
    assert np.allclose(R @ R.T, np.eye(3), atol=1e-12)
    assert np.linalg.det(R) == pytest.approx(1.0)
    d = np.asarray(direction, float) if not isinstance(direction, str) else None
    if d is None:
        axis = "xyz".index(direction[1])
        d = np.eye(3)[axis] * (1 if direction[0] == "+" else -1)
    assert np.allclose(R @ (d / np.linalg.norm(d)), [0.0, 0.0, 1.0], atol=1e-12)


def test_support_faces_follow_the_overhang_angle():
    # a face at angle theta from the plate, facing down: normal (0, sin t, -cos t)
    for angle, theta in itertools.product((30.0, 45.0, 60.0), (10.0, 40.0, 50.0, 80.0)):
        t = np.radians(theta)
        normal = np.array([[0.0, np.sin(t), -np.cos(t)]])
        assert support_faces(normal, overhang_angle=angle)[0] == (theta < angle - 2.0)
    assert not support_faces(np.array([[0.0, 0.0, 1.0]]), overhang_angle=45.0)[0]


def ledge() -> np.ndarray:
    """A wall on the plate (z = 0) with a horizontal ledge 10 x 6 elements at height 6."""
    d = np.zeros((14, 6, 10))
    d[:2, :, :] = 1.0
    d[2:12, :, 6:8] = 1.0
    return d


def _draw(direction, view="below"):
    fig = plt.figure(figsize=(4, 3), dpi=80)
    ax = fig.add_subplot(111, projection="3d")
    info = draw_print_3d(ax, ledge(), element_size=1.0, direction=direction, view=view,
                         length_unit="mm")
    fig.canvas.draw()
    pixels = np.asarray(fig.canvas.buffer_rgba())[:, :, :3] / 255.0
    plt.close(fig)
    return info, pixels


def _support_pixels(pixels) -> int:
    # shaded support colour: orange hue (red high, blue low); the part colour is bluish
    r, g, b = pixels[..., 0], pixels[..., 1], pixels[..., 2]
    return int(np.sum((r > b + 0.25) & (r > g + 0.1)))


def test_ledge_support_area_and_colour():
    # Built +z the ledge's underside needs support: 10 x 6 elements, less the half-element
    # 45-degree bevel marching cubes puts on its free edges (not flagged), so about
    # 9.5 x 5 = 47.5 (measured 45.0); built +x the ledge stands upright and nothing
    # does (the wall is on the plate).
    info, pixels = _draw("+z")
    assert 40.0 < info["support_area"] <= 60.0
    assert _support_pixels(pixels) > 200
    info, pixels = _draw("+x")
    assert info["support_area"] == pytest.approx(0.0, abs=3.0)  # only bevelled edges
    free, pixels_free = _draw("none")
    assert free["support_faces"] == 0 and _support_pixels(pixels_free) == 0
    assert SUPPORT_COLOUR[0] > SUPPORT_COLOUR[2]


def test_design_png_of_a_3d_run_marks_support_and_carries_units(tmp_path):
    from topopt.export import write_png
    from topopt.problem import problem_from_dict

    table = {
        "domain": {"shape": [14, 6, 10], "element_size": 1.0},
        "material": {"youngs_modulus": 1000.0, "poisson_ratio": 0.3},
        "restraints": [{"where": {"x": [0.0, 0.0]}}],
        "loads": [{"where": {"x": [12.0, 12.0], "z": [8.0, 8.0]}, "force": [0.0, 0.0, -1.0]}],
        "passive": [{"where": {"x": [12.0, 14.0], "z": [0.0, 3.0]}, "state": "void"}],
        "optimize": {"volume_fraction": 0.3},
        "build": {"direction": "+z"},
    }
    problem = problem_from_dict(table, source="ledge")
    write_png(tmp_path / "design.png", ledge(), problem)
    image = plt.imread(tmp_path / "design.png")[:, :, :3]
    assert _support_pixels(image) > 200
    table["build"] = {"direction": "none"}
    write_png(tmp_path / "free.png", ledge(), problem_from_dict(table, source="ledge"))
    assert _support_pixels(plt.imread(tmp_path / "free.png")[:, :, :3]) == 0
