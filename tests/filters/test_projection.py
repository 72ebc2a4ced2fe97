"""Tests of the tanh Heaviside projection, its adjoint and the beta schedule."""

import numpy as np
import pytest

from filters.chain import Filter
from filters.projection import (
    BetaContinuation,
    heaviside_projection,
    length_scale_radius,
    project,
    volume_preserving_eta,
)


def _central_difference_check(f, x, seed, step=1e-6):
    """Relative error of backward() against central differences of <w, forward(x)>."""
    rng = np.random.default_rng(seed)
    w = rng.standard_normal(x.shape)
    f.forward(x)
    analytic = f.backward(w)
    numeric = np.zeros_like(x)
    for idx in np.ndindex(x.shape):
        xp = x.copy()
        xm = x.copy()
        xp[idx] += step
        xm[idx] -= step
        numeric[idx] = (np.sum(w * f.forward(xp)) - np.sum(w * f.forward(xm))) / (2 * step)
    f.forward(x)  # restore the linearisation point
    return np.linalg.norm(analytic - numeric) / np.linalg.norm(numeric)


@pytest.mark.parametrize("beta", [1.0, 8.0, 32.0])
@pytest.mark.parametrize("eta", [0.3, 0.5, 0.7])
def test_backward_matches_central_differences(beta, eta):
    # common practice: adjoint checked against central finite differences
    x = np.random.default_rng(1).uniform(0.0, 1.0, (6, 5))
    f = heaviside_projection(x.shape, beta=beta, eta=eta)
    assert _central_difference_check(f, x, seed=2) < 1e-6


@pytest.mark.parametrize("beta", [1.0, 6.0])
def test_backward_with_volume_preserving_eta_matches_central_differences(beta):
    # common practice: finite differences; eta depends on x here, the adjoint includes it
    x = np.random.default_rng(3).uniform(0.1, 0.9, (5, 4))
    f = heaviside_projection(x.shape, beta=beta, preserve_volume=True)
    assert _central_difference_check(f, x, seed=4) < 1e-6


def test_small_beta_is_nearly_the_identity():
    # Wang, Lazarov & Sigmund, SMO 43:767-784, 2011: tanh(z) ~ z as beta -> 0
    x = np.linspace(0.0, 1.0, 11)
    for eta in (0.2, 0.5, 0.8):
        y = project(x, beta=1e-4, eta=eta)
        assert np.max(np.abs(y - x)) < 1e-7


def test_half_maps_to_half_and_endpoints_are_fixed():
    # identity of the tanh form with eta = 0.5 (symmetric about 0.5), and y(0)=0, y(1)=1
    for beta in (0.5, 4.0, 64.0, 1000.0):
        assert project(np.array([0.5]), beta=beta, eta=0.5)[0] == pytest.approx(0.5, abs=1e-14)
        for eta in (0.1, 0.5, 0.9):
            y = project(np.array([0.0, 1.0]), beta=beta, eta=eta)
            np.testing.assert_allclose(y, [0.0, 1.0], atol=1e-12)


def test_output_within_unit_interval_and_monotone():
    x = np.linspace(0.0, 1.0, 1001)
    for beta in (0.1, 2.0, 50.0, 500.0):
        for eta in (0.0, 0.25, 0.5, 1.0):
            y = project(x, beta=beta, eta=eta)
            assert np.all(y >= -1e-15) and np.all(y <= 1 + 1e-15)
            assert np.all(np.diff(y) >= -1e-15)


def test_large_beta_approaches_a_step_without_warnings():
    # Guest, Prevost & Belytschko, IJNME 61:238-254, 2004: beta -> inf is a step at eta
    x = np.array([0.0, 0.2, 0.49, 0.51, 0.8, 1.0])
    f = heaviside_projection(x.shape, beta=5000.0, eta=0.5)
    np.testing.assert_allclose(f.forward(x), [0, 0, 0, 1, 1, 1], atol=1e-12)
    assert np.all(np.isfinite(f.backward(np.ones_like(x))))


def test_volume_preserving_eta_keeps_the_mean():
    x = np.random.default_rng(5).beta(0.5, 0.7, size=(30, 20))
    for beta in (1.0, 8.0, 64.0):
        eta = volume_preserving_eta(x, beta=beta)
        assert 0.0 < eta < 1.0
        assert project(x, beta=beta, eta=eta).mean() == pytest.approx(x.mean(), abs=1e-9)
    f = heaviside_projection(x.shape, beta=16.0, preserve_volume=True)
    assert f.forward(x).mean() == pytest.approx(x.mean(), abs=1e-9)


def test_filter_protocol_and_mutable_beta():
    f = heaviside_projection((3, 2), beta=1.0)
    assert isinstance(f, Filter)
    x = np.full((3, 2), 0.6)
    y1 = f.forward(x)
    f.beta = 16.0
    y2 = f.forward(x)
    assert np.all(y2 > y1)


@pytest.mark.parametrize(
    "kwargs",
    [dict(beta=0.0), dict(beta=-1.0), dict(beta=np.inf), dict(beta=1.0, eta=1.5)],
)
def test_bad_parameters_raise(kwargs):
    with pytest.raises(ValueError):
        heaviside_projection((2, 2), **kwargs)


def test_bad_shapes_and_order_raise():
    f = heaviside_projection((2, 2), beta=1.0)
    with pytest.raises(ValueError, match="backward called before forward"):
        f.backward(np.ones((2, 2)))
    with pytest.raises(ValueError, match="x must have shape"):
        f.forward(np.ones((3, 2)))
    with pytest.raises(ValueError, match="beta"):
        f.beta = 0.0


def test_continuation_every_n_iterations():
    c = BetaContinuation(beta_start=1.0, beta_max=10.0, every=3)
    betas = []
    for _ in range(15):
        c.step(change=1.0)
        betas.append(c.beta)
    assert betas == [1, 1, 2, 2, 2, 4, 4, 4, 8, 8, 8, 10, 10, 10, 10]
    assert c.at_max


def test_continuation_on_stagnation():
    c = BetaContinuation(beta_start=1.0, beta_max=8.0, every=100, stagnation=0.01, min_gap=2)
    assert not c.step(change=0.001)  # too soon after the last increase
    assert c.step(change=0.001)
    assert c.beta == 2.0
    assert not c.step(change=0.5)
    assert not c.step(change=0.5)  # change still large: wait for `every`
    state = c.state()
    d = BetaContinuation(beta_start=1.0, beta_max=8.0, every=100, stagnation=0.01, min_gap=2)
    d.restore(state)
    assert d.beta == 2.0 and d.since_increase == c.since_increase


def test_continuation_extends_past_beta_max_only_on_request_and_only_extra_steps_times():
    c = BetaContinuation(beta_start=1.0, beta_max=4.0, every=1, extra_steps=2)
    assert not c.extend()  # not at beta_max yet
    while not c.at_max:
        c.step(change=1.0)
    c.step(change=1.0)
    assert c.beta == 4.0  # step() never passes beta_max
    assert c.extend() and c.beta == 8.0 and c.since_increase == 0
    assert c.extend() and c.beta == 16.0
    assert not c.extend() and c.beta == 16.0 == c.beta_limit
    d = BetaContinuation(beta_start=1.0, beta_max=4.0, every=1, extra_steps=2)
    d.restore(c.state())
    assert d.beta == 16.0  # a checkpoint past beta_max resumes there
    plain = BetaContinuation(beta_start=1.0, beta_max=4.0, every=1)
    plain.restore(c.state())
    assert plain.beta == 4.0 and not plain.extend()


def test_continuation_bad_input():
    with pytest.raises(ValueError, match="beta_max"):
        BetaContinuation(beta_start=4.0, beta_max=2.0, every=5)
    with pytest.raises(ValueError, match="every"):
        BetaContinuation(beta_start=1.0, beta_max=2.0, every=0)
    with pytest.raises(ValueError, match="extra_steps"):
        BetaContinuation(beta_start=1.0, beta_max=2.0, every=1, extra_steps=-1)


def test_length_scale_radius_one_dimensional_closed_form():
    # 1D hat filter, thresholds 0.75 / 0.5: worked by hand from the argument of Wang,
    # Lazarov & Sigmund (2011): strip half width R/2, blueprint edge at R/2, so size = R.
    assert length_scale_radius(3.0, eta_eroded=0.75, eta_blueprint=0.5, dim=1) == (
        pytest.approx(3.0, rel=1e-6)
    )
    # 1D, eta_eroded = 0.6: the same construction by independent quadrature
    from scipy.optimize import brentq

    radius = length_scale_radius(1.0, eta_eroded=0.6, eta_blueprint=0.5, dim=1)
    t = np.linspace(-1.0, 1.0, 20001)

    def filtered(x, half):
        inside = np.abs(t) <= 1.0
        weight = np.where(inside, 1.0 - np.abs(t), 0.0) * (np.abs(x - t) <= half)
        return np.trapezoid(weight, t)

    half = brentq(lambda h: filtered(0.0, h) - 0.6, 1e-6, 1.0)
    assert half == pytest.approx(1.0 - np.sqrt(0.4), rel=1e-3)  # closed form by hand
    edge = brentq(lambda x: filtered(x, half) - 0.5, 0.0, 2.0)
    assert 1.0 / radius == pytest.approx(2.0 * edge, rel=1e-3)


def test_length_scale_radius_grows_with_dimension_and_bad_input():
    r1, r2, r3 = (length_scale_radius(1.0, dim=d) for d in (1, 2, 3))
    # a cone kernel in more dimensions is more concentrated across a member: a wider
    # strip is needed, so the radius for a given size is larger
    assert r1 < r2 < r3
    with pytest.raises(ValueError, match="eta_blueprint"):
        length_scale_radius(1.0, eta_eroded=0.4, eta_blueprint=0.5)
    with pytest.raises(ValueError, match="min_size"):
        length_scale_radius(-1.0)
