"""Tests of the minimum member / gap measurement on shapes of known width."""

import numpy as np
import pytest

from topopt.lengthscale import minimum_member_size


@pytest.mark.parametrize("width", [1, 2, 3, 4, 5, 7, 8])
def test_axis_aligned_bar_2d(width):
    # a straight bar of w elements has a smallest member of exactly w elements
    # (definition of the opening test; common practice)
    rho = np.zeros((40, 30))
    rho[:, 10 : 10 + width] = 1.0
    out = minimum_member_size(rho, element_size=0.25)
    assert out["solid"] == pytest.approx(width * 0.25)
    # the gap between two bars (the left one mirrored at the edge: 12 wide)
    rho = np.zeros((40, 30))
    rho[:, 0:6] = 1.0
    rho[:, 6 + width : 12 + width] = 1.0
    out = minimum_member_size(rho, element_size=1.0)
    assert out["void"] == pytest.approx(width)
    assert out["solid"] == pytest.approx(6.0)


@pytest.mark.parametrize("width", [2, 3, 5, 6])
def test_oblique_bar_within_one_element(width):
    # a 45-degree band of perpendicular width w: pixelation changes it by up to one element
    i, j = np.meshgrid(np.arange(60) + 0.5, np.arange(60) + 0.5, indexing="ij")
    rho = (np.abs(i - j) / np.sqrt(2.0) <= width / 2.0).astype(float)
    out = minimum_member_size(rho, element_size=1.0)
    assert abs(out["solid"] - width) <= 1.0


@pytest.mark.parametrize("width", [2, 3, 4])
def test_plate_3d(width):
    rho = np.zeros((12, 12, 16))
    rho[:, :, 5 : 5 + width] = 1.0
    out = minimum_member_size(rho, element_size=2.0)
    assert out["solid"] == pytest.approx(2.0 * width)


def test_sharp_corner_counts_as_thin_with_an_empty_outside():
    # a rectangle ending at the domain edge has square corners when the outside is void;
    # a digital disk wider than 3 elements does not reach into a 90-degree corner
    rho = np.zeros((40, 30))
    rho[:, 10:18] = 1.0
    assert minimum_member_size(rho, element_size=1.0, boundary="mirror")["solid"] == 8.0
    assert minimum_member_size(rho, element_size=1.0, boundary="void")["solid"] == 3.0


def test_the_thinnest_of_several_members_counts():
    rho = np.zeros((40, 40))
    rho[:, 2:8] = 1.0  # 6 wide
    rho[:, 20:23] = 1.0  # 3 wide
    rho[5:9, :] = 1.0  # 4 wide, crossing both
    assert minimum_member_size(rho, element_size=1.0)["solid"] == pytest.approx(3.0)


def test_level_and_grey_values():
    rho = np.zeros((30, 30))
    rho[:, 10:14] = 0.7
    assert minimum_member_size(rho, element_size=1.0, level=0.5)["solid"] == 4.0
    assert minimum_member_size(rho, element_size=1.0, level=0.8)["solid"] is None


def test_boundary_choice_for_a_member_along_an_edge():
    # a 2-element member lying along the domain edge: mirrored it is 4 wide, with an empty
    # outside it is 2 wide
    rho = np.zeros((30, 20))
    rho[:, :2] = 1.0
    assert minimum_member_size(rho, element_size=1.0, boundary="void")["solid"] == 2.0
    assert minimum_member_size(rho, element_size=1.0, boundary="mirror")["solid"] == 4.0


def test_absent_and_full_phases():
    out = minimum_member_size(np.ones((6, 4)), element_size=1.0)
    assert out["void"] is None and out["solid"] == 6.0
    out = minimum_member_size(np.zeros((6, 4)), element_size=1.0)
    assert out["solid"] is None


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(element_size=0.0), "element_size"),
        (dict(element_size=1.0, level=1.0), "level"),
        (dict(element_size=1.0, boundary="wrap"), "boundary"),
    ],
)
def test_bad_input(kwargs, match):
    with pytest.raises(ValueError, match=match):
        minimum_member_size(np.zeros((4, 4)), **kwargs)
    with pytest.raises(ValueError, match="2D or 3D"):
        minimum_member_size(np.zeros(4), element_size=1.0)


def _opening_keeps_by_structuring_element(phase, diameter):
    """Independent check: scipy's binary opening with an explicit digital ball."""
    from scipy import ndimage

    offsets = np.arange(diameter) - (diameter - 1) / 2.0
    grids = np.meshgrid(*([offsets] * phase.ndim), indexing="ij")
    ball = sum(g**2 for g in grids) <= (diameter / 2.0) ** 2 + 1e-9
    pad = diameter + 1
    padded = np.pad(phase, pad, mode="symmetric")
    opened = ndimage.binary_opening(padded, structure=ball)
    inner = tuple(slice(pad, pad + n) for n in phase.shape)
    return bool(np.array_equal(opened[inner], phase))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_distance_transform_opening_matches_binary_opening(seed):
    # the fast opening (distance transforms) against scipy.ndimage.binary_opening with an
    # explicit structuring element, on random smooth blobs, diameters 1..9
    from scipy import ndimage

    from topopt.lengthscale import _opening_keeps

    rng = np.random.default_rng(seed)
    field = ndimage.gaussian_filter(rng.random((36, 28)), 2.5)
    for phase in (field > np.median(field), field <= np.median(field)):
        for d in range(1, 10):
            assert _opening_keeps(phase, d, None) == _opening_keeps_by_structuring_element(
                phase, d
            ), d


@pytest.mark.parametrize("width", [9, 12, 16, 17, 21, 24])
def test_wide_bars_use_the_search_path(width):
    # beyond 6 elements the search grows and bisects; exact up to 16, then odd widths
    # exact and even ones possibly one element short (documented)
    rho = np.zeros((90, 70))
    rho[:, 20 : 20 + width] = 1.0
    solid = minimum_member_size(rho, element_size=1.0)["solid"]
    if width <= 16 or width % 2:
        assert solid == width
    else:
        assert width - 1 <= solid <= width
