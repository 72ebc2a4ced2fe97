"""Tests of the optimality-criteria update.

Sources
-------
- OC update and its fixed point: Bendsoe & Sigmund, Topology Optimization, 2003,
  sec. 1.2.1; the lower bound 0.001 on the variables: Sigmund, "A 99 line topology
  optimization code written in Matlab", SMO 21:120-127, 2001.
- Closed-form optimum of the separable test problem: KKT conditions, derived here.
"""

import numpy as np
import pytest

from topopt.optimizers import oc_update


def test_fixed_point_is_the_kkt_optimum_of_a_separable_compliance():
    # minimise sum(c_i / x_i) subject to mean(x) = V: KKT gives c_i / x_i^2 = lambda,
    # so x_i = V * n * sqrt(c_i) / sum(sqrt(c)) while that stays inside [0.001, 1]
    c = np.array([1.0, 2.0, 4.0, 0.5, 3.0])
    volume_fraction = 0.4
    x_star = volume_fraction * c.size * np.sqrt(c) / np.sqrt(c).sum()
    assert x_star.max() < 1.0 and x_star.min() > 0.001
    x = np.full(c.size, volume_fraction)
    dv = np.full(c.size, 1.0 / c.size)
    for _ in range(500):
        x = oc_update(x, -c / x**2, dv, volume=x.mean(), volume_fraction=volume_fraction)
    np.testing.assert_allclose(x, x_star, rtol=1e-8)


def test_floor_brings_removed_material_back():
    # 0 is a fixed point of x * B**0.5; with the floor a variable at 0 whose gradient
    # asks for material comes back, and no moving variable ends below the floor
    x = np.array([0.0, 0.5, 0.5, 0.0])
    dc = -np.array([100.0, 1.0, 1.0, 1e-12])
    active = np.array([True, True, True, False])
    dv = np.full(4, 0.25)
    once = oc_update(x, dc, dv, volume=x.mean(), volume_fraction=0.25, active=active)
    assert once[0] >= 0.001 and once[3] == 0.0
    twice = oc_update(once, dc, dv, volume=once.mean(), volume_fraction=0.25, active=active)
    assert twice[0] > once[0]
    assert np.all(twice[active] >= 0.001)
    stuck = oc_update(x, dc, dv, volume=x.mean(), volume_fraction=0.25, active=active, floor=0.0)
    assert stuck[0] == 0.0  # the behaviour the floor is there to prevent


@pytest.mark.parametrize("floor", [-0.1, 1.0])
def test_bad_floor_is_rejected(floor):
    with pytest.raises(ValueError, match="floor"):
        oc_update(np.full(2, 0.5), -np.ones(2), np.full(2, 0.5), volume=0.5, volume_fraction=0.5,
                  floor=floor)
