"""`buttress inspect` and `buttress export` from the command line, good and bad input."""

import csv
import json

import numpy as np
import pytest

from topopt.cli import main
from topopt.surface import is_closed, mesh_volume, read_stl, write_stl

PROBLEM_2D = """
name = "test plate"
[domain]
shape = [20, 10]
element_size = 0.5
thickness = 2.0
[material]
youngs_modulus = 1000.0
poisson_ratio = 0.3
mass_density = 0.0027
[[restraints]]
where = { x = [0.0, 0.0] }
fix = ["x", "y"]
[[loads]]
where = { x = [10.0, 10.0], y = [0.0, 0.0] }
force = [0.0, -1.0]
[optimize]
volume_fraction = 0.4
filter_radius = 1.0
[process]
layer_thickness = 0.05
"""

PROBLEM_3D = """
name = "test block"
[domain]
shape = [10, 6, 8]
element_size = 1.0
[material]
youngs_modulus = 1000.0
poisson_ratio = 0.3
[[restraints]]
where = { x = [0.0, 0.0] }
fix = ["x", "y", "z"]
[[loads]]
where = { x = [10.0, 10.0], y = [0.0, 0.0] }
force = [0.0, -1.0, 0.0]
[optimize]
volume_fraction = 0.4
filter_radius = 1.5
"""


def box_mesh(low, high):
    """12 outward triangles of an axis-aligned box."""
    (x0, y0, z0), (x1, y1, z1) = low, high
    v = np.array([[x, y, z] for z in (z0, z1) for y in (y0, y1) for x in (x0, x1)], float)
    f = np.array([[0, 2, 1], [1, 2, 3], [4, 5, 6], [5, 7, 6], [0, 1, 4], [1, 5, 4],
                  [2, 6, 3], [3, 6, 7], [0, 4, 2], [2, 4, 6], [1, 3, 5], [3, 7, 5]])
    return v, f


def t_shape_2d():
    """An invented T: a stem on the plate (+y) carrying a wide bar with overhangs."""
    d = np.zeros((20, 10))
    d[8:12, :6] = 1.0
    d[2:18, 6:8] = 1.0
    return d


def results_folder(tmp_path, density, problem_text, name="run"):
    folder = tmp_path / name
    folder.mkdir()
    (folder / "problem.toml").write_text(problem_text)
    np.savez(folder / "result.npz", density=density, design=density)
    return folder


def read_report(out):
    report = json.loads((out / "inspect.json").read_text())
    with open(out / "inspect.csv", newline="") as handle:
        rows = list(csv.DictReader(handle))
    return report, rows


def test_inspect_results_folder_writes_the_report(tmp_path, capsys):
    folder = results_folder(tmp_path, t_shape_2d(), PROBLEM_2D)
    out = tmp_path / "report"
    assert main(["inspect", str(folder), "--out", str(out)]) == 0
    report, rows = read_report(out)
    assert [r["direction"] for r in report["directions"]] == ["+x", "-x", "+y", "-y"]
    assert [r["direction"] for r in rows] == ["+x", "-x", "+y", "-y"]
    assert report["best"] in ("+x", "-x", "+y", "-y")
    assert report["process"]["layer_thickness"] == 0.05  # from the problem's [process]
    assert report["process"]["mass_density"] == 0.0027
    assert (out / "inspect.png").stat().st_size > 10_000
    plus_y = report["directions"][2]
    # by hand: 4 x 6 stem + 16 x 2 bar = 56 elements of 0.5 x 0.5 x 2 (thickness)
    assert plus_y["part_volume"] == pytest.approx(56 * 0.5)
    # mass in kg: the default unit system is mm-N-MPa-tonne, so the density is per tonne
    assert plus_y["part_mass"] == pytest.approx(56 * 0.5 * 0.0027 * 1000.0)
    # the bar overhangs the stem by 6 elements each side; 45 degrees lets one print
    assert plus_y["overhang_area"] == pytest.approx(2 * 5 * 0.5 * 2.0)
    assert plus_y["support_on_part_volume"] == 0.0
    assert plus_y["build_height"] == 4.0 and plus_y["layers"] == 80
    text = capsys.readouterr().out
    assert f"best build direction: {report['best']}" in text
    assert "first-order" in text


def test_inspect_adds_the_problems_tilted_direction_to_the_axes(tmp_path, capsys):
    # a design optimised for a tilted direction is analysed in that direction too; an
    # axis direction in the problem adds nothing (it is among the axes already)
    tilted = PROBLEM_2D + '[build]\ndirection = [1.0, 1.0]\n'
    folder = results_folder(tmp_path, t_shape_2d(), tilted, name="tilted")
    out = tmp_path / "report-tilted"
    assert main(["inspect", str(folder), "--out", str(out)]) == 0
    report, rows = read_report(out)
    assert [r["direction"] for r in rows] == ["+x", "-x", "+y", "-y", "[0.7071, 0.7071]"]
    assert report["directions"][-1]["vector"] == pytest.approx([2**-0.5, 2**-0.5])
    axis = results_folder(tmp_path, t_shape_2d(), PROBLEM_2D + '[build]\ndirection = "+y"\n',
                          name="axis")
    assert main(["inspect", str(axis), "--out", str(tmp_path / "report-axis")]) == 0
    _, rows = read_report(tmp_path / "report-axis")
    assert [r["direction"] for r in rows] == ["+x", "-x", "+y", "-y"]
    # --directions still decides alone
    assert main(["inspect", str(folder), "--out", str(tmp_path / "r3"), "--directions",
                 "+y"]) == 0
    assert [r["direction"] for r in read_report(tmp_path / "r3")[1]] == ["+y"]


def test_inspect_npy_and_npz_with_element_size_and_options(tmp_path, capsys):
    np.save(tmp_path / "d.npy", t_shape_2d())
    np.savez(tmp_path / "d.npz", density=t_shape_2d(), other=np.zeros(3))
    out1, out2 = tmp_path / "a", tmp_path / "b"
    assert main(["inspect", str(tmp_path / "d.npy"), "--element-size", "0.5", "--directions=+y,-y",
                 "--weights", "time=1,support=0,cost=0", "--out", str(out1)]) == 0
    assert main(["inspect", str(tmp_path / "d.npz"), "--element-size", "0.5", "--directions=+y,-y",
                 "--thickness", "2", "--out", str(out2)]) == 0
    r1, _ = read_report(out1)
    r2, _ = read_report(out2)
    assert [d["direction"] for d in r1["directions"]] == ["+y", "-y"]
    # without a problem file there is no mass density: mass and cost are null
    assert r1["directions"][0]["part_mass"] is None
    volume1 = r1["directions"][0]["part_volume"]
    assert r2["directions"][0]["part_volume"] == pytest.approx(2 * volume1)
    # -y (plate on the bar's side) needs no support at all; +y does
    assert r1["directions"][1]["support_volume"] == 0.0
    assert r1["directions"][0]["support_volume"] > 0.0


def test_inspect_closed_stl(tmp_path):
    v, f = box_mesh((0.0, 0.0, 0.0), (4.0, 3.0, 2.0))
    write_stl(tmp_path / "box.stl", v, f)
    out = tmp_path / "r"
    assert main(["inspect", str(tmp_path / "box.stl"), "--element-size", "0.5",
                 "--out", str(out)]) == 0
    report, rows = read_report(out)
    assert len(rows) == 6
    for d in report["directions"]:
        assert d["part_volume"] == pytest.approx(24.0)
        assert d["support_volume"] == 0.0  # a box on the plate needs none
    heights = {d["direction"]: d["build_height"] for d in report["directions"]}
    assert heights == {"+x": 4.0, "-x": 4.0, "+y": 3.0, "-y": 3.0, "+z": 2.0, "-z": 2.0}
    assert report["best"] == "+z"  # lowest build, equal otherwise; first of the ties


def test_trapped_powder_and_unremovable_support_are_reported(tmp_path, capsys):
    design = np.zeros((20, 20, 17), dtype=bool)  # closed box, 2-voxel walls, on the plate
    design[3:17, 3:17, :14] = True
    design[5:15, 5:15, 2:12] = False
    a, b = 5, 15
    np.save(tmp_path / "box.npy", design)
    out = tmp_path / "r"
    assert main(["inspect", str(tmp_path / "box.npy"), "--element-size", "0.5",
                 "--directions=+z", "--out", str(out)]) == 0
    report, _ = read_report(out)
    row = report["directions"][0]
    assert row["trapped_cavities"] == 1
    assert row["trapped_powder_volume"] == pytest.approx((b - a) ** 3 * 0.125)
    assert row["unremovable_support_volume"] == pytest.approx(row["support_volume"])
    text = capsys.readouterr().out
    assert "trap" in text and "cannot reach" in text


def test_through_holes_default_and_closed_holes_option_for_2d_plates(tmp_path):
    ring = np.zeros((20, 20))
    ring[2:18, 2:18] = 1.0
    ring[6:14, 6:14] = 0.0  # a 4 mm square hole in a plate, tool 2 mm
    np.save(tmp_path / "ring.npy", ring)
    closed, opened, default = tmp_path / "c", tmp_path / "o", tmp_path / "d"
    common = ["--element-size", "0.5", "--directions=+y"]
    assert main(["inspect", str(tmp_path / "ring.npy"), *common, "--closed-holes",
                 "--out", str(closed)]) == 0
    assert main(["inspect", str(tmp_path / "ring.npy"), *common, "--through-holes",
                 "--out", str(opened)]) == 0
    assert main(["inspect", str(tmp_path / "ring.npy"), *common, "--out", str(default)]) == 0
    rc, _ = read_report(closed)
    ro, _ = read_report(opened)
    assert read_report(default)[0]["directions"] == ro["directions"]
    assert ro["through_holes"] is True and rc["through_holes"] is False
    assert rc["directions"][0]["trapped_cavities"] == 1
    assert rc["directions"][0]["unremovable_support_volume"] > 0
    assert ro["directions"][0]["trapped_cavities"] == 0
    assert ro["directions"][0]["unremovable_support_volume"] == 0.0
    assert ro["directions"][0]["support_volume"] == rc["directions"][0]["support_volume"]


def bad_cases(tmp_path):
    np.save(tmp_path / "ok.npy", t_shape_2d())
    np.save(tmp_path / "objects.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    np.save(tmp_path / "nan.npy", np.full((4, 4), np.nan))
    np.save(tmp_path / "empty.npy", np.zeros((4, 4)))
    np.save(tmp_path / "flat.npy", np.zeros(5))
    (tmp_path / "text.npy").write_text("not numpy")
    (tmp_path / "p.toml").write_text("[domain]\nshape = 3\n")
    (tmp_path / "notes.txt").write_text("hello")
    v, f = (np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0]], float), np.array([[0, 1, 2]]))
    write_stl(tmp_path / "open.stl", v, f)
    ok = str(tmp_path / "ok.npy")
    return {
        "missing": [str(tmp_path / "none.npy"), "--element-size", "1"],
        "pickled objects": [str(tmp_path / "objects.npy"), "--element-size", "1"],
        "nan": [str(tmp_path / "nan.npy"), "--element-size", "1"],
        "empty": [str(tmp_path / "empty.npy"), "--element-size", "1"],
        "1D": [str(tmp_path / "flat.npy"), "--element-size", "1"],
        "not numpy": [str(tmp_path / "text.npy"), "--element-size", "1"],
        "unknown suffix": [str(tmp_path / "notes.txt"), "--element-size", "1"],
        "no size": [ok],
        "negative size": [ok, "--element-size", "-1"],
        "3D direction for 2D": [ok, "--element-size", "1", "--directions=+z"],
        "repeated direction": [ok, "--element-size", "1", "--directions=+x,+x"],
        "no direction": [ok, "--element-size", "1", "--directions=,"],
        "bad weights": [ok, "--element-size", "1", "--weights", "time=fast"],
        "unknown weight": [ok, "--element-size", "1", "--weights", "speed=1"],
        "zero weights": [ok, "--element-size", "1", "--weights", "time=0"],
        "bad angle": [ok, "--element-size", "1", "--overhang-angle", "80"],
        "bad problem": [ok, "--problem", str(tmp_path / "p.toml")],
        "open stl": [str(tmp_path / "open.stl"), "--element-size", "0.1"],
        "stl without size": [str(tmp_path / "open.stl")],
        "shape mismatch": [ok, "--problem", str(tmp_path / "p3.toml")],
    }


def test_bad_input_gives_one_line_and_exit_2_and_keeps_previous_report(tmp_path, capsys):
    (tmp_path / "p3.toml").write_text(PROBLEM_3D)
    out = tmp_path / "report"
    np.save(tmp_path / "first.npy", t_shape_2d())
    assert main(["inspect", str(tmp_path / "first.npy"), "--element-size", "0.5",
                 "--out", str(out)]) == 0
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    capsys.readouterr()
    for label, args in bad_cases(tmp_path).items():
        code = main(["inspect", *args, "--out", str(out), "--overwrite"])
        err = capsys.readouterr().err
        assert code == 2, label
        assert err.startswith("buttress: error: ") and err.count("\n") == 1, (label, err)
        assert "Traceback" not in err
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
    # a report already there is not replaced without --overwrite
    assert main(["inspect", str(tmp_path / "first.npy"), "--element-size", "0.5",
                 "--out", str(out)]) == 2
    assert "--overwrite" in capsys.readouterr().err


def test_export_stl_vtu_png_3d(tmp_path):
    density = np.zeros((10, 6, 8))
    density[2:8, 1:5, 0:6] = 1.0
    folder = results_folder(tmp_path, density, PROBLEM_3D)
    assert main(["export", str(folder), "--format", "stl", "--smooth", "3"]) == 0
    v, f = read_stl(folder / "design.stl")
    assert is_closed(f)
    # smoothing keeps the volume of the marching-cubes surface, a little under 6*4*6
    assert 0.85 * 144 < mesh_volume(v, f) < 144
    assert main(["export", str(folder), "--format", "vtu"]) == 0
    assert main(["export", str(folder), "--format", "png", "--out", str(tmp_path / "x.png")]) == 0
    assert (folder / "design.vtu").stat().st_size > 0 and (tmp_path / "x.png").exists()


def test_export_stl_2d_is_the_extruded_contour(tmp_path):
    folder = results_folder(tmp_path, t_shape_2d(), PROBLEM_2D)
    assert main(["export", str(folder), "--format", "stl"]) == 0
    v, f = read_stl(folder / "design.stl")
    assert is_closed(f)
    assert v[:, 2].min() == pytest.approx(0.0) and v[:, 2].max() == pytest.approx(2.0)
    # 56 elements of 0.25 mm^2 less the corners marching squares cuts, times 2 mm
    assert 0.9 * 28.0 < mesh_volume(v, f) < 28.0


@pytest.mark.parametrize(
    "args",
    [
        ["nowhere", "--format", "stl"],
        ["{folder}", "--format", "vtu", "--smooth", "2"],
        ["{folder}", "--format", "stl", "--smooth", "-1"],
        ["{folder}", "--format", "stl", "--out", "{folder}/design.png"],
    ],
)
def test_export_bad_input(tmp_path, capsys, args):
    folder = results_folder(tmp_path, t_shape_2d(), PROBLEM_2D)
    args = [a.format(folder=folder) for a in args]
    assert main(["export", *args]) == 2
    err = capsys.readouterr().err
    assert err.startswith("buttress: error: ") and err.count("\n") == 1


def test_results_writer_gives_stl_for_3d_only(tmp_path):
    import tomllib

    from topopt.export import WRITERS
    from topopt.problem import problem_from_dict

    p3 = problem_from_dict(tomllib.loads(PROBLEM_3D), source="p3")
    p2 = problem_from_dict(tomllib.loads(PROBLEM_2D), source="p2")
    density = np.zeros((10, 6, 8))
    density[2:8, 1:5, 0:6] = 1.0
    WRITERS["stl"](tmp_path / "a.stl", density, p3)
    assert is_closed(read_stl(tmp_path / "a.stl")[1])
    WRITERS["stl"](tmp_path / "b.stl", t_shape_2d(), p2)
    WRITERS["stl"](tmp_path / "c.stl", np.zeros((10, 6, 8)), p3)  # nothing to mesh
    assert not (tmp_path / "b.stl").exists() and not (tmp_path / "c.stl").exists()
