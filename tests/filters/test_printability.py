"""Tests of the layer-wise printability filter and its exact logical helpers.

Sources: the filter is Langelaar's layer-wise AM filter (2D: SMO 55:871-883, 2017;
3D: Additive Manufacturing 12:60-70, 2016). Its defining property, used below, is that
for 0/1 inputs it reproduces the part that a layer-by-layer print would build, up to
the smoothing of smin/smax. The reference sweep in this file is written independently
of the module (element loops over explicit coordinates, no axis moving).
"""

from __future__ import annotations

import math
from itertools import product

import numpy as np
import pytest

from filters.printability import (
    DIRECTIONS,
    enforced_overhang_angle,
    overhang_area,
    printability_filter,
    printable_part,
    support_stencil,
    supported_mask,
    unsupported_count,
)

# angle -> (lateral reach in one layer, layers of column under a side neighbour), as
# stated in the module docstring: tan(angle) = 1/reach or = rise.
ATAN_HALF = math.degrees(math.atan(0.5))  # 26.565...
ATAN_TWO = math.degrees(math.atan(2.0))  # 63.434...
RULES = {ATAN_HALF: (2, 1), 45.0: (1, 1), ATAN_TWO: (1, 2)}
REPRESENTABLE_ANGLES = tuple(RULES)

# Smoothing tolerances for 0/1 inputs with the default epsilon = 1e-4, P = 40, xi0 = 0.5.
# Printed elements: smin(1, 1) = 1 exactly, but smax of Ns ones is Ns**(1/Q) > 1 and
# smin(1, b) for b slightly above 1 gives up to about 1 + sqrt(eps)/2; measured at most
# 0.0047 off 1, so 0.01.
# Not printed elements: smin(1, 0) = sqrt(eps)/2 - eps/4 ~ 0.005, and along a tall
# unsupported column the error grows layer by layer up to the fixed point of
# a -> smin(1, Ns**(1/Q) * a**(P/Q)): 0.059 for Ns = 3, 0.032 for Ns = 5, 0.017 for
# Ns = 13 (computed); the two-layer column rule adds a little, so we allow 0.1.
TOL_PRINTED = 0.01
TOL_REMOVED = 0.1


def reference_printable(solid: np.ndarray, direction: str, angle: float) -> np.ndarray:
    """Plain element-by-element layer sweep of the rule in the module docstring."""
    reach, rise = RULES[angle]
    ndim = solid.ndim
    axis = "xyz".index(direction[1])
    plus = direction[0] == "+"
    n = solid.shape[axis]
    lateral = [a for a in range(ndim) if a != axis]

    def layer(idx):
        return idx[axis] if plus else n - 1 - idx[axis]

    def move(idx, down, side):
        j = list(idx)
        j[axis] += -down if plus else down
        for ax, s in zip(lateral, side, strict=True):
            j[ax] += s
        return tuple(j)

    def inside(idx):
        return all(0 <= i < m for i, m in zip(idx, solid.shape, strict=True))

    sides = [
        s
        for s in product(range(-reach, reach + 1), repeat=len(lateral))
        if sum(abs(v) for v in s) <= reach
    ]
    printed = np.zeros(solid.shape, dtype=bool)
    for idx in sorted(np.ndindex(solid.shape), key=layer):
        if not solid[idx]:
            continue
        if layer(idx) == 0:
            printed[idx] = True
            continue
        for side in sides:
            j = move(idx, 1, side)
            if not inside(j):
                continue
            if rise == 1 or not any(side):
                ok = printed[j]
            else:
                depth = min(rise, layer(idx))  # layers under the plate count as solid
                ok = all(printed[move(idx, k, side)] for k in range(1, depth + 1))
            if ok:
                printed[idx] = True
                break
    return printed


CASES_01 = [((9, 7), seed) for seed in range(8)] + [((5, 4, 6), seed) for seed in range(5)]


@pytest.mark.parametrize("angle", sorted(RULES))
@pytest.mark.parametrize("shape,seed", CASES_01)
def test_binary_inputs_match_plain_layer_sweep(shape, seed, angle):
    # Langelaar 2016/2017: for 0/1 blueprints the filter returns the printable part.
    rng = np.random.default_rng(seed)
    for fill in (0.55, 0.8):
        solid = rng.random(shape) < fill
        for direction in DIRECTIONS[len(shape)]:
            expected = reference_printable(solid, direction, angle)
            exact = printable_part(solid, direction=direction, overhang_angle=angle)
            np.testing.assert_array_equal(exact, expected)
            f = printability_filter(shape, direction=direction, overhang_angle=angle)
            y = f.forward(solid.astype(float))
            np.testing.assert_array_equal(y > 0.5, expected)
            if expected.any():
                assert np.abs(y[expected] - 1.0).max() <= TOL_PRINTED
            if (~expected).any():
                assert np.abs(y[~expected]).max() <= TOL_REMOVED


def test_tall_floating_block_error_stays_at_fixed_point():
    # The accumulated smoothing error along an unsupported column is bounded (see the
    # tolerance comment); a 200-layer block floating one layer above the plate.
    solid = np.zeros((7, 200))
    solid[:, 1:] = 1.0
    y = printability_filter(solid.shape, direction="+y").forward(solid)
    assert y.max() <= TOL_REMOVED
    assert not printable_part(solid, direction="+y").any()


def _self_supporting_2d() -> np.ndarray:
    """A +y design (x, y) = (12, 10): base, a column, 45 degree arms, a 45 degree arch."""
    d = np.zeros((12, 10), dtype=bool)
    d[2:10, 0] = True  # base on the plate
    d[5:7, :] = True  # column
    for k in range(1, 5):  # arms leaning out one element per layer
        d[5 - k, 4 + k] = True
        d[6 + k, 4 + k] = True
    return d


def _oriented(design: np.ndarray, direction: str) -> np.ndarray:
    """Rotate a +y (2D) or +z (3D) design so that it is built along ``direction``."""
    up = design.ndim - 1
    axis = "xyz".index(direction[1])
    out = np.moveaxis(design, up, axis) if axis != up else design
    return np.flip(out, axis) if direction[0] == "-" else out


@pytest.mark.parametrize("direction", DIRECTIONS[2])
def test_self_supporting_design_passes_unchanged_2d(direction):
    design = _oriented(_self_supporting_2d(), direction)
    # the lean is exactly 45 degrees, so every representable angle up to 45 accepts it
    for angle in (26.57, 45.0):
        assert unsupported_count(design, direction=direction, overhang_angle=angle) == 0
        np.testing.assert_array_equal(
            printable_part(design, direction=direction, overhang_angle=angle), design
        )
        y = printability_filter(design.shape, direction=direction, overhang_angle=angle).forward(
            design.astype(float)
        )
        assert np.abs(y - design).max() <= TOL_PRINTED
    # ... and the 63.43 degree rule rejects the 45 degree arms (the check can fail)
    assert unsupported_count(design, direction=direction, overhang_angle=ATAN_TWO) > 0


@pytest.mark.parametrize("direction", DIRECTIONS[3])
def test_self_supporting_design_passes_unchanged_3d(direction):
    # an upside-down stepped diamond: layer k holds |i - 4| + |j - 4| <= k + 1
    i, j = np.meshgrid(np.arange(9), np.arange(9), indexing="ij")
    d = np.stack([np.abs(i - 4) + np.abs(j - 4) <= k + 1 for k in range(4)], axis=2)
    design = _oriented(d, direction)
    assert unsupported_count(design, direction=direction) == 0
    y = printability_filter(design.shape, direction=direction).forward(design.astype(float))
    assert np.abs(y - design).max() <= TOL_PRINTED
    # a square growing one element per layer on every side leans out at 45 degrees
    # along the axes but more along the diagonals: its new corners are unsupported
    square = np.stack([(np.abs(i - 4) <= k) & (np.abs(j - 4) <= k) for k in range(4)], axis=2)
    square = _oriented(square, direction)
    assert unsupported_count(square, direction=direction) == 4 * 3


@pytest.mark.parametrize("shape", [(8, 9), (6, 5, 7)])
def test_floating_design_is_removed(shape):
    design = np.zeros(shape, dtype=bool)
    design[(slice(1, -1),) * len(shape)] = True  # a block that never touches a face
    for direction in DIRECTIONS[len(shape)]:
        y = printability_filter(shape, direction=direction).forward(design.astype(float))
        assert y.max() <= TOL_REMOVED
        assert not printable_part(design, direction=direction).any()
        assert unsupported_count(design, direction=direction) > 0


def test_wall_slope_decides_printability_per_angle():
    # common practice (geometry of the voxel rules): a wall stepping sideways s elements
    # every r layers makes an angle atan(r / s) with the plate.
    def wall(step, every, height=12):
        d = np.zeros((3 * height, height), dtype=bool)
        for j in range(height):
            d[(j // every) * step, j] = True
        return d

    def prints(d, angle):
        return printable_part(d, direction="+y", overhang_angle=angle).sum() == d.sum()

    assert prints(wall(2, 1), 26.57) and not prints(wall(3, 1), 26.57)
    assert prints(wall(1, 1), 45.0) and not prints(wall(2, 1), 45.0)
    assert prints(wall(1, 2), 63.43) and not prints(wall(1, 1), 63.43)


def test_column_rule_does_not_bridge_a_powder_gap():
    # 63.43 deg: a side neighbour two layers down does not support across an empty layer
    d = np.zeros((4, 4), dtype=bool)
    d[1, 0] = True
    d[1, 1] = True
    d[2, 3] = True  # diagonal from (1, 1) with an empty layer y = 2 between
    assert not printable_part(d, direction="+y", overhang_angle=ATAN_TWO)[2, 3]


def test_extruded_3d_design_matches_2d():
    # identity: a design constant along z built along +y behaves as its 2D section
    rng = np.random.default_rng(3)
    section = rng.random((10, 8)) < 0.7
    solid3 = np.repeat(section[:, :, None], 4, axis=2)
    for angle in REPRESENTABLE_ANGLES:
        p2 = printable_part(section, direction="+y", overhang_angle=angle)
        p3 = printable_part(solid3, direction="+y", overhang_angle=angle)
        np.testing.assert_array_equal(p3, np.repeat(p2[:, :, None], 4, axis=2))


@pytest.mark.parametrize("seed", range(5))
def test_unsupported_count_zero_iff_design_prints(seed):
    rng = np.random.default_rng(seed)
    for shape in ((8, 6), (4, 5, 6)):
        solid = rng.random(shape) < 0.75
        for direction in DIRECTIONS[len(shape)]:
            for angle in REPRESENTABLE_ANGLES:
                part = printable_part(solid, direction=direction, overhang_angle=angle)
                # the printed part has no unsupported element, and it is a subset
                assert unsupported_count(part, direction=direction, overhang_angle=angle) == 0
                assert not (part & ~solid).any()
                same = np.array_equal(part, solid)
                count = unsupported_count(solid, direction=direction, overhang_angle=angle)
                assert (count == 0) == same
                mask = supported_mask(solid, direction=direction, overhang_angle=angle)
                assert count == np.count_nonzero(solid & ~mask)


def test_unsupported_count_reads_density_at_half():
    density = np.array([[0.9, 0.4, 0.6]])  # y = 2 element floats over a 0.4 element
    assert unsupported_count(density, direction="+y") == 1
    assert unsupported_count(np.array([[0.9, 0.6, 0.6]]), direction="+y") == 0


def test_overhang_area_units():
    d = np.zeros((6, 3), dtype=bool)
    d[:, 0] = True
    d[:, 2] = True  # a ledge of 6 elements over a powder layer: all unsupported
    assert overhang_area(d, direction="+y", element_size=0.5, thickness=2.0) == 6 * 0.5 * 2.0
    d3 = np.zeros((3, 3, 3), dtype=bool)
    d3[:, :, 2] = True
    assert overhang_area(d3, direction="+z", element_size=2.0) == 9 * 4.0


def _fd_check(shape, direction, angle, x, seed, keep=None):
    rng = np.random.default_rng(seed)
    f = printability_filter(shape, direction=direction, overhang_angle=angle, keep=keep)
    w = rng.standard_normal(shape)
    f.forward(x)
    grad = f.backward(w).ravel()
    h = 1e-6
    fd = np.empty(x.size)
    for i in range(x.size):
        e = np.zeros(x.size)
        e[i] = h
        e = e.reshape(shape)
        fd[i] = (np.sum(w * f.forward(x + e)) - np.sum(w * f.forward(x - e))) / (2 * h)
    return np.linalg.norm(grad - fd) / np.linalg.norm(fd)


@pytest.mark.parametrize("angle", [45.0, ATAN_TWO, ATAN_HALF])
@pytest.mark.parametrize("shape", [(6, 5), (4, 3, 5)])
def test_backward_matches_central_differences(shape, angle):
    # common practice: adjoint against central finite differences, h = 1e-6
    rng = np.random.default_rng(11)
    for direction in DIRECTIONS[len(shape)]:
        for x in (rng.uniform(0.05, 1.0, shape), rng.uniform(0.6, 1.0, shape)):
            err = _fd_check(shape, direction, angle, x, seed=5)
            assert err < 1e-5, (direction, err)


@pytest.mark.parametrize("shape", [(6, 5), (4, 3, 5)])
def test_backward_with_keep_in_matches_central_differences(shape):
    # common practice: adjoint against central finite differences with keep-in elements
    rng = np.random.default_rng(3)
    keep = rng.uniform(size=shape) < 0.2
    for direction in DIRECTIONS[len(shape)]:
        x = rng.uniform(0.05, 1.0, shape)
        assert _fd_check(shape, direction, 45.0, x, seed=2, keep=keep) < 1e-5, direction


def test_keep_in_prints_and_supports_what_is_above():
    # a keep-in element floating over powder prints as given and holds up the element
    # resting on it (build preparation supports it); without keep it and its load fade
    x = np.zeros((3, 5))
    x[1, 3] = x[1, 4] = 1.0                      # column of two, floating at y = 3..4
    keep = np.zeros((3, 5), dtype=bool)
    keep[1, 3] = True
    printed = printability_filter((3, 5), direction="+y", keep=keep).forward(x)
    assert printed[1, 3] == 1.0 and printed[1, 4] > 0.99
    faded = printability_filter((3, 5), direction="+y").forward(x)
    assert faded[1, 3] < 0.1 and faded[1, 4] < 0.1


def test_keep_must_match_shape():
    with pytest.raises(ValueError, match="keep"):
        printability_filter((3, 5), direction="+y", keep=np.zeros((5, 3), dtype=bool))


def test_backward_needs_forward_and_matching_shape():
    f = printability_filter((4, 3), direction="+x")
    with pytest.raises(ValueError, match="forward"):
        f.backward(np.ones((4, 3)))
    f.forward(np.full((4, 3), 0.5))
    with pytest.raises(ValueError, match="dy"):
        f.backward(np.ones((3, 4)))
    with pytest.raises(ValueError, match="x must have shape"):
        f.forward(np.ones(12))


def test_enforced_angles_on_the_axes_are_the_grid_rules():
    # the rules of the papers (Langelaar 2016/2017) come out of the cone stencil
    assert enforced_overhang_angle(45, "+y", 2) == 45.0
    assert support_stencil("+y", 45.0, 2).size == 3
    assert support_stencil("+z", 45.0, 3).size == 5
    assert math.isclose(enforced_overhang_angle(ATAN_HALF, "+y", 2), ATAN_HALF)
    assert math.isclose(enforced_overhang_angle(ATAN_TWO, "+y", 2), ATAN_TWO)


DIRECTION_VECTORS = {2: ([0.0, 1.0], [1.0, 1.0], [1.0, 2.0], [-3.0, 1.0]),
                     3: ([0.0, 0.0, 1.0], [0.0, 1.0, 1.0], [1.0, 1.0, 1.0], [0.3, 0.5, 0.8])}


@pytest.mark.parametrize("ndim", [2, 3])
@pytest.mark.parametrize("angle", [20.0, 30.0, 35.0, 45.0, 50.0, 55.0, 63.0, 70.0])
def test_enforced_angle_is_never_shallower_and_within_three_degrees(ndim, angle):
    # requirement of the build-orientation work (common practice for the tolerance):
    # the shallowest overhang the stencil accepts lies in [angle, angle + 3]
    for d in DIRECTION_VECTORS[ndim]:
        s = support_stencil(d, angle, ndim)
        assert angle - 1e-9 <= s.enforced_angle <= angle + 3.0, (d, s.enforced_angle)
        assert s.steepest_angle >= s.enforced_angle
        # every strut foot lies in the cone of half-angle 90 - angle below the element
        o = s.offsets.astype(float)
        depth = -(o @ s.direction)
        assert np.all(depth > 0)
        cos_half = math.cos(math.radians(90.0 - angle))
        assert np.all(depth >= np.linalg.norm(o, axis=1) * cos_half - 1e-9)


@pytest.mark.parametrize("bad", [19.9, 70.1, 80.0, float("nan"), float("inf"), -45.0])
def test_angle_outside_range_is_rejected(bad):
    with pytest.raises(ValueError, match="overhang_angle must be between 20 and 70"):
        enforced_overhang_angle(bad)
    with pytest.raises(ValueError, match="overhang_angle"):
        printability_filter((4, 4), direction="+y", overhang_angle=bad)
    with pytest.raises(ValueError, match="overhang_angle"):
        printable_part(np.ones((4, 4), bool), direction="+y", overhang_angle=bad)


@pytest.mark.parametrize("bad", [[0.0, 0.0], [1.0, 0.0, 0.0], [float("nan"), 1.0], "up", [True, 1.0]])
def test_bad_direction_vector_is_rejected(bad):
    with pytest.raises(ValueError, match="direction"):
        printability_filter((4, 4), direction=bad)


@pytest.mark.parametrize("name,vector", [("+y", [0.0, 2.5]), ("-x", [-1.0, 0.0])])
def test_axis_given_as_vector_equals_its_name_2d(name, vector):
    rng = np.random.default_rng(3)
    x = rng.random((9, 8))
    for angle in (30.0, 45.0, 60.0):
        a = printability_filter(x.shape, direction=name, overhang_angle=angle)
        b = printability_filter(x.shape, direction=vector, overhang_angle=angle)
        np.testing.assert_allclose(a.forward(x), b.forward(x), rtol=0, atol=1e-10)
        dy = rng.random(x.shape)
        np.testing.assert_allclose(a.backward(dy), b.backward(dy), rtol=0, atol=1e-10)


def test_axis_given_as_vector_equals_its_name_3d():
    rng = np.random.default_rng(4)
    x = rng.random((5, 6, 7))
    a = printability_filter(x.shape, direction="-z", overhang_angle=40.0)
    b = printability_filter(x.shape, direction=[0.0, 0.0, -3.0], overhang_angle=40.0)
    np.testing.assert_allclose(a.forward(x), b.forward(x), rtol=0, atol=1e-10)


def _central_differences(f, x, dy, h=1e-6):
    g = np.zeros_like(x)
    for idx in np.ndindex(x.shape):
        xp, xm = x.copy(), x.copy()
        xp[idx] += h
        xm[idx] -= h
        g[idx] = (np.sum(f.forward(xp) * dy) - np.sum(f.forward(xm) * dy)) / (2 * h)
    return g


@pytest.mark.parametrize("shape,direction,angle", [
    ((7, 6), [1.0, 1.0], 45.0),
    ((7, 6), [1.0, 2.0], 35.0),
    ((6, 7), [-0.4, 1.0], 60.0),
    ((4, 5, 4), [0.0, 1.0, 1.0], 45.0),
    ((4, 4, 5), [0.3, 0.5, 0.8], 55.0),
])
def test_tilted_backward_matches_central_differences(shape, direction, angle):
    # exact identity: the adjoint sweep is the transpose of the forward Jacobian
    rng = np.random.default_rng(11)
    x = 0.2 + 0.6 * rng.random(shape)
    dy = rng.standard_normal(shape)
    f = printability_filter(shape, direction=direction, overhang_angle=angle)
    f.forward(x)
    g = f.backward(dy)
    fd = _central_differences(f, x, dy)
    np.testing.assert_allclose(g, fd, rtol=1e-5, atol=1e-7)


def test_hold_mode_gradients_match_central_differences():
    # keep-in elements held by the design: output passes the input, keep_printed is the
    # swept value; both gradients against central differences
    rng = np.random.default_rng(5)
    shape = (7, 7)
    keep = np.zeros(shape, bool)
    keep[3, 4:6] = True
    x = 0.2 + 0.6 * rng.random(shape)
    x[keep] = 1.0
    f = printability_filter(shape, direction=[0.3, 1.0], overhang_angle=45.0, keep=keep,
                            keep_mode="hold")
    y = f.forward(x)
    np.testing.assert_array_equal(y[keep], x[keep])
    dy = rng.standard_normal(shape)
    np.testing.assert_allclose(f.backward(dy), _central_differences(f, x, dy), rtol=1e-5,
                               atol=1e-7)
    w = rng.random(int(keep.sum()))
    f.forward(x)
    g = f.keep_printed_backward(w)
    fd = np.zeros(shape)
    for idx in np.ndindex(shape):
        xp, xm = x.copy(), x.copy()
        xp[idx] += 1e-6
        xm[idx] -= 1e-6
        f.forward(xp)
        up = float(w @ f.keep_printed())
        f.forward(xm)
        down = float(w @ f.keep_printed())
        fd[idx] = (up - down) / 2e-6
    np.testing.assert_allclose(g, fd, rtol=1e-5, atol=1e-7)


def _half_space(d, theta, lean, n):
    """Digital half-space: solid above a plane at theta degrees to the plate, its
    overhang leaning towards the lateral unit vector ``lean``; plus a floor slab."""
    nd = len(d)
    g = np.meshgrid(*[np.arange(n) + 0.5] * nd, indexing="ij")
    c = np.stack(g, -1) - n / 2
    t = math.radians(theta)
    inward = math.cos(t) * d - math.sin(t) * lean
    solid = ((c @ inward) >= 0.0) | ((c @ d) <= -0.3 * n)
    core = (np.linalg.norm(c, axis=-1) < 0.3 * n) & ((c @ d) > -0.3 * n + 1) & solid
    return solid, core


@pytest.mark.parametrize("d,angle", [([1.0, 1.0], 55.0), ([1.0, 2.0], 45.0), ([0.0, 1.0], 30.0)])
def test_tilted_half_space_prints_iff_steep_enough_2d(d, angle):
    # a plane overhang 4 degrees steeper than asked prints, one 4 degrees shallower does
    # not (common practice: the overhang-angle rule of powder-bed fusion)
    d = np.array(d) / np.linalg.norm(d)
    n = 48
    offset = float(n / 2 * np.abs(d).sum() - 0.3 * n)  # plate under the floor slab's top
    for lean in (np.array([-d[1], d[0]]), np.array([d[1], -d[0]])):
        for theta, expected in ((angle + 4.0, True), (angle - 4.0, False)):
            solid, core = _half_space(d, theta, lean, n)
            pp = printable_part(solid, direction=list(d), overhang_angle=angle,
                                plate_offset=offset)
            assert bool(np.all(pp[core])) is expected, (theta, lean)


@pytest.mark.parametrize("bad", ["45", True, None])
def test_angle_of_wrong_type_is_rejected(bad):
    with pytest.raises(TypeError, match="overhang_angle"):
        enforced_overhang_angle(bad)


@pytest.mark.parametrize(
    "kwargs,match",
    [
        ({"shape": (4, 4), "direction": "+z"}, "direction"),
        ({"shape": (4, 4), "direction": "none"}, "direction"),
        ({"shape": (4, 4, 4), "direction": "up"}, "direction"),
        ({"shape": (4,), "direction": "+x"}, "shape"),
        ({"shape": (4, 0), "direction": "+x"}, "shape"),
        ({"shape": (4, 4), "direction": "+x", "epsilon": 0.0}, "epsilon"),
        ({"shape": (4, 4), "direction": "+x", "xi0": 1.0}, "xi0"),
        ({"shape": (4, 4), "direction": "+x", "p": -1.0}, "p"),
        ({"shape": (4, 4, 4), "direction": "+x", "p": 1.0, "overhang_angle": 26.57}, "p"),
    ],
)
def test_bad_arguments_raise(kwargs, match):
    with pytest.raises(ValueError, match=match):
        printability_filter(**kwargs)


def test_negative_input_is_rejected():
    f = printability_filter((3, 3), direction="+y")
    with pytest.raises(ValueError, match="non-negative"):
        f.forward(np.full((3, 3), -0.1))


def test_filter_meets_the_protocol():
    from filters.chain import Filter, FilterChain

    f = printability_filter((5, 4), direction="-y")
    assert isinstance(f, Filter)
    x = np.random.default_rng(2).random((5, 4))
    np.testing.assert_array_equal(FilterChain([f]).forward(x), f.forward(x))


@pytest.mark.parametrize("mode", ["print", "hold"])
@pytest.mark.parametrize(("shape", "direction", "angle"), [((30, 20), [1.0, 2.0], 35.0),
                                                           ((10, 8, 7), [0.3, 0.5, 0.8], 55.0),
                                                           ((12, 9), "+y", 45.0)])
def test_backward_is_the_same_with_or_without_the_kept_ratios(monkeypatch, shape, direction,
                                                              angle, mode):
    # The forward keeps the smin ratios and strut values for the backward when they fit
    # in printability._KEPT_LIMIT, else the backward folds the struts again: both must
    # give the same numbers (the same operations). Internal consistency, common practice.
    from filters import printability

    rng = np.random.default_rng(12)
    keep = rng.random(shape) < 0.05
    kwargs = dict(direction=direction, overhang_angle=angle, keep=keep, keep_mode=mode)
    kept = printability_filter(shape, **kwargs)
    monkeypatch.setattr(printability, "_KEPT_LIMIT", 0)
    refold = printability_filter(shape, **kwargs)
    assert kept._smooth.keep and not refold._smooth.keep
    x1 = rng.uniform(0.0, 1.2, shape)  # above 1 too: no power may overflow
    x1[rng.random(shape) < 0.2] = 0.0
    x2 = rng.uniform(0.0, 1.0, shape)
    dy = rng.standard_normal(shape)
    kept.forward(x1)  # the kept numbers must follow the last forward
    np.testing.assert_array_equal(kept.forward(x2), refold.forward(x2))
    np.testing.assert_array_equal(kept.backward(dy), refold.backward(dy))
    kept.forward(x1)
    refold.forward(x1)
    np.testing.assert_array_equal(kept.backward(dy), refold.backward(dy))
    if mode == "hold":
        w = rng.random(int(keep.sum()))
        np.testing.assert_array_equal(kept.keep_printed_backward(w),
                                      refold.keep_printed_backward(w))
    assert np.all(np.isfinite(kept.backward(dy)))
