"""Density filter: the O(n) normalised convolution against the explicit sparse matrix."""

import numpy as np
import pytest

from filters.chain import FilterChain, FixedValues
from filters.density import density_filter, density_filter_matrix, hat_kernel

# Source of the operator: Bruns & Tortorelli, CMAME 190:3443-3459, 2001 (linear hat
# weights, row-normalised). Both implementations below follow that definition; the check
# is that the convolution form reproduces the explicit sparse matrix everywhere,
# including the rows at the domain boundary where normalisation differs.
CASES = [
    ((13, 7), 1.5, 1.0),
    ((10, 9), 2.7, 0.5),
    ((6, 5, 4), 1.5, 1.0),
    ((5, 7, 3), 2.2, 0.8),
    ((1, 6), 3.0, 1.0),
]


@pytest.mark.parametrize(("shape", "radius", "h"), CASES)
def test_convolution_equals_sparse_matrix(shape, radius, h):
    rng = np.random.default_rng(7)
    f = density_filter(shape, radius=radius, element_size=h)
    H = density_filter_matrix(shape, radius=radius, element_size=h)
    x = rng.random(shape)
    y = f.forward(x)
    assert np.max(np.abs(y.ravel() - H @ x.ravel())) < 1e-12
    dy = rng.standard_normal(shape)
    assert np.max(np.abs(f.backward(dy).ravel() - H.T @ dy.ravel())) < 1e-12


@pytest.mark.parametrize(("shape", "radius", "h"), CASES[:4])
def test_boundary_rows_are_normalised(shape, radius, h):
    # A constant field stays constant, also in the boundary rows (common practice:
    # the filter is a weighted mean).
    f = density_filter(shape, radius=radius, element_size=h)
    y = f.forward(np.full(shape, 0.37))
    assert np.max(np.abs(y - 0.37)) < 1e-12
    # The boundary really is treated differently from the interior: the weight sums
    # at a corner are smaller than in the middle (so the test above is not vacuous).
    assert f.weight_sum.flat[0] < f.weight_sum.max()


def test_next_to_passive_regions_matches_matrix_then_fixed_values():
    # The driver applies passive values after the filter (FixedValues). The chain must
    # equal the reference "H x, then overwrite passive entries", and its backward the
    # transpose: H^T (mask * dy).
    rng = np.random.default_rng(3)
    shape = (12, 8, 5)
    solid = np.zeros(shape, dtype=bool)
    void = np.zeros(shape, dtype=bool)
    solid[2:4, 3:6, :] = True
    void[7:10, 0:3, 1:4] = True
    chain = FilterChain([density_filter(shape, radius=1.8, element_size=1.0),
                         FixedValues(solid, void)])
    H = density_filter_matrix(shape, radius=1.8, element_size=1.0)
    x = rng.random(shape)
    ref = (H @ x.ravel()).reshape(shape)
    ref[solid] = 1.0
    ref[void] = 0.0
    assert np.max(np.abs(chain.forward(x) - ref)) < 1e-12
    dy = rng.standard_normal(shape)
    free = ~(solid | void)
    ref_back = (H.T @ np.where(free, dy, 0.0).ravel()).reshape(shape)
    assert np.max(np.abs(chain.backward(dy) - ref_back)) < 1e-12


def test_kernel_weights_are_hat():
    # Weight at distance d is radius - d (Bruns & Tortorelli 2001).
    k = hat_kernel(2, radius=1.5, element_size=1.0)
    assert k[1, 1] == pytest.approx(1.5)
    assert k[0, 1] == pytest.approx(0.5)
    assert k[0, 0] == pytest.approx(1.5 - np.sqrt(2.0))
    assert hat_kernel(2, radius=1.0, element_size=1.0).shape == (1, 1)
