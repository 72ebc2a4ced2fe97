"""Print-preparation analysis on shapes whose answers are known by hand."""

import math

import numpy as np
import pytest

from topopt.build import (
    BuildReport,
    all_directions,
    analyze_design,
    build_time_hours,
    direction_masks,
    from_build_frame,
    rank_directions,
    report_from_masks,
    to_build_frame,
)


def inclined_plate(angle_deg, *, height=40, thickness=8):
    """2D plate (build frame: axis 0 up) rising from the plate at ``angle_deg``.

    Solid where 0 <= z - tan(angle) * (x - x0) <= thickness (in voxels), z < height;
    its underside is a plane at ``angle_deg`` from the build plate.
    """
    t = math.tan(math.radians(angle_deg))
    x0 = thickness / t + 2
    n = int(x0 + height / t) + 4
    z, x = np.meshgrid(np.arange(height + 4) + 0.5, np.arange(n) + 0.5, indexing="ij")
    offset = z - t * (x - x0)
    return (offset >= 0) & (offset <= thickness) & (z < height), t


@pytest.mark.parametrize("angle, needs", [(30, True), (45, False), (60, False)])
def test_inclined_plate_needs_support_only_below_the_overhang_angle(angle, needs):
    # Common practice (REFERENCES.md): a down-facing surface at least as steep as the
    # overhang angle (45 degrees) prints without support; a shallower one does not.
    plate_b, t = inclined_plate(angle)
    for direction in ("+y", "-y", "+x", "-x"):
        design = from_build_frame(plate_b, direction)
        masks = direction_masks(design, direction=direction, overhang_angle=45.0)
        flagged = int(masks.needs_support.sum())
        assert (flagged > 0) == needs, (direction, flagged)
    if needs:
        # the whole underside needs support, not just the voxels the one-layer rule
        # misses: its footprint on the plate is (height - first layer) / tan(angle)
        underside = (40 - 1) / t
        assert flagged == pytest.approx(underside, rel=0.15)


def test_inclined_plate_3d_same_as_2d():
    # Geometry: extruding the 2D plate sideways must not change which faces need support.
    plate_b, _ = inclined_plate(30, height=24, thickness=6)
    plate3_b = np.repeat(plate_b[:, :, None], 12, axis=2)
    design = from_build_frame(plate3_b, "+z")
    masks = direction_masks(design, direction="+z")
    flagged = to_build_frame(masks.needs_support, "+z")
    # interior slices (away from the side walls) see the 2D answer
    masks2 = direction_masks(plate_b, direction="+x")
    assert np.array_equal(flagged[:, :, 6], to_build_frame(masks2.needs_support, "+x"))


def shelf_design(*, length=20, depth=6, height=10, wall=2):
    """3D wall on the plate with a horizontal shelf at voxel layer ``height`` (+z build)."""
    nx, ny, nz = wall + length + 2, depth, height + 4
    s = np.zeros((nx, ny, nz), dtype=bool)
    s[:wall, :, : height + 1] = True
    s[wall : wall + length, :, height] = True
    return s


def test_horizontal_shelf_support_volume_on_plate():
    # Geometry: a shelf of area A whose underside is H above the plate needs a support
    # column of A x H, times the support fill (within one voxel layer and the one voxel
    # row next to the wall that the 45-degree rule lets print unsupported).
    h, fill = 0.5, 0.2
    length, depth, height = 20, 6, 10
    design = shelf_design(length=length, depth=depth, height=height)
    reports, _, _ = analyze_design(
        design, element_size=h, directions=["+z"], process={"support_fill": fill}
    )
    r = reports[0]
    area = length * depth * h * h
    expected = area * (height * h) * fill
    assert abs(r.support_volume - expected) <= area * h * fill + depth * h * h * height * h * fill
    assert r.support_on_plate_volume == pytest.approx(r.support_volume)
    assert r.support_on_part_volume == 0.0
    assert r.unremovable_support_volume == 0.0
    assert r.overhang_area == pytest.approx(area, abs=depth * h * h)
    assert r.trapped_powder_volume == 0.0 and r.trapped_cavities == 0


def test_shelf_over_a_ledge_stands_on_the_part():
    # Geometry: a column ends on the first solid voxel below it.
    design = shelf_design(length=10, depth=4, height=10)
    design[:, :, :3] = True  # a slab on the plate under the whole shelf
    masks = direction_masks(design, direction="+z")
    assert masks.support.sum() > 0
    assert masks.support_on_plate.sum() == 0
    # the column spans layers 3..9: 7 voxels under each flagged face
    flagged = int(masks.needs_support.sum())
    assert masks.support.sum() == 7 * flagged


def hollow_box(*, outer=14, wall=2, margin=3):
    """Closed box of wall thickness ``wall`` standing on the plate (z = 0) of a +z build.

    Returns the voxels and the interior's index range (a, b) along x and y; along z the
    interior spans (wall, outer - wall).
    """
    n = outer + 2 * margin
    s = np.zeros((n, n, outer + margin), dtype=bool)
    s[margin : margin + outer, margin : margin + outer, :outer] = True
    a, b = margin + wall, margin + outer - wall
    s[a:b, a:b, wall : outer - wall] = False
    return s, (a, b)


def test_closed_hollow_box_traps_its_inner_volume():
    # Geometry: the cavity of a closed box has no path to the outside; it holds
    # (outer - 2 wall)^3 voxels of powder.
    h = 0.5
    design, (a, b) = hollow_box()
    reports, _, _ = analyze_design(design, element_size=h, directions=["+z", "-x"])
    for r in reports:
        assert r.trapped_cavities == 1
        assert r.trapped_powder_volume == pytest.approx((b - a) ** 3 * h**3)
    # the lid spans 10 voxels, so it needs support, and all of it stays inside
    lid = reports[0]
    assert lid.support_volume > 0
    assert lid.unremovable_support_volume == pytest.approx(lid.support_volume)



def test_box_with_wide_hole_traps_nothing_and_diagonal_gap_does_not_drain():
    # Face connectivity (6 in 3D, 4 in 2D): a hole drains; a corner touch does not.
    h = 0.5
    design, (a, b) = hollow_box()
    mid = (a + b) // 2
    design[a - 2 : a, mid - 3 : mid + 3, 4:10] = False  # 3 mm square hole, tool 2 mm
    r = analyze_design(design, element_size=h, directions=["+z"])[0][0]
    assert r.trapped_cavities == 0 and r.trapped_powder_volume == 0.0
    square = np.zeros((8, 8), dtype=bool)
    square[1:7, 1:7] = True
    square[2:6, 2:6] = False
    square[1, 1] = False  # corner of the frame removed: the cavity touches it only diagonally
    r2 = analyze_design(square, element_size=1.0, directions=["+y"], through_holes=False)[0][0]
    assert r2.trapped_cavities == 1
    # a 2D plate's holes go through its thickness by default: nothing is trapped
    assert analyze_design(square, element_size=1.0, directions=["+y"])[0][0].trapped_cavities == 0


def test_shelf_inside_box_has_unremovable_support():
    # Tool access: support inside a closed cavity, or behind an opening narrower than
    # the tool, cannot be removed; behind a wide opening it can.
    h = 0.5
    design, (a, b) = hollow_box(outer=16)
    design[a : a + 6, a:b, 8] = True  # shelf sticking out of the -x wall, 6 layers up
    closed = analyze_design(design, element_size=h, directions=["+z"])[0][0]
    assert closed.support_volume > 0
    assert closed.unremovable_support_volume == pytest.approx(closed.support_volume)

    narrow = design.copy()
    mid = (a + b) // 2
    narrow[b : b + 2, mid - 1 : mid + 1, 2:6] = False  # 1 mm slot, tool 2 mm
    r = analyze_design(narrow, element_size=h, directions=["+z"])[0][0]
    assert r.trapped_cavities == 0  # powder drains through the slot ...
    assert r.unremovable_support_volume == pytest.approx(r.support_volume)  # ... tools do not

    wide = design.copy()
    wide[b : b + 2, a:b, 2:10] = False  # 4 mm tall opening across the +x wall
    r = analyze_design(wide, element_size=h, directions=["+z"])[0][0]
    assert r.unremovable_support_volume == 0.0


def sphere_on_plate(n, margin=2):
    """Sphere of diameter 1 resolved by n voxels, resting on the plate (z = 0)."""
    h = 1.0 / n
    size = n + 2 * margin
    xy = (np.arange(size) + 0.5) * h
    z = (np.arange(n + 1) + 0.5) * h
    X, Y, Z = np.meshgrid(xy, xy, z, indexing="ij")
    c = margin * h + 0.5
    return (X - c) ** 2 + (Y - c) ** 2 + (Z - 0.5) ** 2 < 0.25, h


def test_sphere_overhang_area_converges_to_the_cap_footprint():
    # Geometry: the lower cap of a sphere of radius r tilted less than 45 degrees from
    # the plate needs support; measured on voxel faces its area is the cap's footprint
    # pi (r sin 45)^2. Measured when this test was written: 0.56, 0.84, 0.92 of it at
    # 20, 40, 80 voxels across (slopes just under 45 degrees are missed: a staircase
    # of 44 degrees differs from 45 by one voxel only every 28 layers).
    footprint = math.pi * (0.5 * math.sin(math.pi / 4)) ** 2
    errors = []
    for n in (20, 40, 80):
        design, h = sphere_on_plate(n)
        masks = direction_masks(design, direction="+z", element_size=h, tool_access=0.1)
        errors.append(abs(masks.needs_support.sum() * h * h - footprint) / footprint)
    assert errors[0] > errors[1] > errors[2]
    assert errors[2] < 0.1


def test_sphere_voxel_volume_within_one_percent():
    # Geometry: 4/3 pi r^3 at 40 voxels across (voxel centres inside the sphere).
    design, h = sphere_on_plate(40)
    assert design.sum() * h**3 == pytest.approx(math.pi / 6, rel=0.01)


def test_build_time_and_cost_of_a_box_by_hand():
    # Baumers et al., Technological Forecasting and Social Change 102:193-201, 2016:
    # T = layers * recoat + V_part / rate_part + V_support / rate_support + overhead.
    # 10 x 10 x 10 mm cube, 0.05 mm layers -> 200 layers x 9 s = 0.5 h; 1000 mm^3 at
    # 500 mm^3/h = 2 h; no support; 1.5 h overhead: 4.0 h. Mass 1000 x 0.004 = 4 g at
    # 0.25 per g = 1.0.
    design = np.zeros((12, 12, 12), dtype=bool)
    design[1:11, 1:11, :10] = True
    process = {
        "layer_thickness": 0.05,
        "recoat_time_s": 9.0,
        "part_rate": 500.0,
        "support_rate": 1000.0,
        "overhead_h": 1.5,
        "powder_price": 0.25,
    }
    r = analyze_design(
        design, element_size=1.0, directions=["+z"], process=process, mass_density=0.004
    )[0][0]
    assert r.build_height == 10.0 and r.layers == 200
    assert r.part_volume == 1000.0 and r.part_mass == pytest.approx(4.0)
    assert r.support_volume == 0.0
    assert r.build_time_h == pytest.approx(4.0)
    assert r.material_cost == pytest.approx(1.0)
    assert build_time_hours(
        layers=100, part_volume=0.0, support_volume=300.0, recoat_time_s=36.0,
        support_rate=100.0, overhead_h=0.0,
    ) == pytest.approx(4.0)


def test_directions_rank_by_weights():
    # Identity: a long bar lying down builds in fewer layers; with only time weighted
    # the lying directions win; the score is the weighted mean of normalised terms.
    bar = np.zeros((4, 4, 30), dtype=bool)
    bar[:, :, :] = True
    reports, best, _ = analyze_design(
        bar, element_size=1.0, weights={"time": 1, "cost": 0, "support": 0}
    )
    assert [r.direction for r in reports] == list(all_directions(3))
    assert best in ("+x", "-x", "+y", "-y")
    upright = next(r for r in reports if r.direction == "+z")
    assert upright.score == pytest.approx(1.0)
    assert all(0.0 <= r.score <= 1.0 for r in reports)
    # no mass density: cost is NaN and drops out instead of poisoning the score
    assert math.isnan(upright.material_cost)


def test_rank_directions_normalises_each_term():
    base = BuildReport("+x", 45, 1, 1, 1, 1, 0, 0, 0, 10.0, 0, 0, 0, 0, 0, 2.0, 1.0)
    other = BuildReport("-x", 45, 1, 1, 1, 1, 0, 0, 0, 0.0, 0, 0, 0, 0, 0, 4.0, 1.0)
    ranked, best = rank_directions([base, other], weights={"time": 1, "support": 1, "cost": 0})
    # +x: (2/4 + 10/10) / 2 = 0.75; -x: (4/4 + 0) / 2 = 0.5
    assert [r.score for r in ranked] == pytest.approx([0.75, 0.5])
    assert best == "-x"


def test_report_fields_follow_the_contract():
    design = np.ones((3, 3), dtype=bool)
    masks = direction_masks(design, direction="+y")
    data = report_from_masks(masks, direction="+y", overhang_angle=45.0, element_size=1.0).as_dict()
    for key in ("direction", "overhang_angle", "build_height", "layers", "part_volume",
                "part_mass", "overhang_area", "support_volume", "support_on_plate_volume",
                "support_on_part_volume", "unremovable_support_volume",
                "trapped_powder_volume", "trapped_cavities", "build_time_h", "material_cost",
                "score"):
        assert key in data


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"directions": ["+w"]}, "direction"),
        ({"directions": ["+z"]}, "direction"),  # a 2D design has no z
        ({"element_size": -1.0}, "element_size"),
        ({"process": {"recoat": 1.0}}, "recoat"),
        ({"process": {"support_fill": 2.0}}, "support_fill"),
        ({"weights": {"speed": 1.0}}, "speed"),
        ({"overhang_angle": 95.0}, "overhang_angle"),
    ],
)
def test_bad_arguments_name_themselves(kwargs, match):
    design = np.ones((4, 4), dtype=bool)
    args = {"element_size": 1.0, **kwargs}
    with pytest.raises(ValueError, match=match):
        analyze_design(design, **args)


def test_empty_design_is_rejected():
    with pytest.raises(ValueError, match="no solid"):
        analyze_design(np.zeros((4, 4)), element_size=1.0)


@pytest.mark.parametrize("shape", [(30, 24), (14, 12, 10)])
def test_what_the_layer_rule_prints_needs_no_support(shape):
    # Identity with the 45-degree layer rule (Langelaar, SMO 55:871-883, 2017;
    # Additive Manufacturing 12:60-70, 2016): a design every element of which rests on
    # its support region needs no support. filters.printability.printable_part keeps
    # exactly such elements of a random design.
    from filters.printability import printable_part

    rng = np.random.default_rng(4)
    design = rng.random(shape) > 0.35
    direction = "+y" if len(shape) == 2 else "-z"
    printable = printable_part(design, direction=direction, overhang_angle=45.0)
    assert printable.sum() > 0.2 * design.size
    reports, _, _ = analyze_design(printable, element_size=1.0, directions=[direction])
    assert reports[0].overhang_area == 0.0 and reports[0].support_volume == 0.0


def test_diamond_hole_prints_round_hole_needs_support():
    # Common practice: a hole whose roof rises at 45 degrees to a peak (diamond or
    # teardrop) prints without support; the flat-ish crown of a round hole does not.
    n = 40
    z, x = np.meshgrid(np.arange(n) + 0.5, np.arange(n) + 0.5, indexing="ij")
    diamond = np.abs(x - 20) + np.abs(z - 20) > 10  # build frame: axis 0 up
    round_hole = np.hypot(x - 20, z - 20) > 10
    for plate, needs in ((diamond, False), (round_hole, True)):
        masks = direction_masks(from_build_frame(plate, "+y"), direction="+y")
        assert (masks.needs_support.sum() > 0) == needs
