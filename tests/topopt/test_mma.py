"""Tests of the MMA optimiser against closed-form KKT optima and nlopt's MMA."""

import numpy as np
import pytest
from scipy.optimize import brentq, fsolve

from topopt.optimizers import MMA


def _run(opt, x, f0, df0, g, dg, iterations=300, tol=1e-10):
    for _ in range(iterations):
        x_new = opt.update(x, f0(x), df0(x), g(x), dg(x))
        done = np.max(np.abs(x_new - x)) < tol
        x = x_new
        if done:
            break
    return x


def test_cantilever_of_svanberg_1987_matches_kkt_closed_form():
    # Svanberg, IJNME 24:359-373, 1987, cantilever example: minimise 0.0624 * sum(x)
    # subject to sum(w / x^3) <= 1. KKT (derived here): 0.0624 = 3 lam w_j / x_j^4, so
    # x_j = t w_j^(1/4) with t^3 = sum(w^(1/4)).
    w = np.array([61.0, 37.0, 19.0, 7.0, 1.0])
    t = np.sum(w**0.25) ** (1.0 / 3.0)
    x_star = t * w**0.25
    f_star = 0.0624 * x_star.sum()
    assert f_star == pytest.approx(1.34, abs=5e-3)  # value in the paper, from memory
    opt = MMA(5, 1, lower=1.0, upper=10.0)
    x = _run(
        opt,
        np.full(5, 5.0),
        lambda x: 0.0624 * x.sum(),
        lambda x: np.full(5, 0.0624),
        lambda x: np.array([np.sum(w / x**3) - 1.0]),
        lambda x: (-3.0 * w / x**4)[None, :],
    )
    np.testing.assert_allclose(x, x_star, rtol=1e-6)
    assert opt.multipliers[0] == pytest.approx(0.0624 * x_star[0] ** 4 / (3 * w[0]), rel=1e-5)


# A smooth convex problem of our own with two active constraints, one of them nonlinear:
# minimise sum(c / x) subject to a.x <= V1, b.(x^2) <= V2, 0.05 <= x <= 5.
C = np.array([1.0, 2.0, 3.0, 1.5, 2.5, 0.5])
A = np.array([1.0, 1.0, 1.0, 0.2, 0.2, 0.2])
B = np.array([0.1, 0.1, 0.1, 1.0, 1.0, 1.0])
V1, V2, LOWER, UPPER = 3.0, 2.0, 0.05, 5.0


def f0(x):
    return float(np.sum(C / x))


def df0(x):
    return -C / x**2


def g(x):
    return np.array([A @ x - V1, B @ x**2 - V2])


def dg(x):
    return np.vstack([A, 2.0 * B * x])


def _kkt_optimum():
    """Optimum from the KKT conditions, both constraints assumed active (checked).

    Stationarity: c_j / x_j^2 = l1 a_j + 2 l2 b_j x_j, a cubic with one positive root.
    """

    def x_of(lam):
        l1, l2 = lam
        return np.array(
            [
                brentq(
                    lambda t, j=j: 2 * l2 * B[j] * t**3 + l1 * A[j] * t**2 - C[j],
                    1e-9,
                    1e3,
                    xtol=1e-15,
                )
                for j in range(C.size)
            ]
        )

    log_lam = fsolve(lambda ll: g(x_of(np.exp(ll))), np.zeros(2), xtol=1e-12)
    lam = np.exp(log_lam)
    x = x_of(lam)
    assert np.all(lam > 0) and np.all(np.abs(g(x)) < 1e-10)  # both active, KKT holds
    assert np.all((x > LOWER) & (x < UPPER))  # bounds inactive
    return x, lam


def test_two_constraints_matches_kkt_and_nlopt():
    nlopt = pytest.importorskip("nlopt")
    x_star, lam_star = _kkt_optimum()

    opt = MMA(6, 2, lower=LOWER, upper=UPPER)
    x_mma = _run(opt, np.full(6, 1.0), f0, df0, g, dg)
    np.testing.assert_allclose(x_mma, x_star, atol=1e-6)
    np.testing.assert_allclose(opt.multipliers, lam_star, rtol=1e-4)

    # reference library: nlopt's MMA (Svanberg's CCSA variant)
    ref = nlopt.opt(nlopt.LD_MMA, 6)

    def objective(x, grad):
        if grad.size:
            grad[:] = df0(x)
        return f0(x)

    def constraints(result, x, grad):
        if grad.size:
            grad[:] = dg(x)
        result[:] = g(x)

    ref.set_min_objective(objective)
    ref.add_inequality_mconstraint(constraints, [1e-10, 1e-10])
    ref.set_lower_bounds(LOWER)
    ref.set_upper_bounds(UPPER)
    ref.set_xtol_rel(1e-10)
    ref.set_maxeval(3000)
    x_ref = ref.optimize(np.full(6, 1.0))

    np.testing.assert_allclose(x_mma, x_ref, atol=1e-4)
    assert f0(x_mma) == pytest.approx(f0(x_ref), rel=1e-4)


def test_infeasible_start_becomes_feasible():
    # start far outside a.x <= V1; the slack variables keep every subproblem solvable
    x_star, _ = _kkt_optimum()
    opt = MMA(6, 2, lower=LOWER, upper=UPPER)
    x = _run(opt, np.full(6, 4.5), f0, df0, g, dg)
    assert np.all(g(x) < 1e-8)
    np.testing.assert_allclose(x, x_star, atol=1e-6)


def test_unconstrained_bound_problem_and_step_limits():
    # m = 0: minimise sum((x - t)^2) in a box; t partly outside the box
    target = np.array([-1.0, 0.3, 0.7, 2.0])
    opt = MMA(4, 0, lower=0.0, upper=1.0, move=0.1)
    x = np.full(4, 0.5)
    x1 = opt.update(x, 0.0, 2 * (x - target), np.zeros(0), np.zeros((0, 4)))
    assert np.all(np.abs(x1 - x) <= 0.1 + 1e-12)  # move limit respected
    x = _run(
        opt,
        x1,
        lambda x: float(np.sum((x - target) ** 2)),
        lambda x: 2 * (x - target),
        lambda x: np.zeros(0),
        lambda x: np.zeros((0, 4)),
    )
    np.testing.assert_allclose(x[[0, 3]], [0.0, 1.0], atol=1e-12)
    # Interior optimum with a vanishing gradient: MMA's steps shrink only with the
    # asymptotes, which stay >= 0.01 of the box away (Svanberg 1987 behaviour, bounds as
    # in his 2007 notes), so the iterates settle within that distance of the optimum.
    np.testing.assert_allclose(x[[1, 2]], [0.3, 0.7], atol=0.01)


def test_state_round_trip_gives_the_same_next_step():
    opt = MMA(6, 2, lower=LOWER, upper=UPPER)
    x = np.full(6, 1.0)
    for _ in range(4):
        x = opt.update(x, f0(x), df0(x), g(x), dg(x))
    copy = MMA(6, 2, lower=LOWER, upper=UPPER)
    copy.restore({k: np.array(v) for k, v in opt.state().items()})
    np.testing.assert_array_equal(
        opt.update(x, f0(x), df0(x), g(x), dg(x)), copy.update(x, f0(x), df0(x), g(x), dg(x))
    )


def test_bad_input_raises():
    with pytest.raises(ValueError, match="upper must exceed lower"):
        MMA(2, 1, lower=1.0, upper=1.0)
    with pytest.raises(ValueError, match="move"):
        MMA(2, 1, lower=0.0, upper=1.0, move=0.0)
    opt = MMA(2, 1, lower=0.0, upper=1.0)
    with pytest.raises(ValueError, match="dg"):
        opt.update(np.zeros(2), 0.0, np.zeros(2), np.zeros(1), np.zeros((2, 2)))
    with pytest.raises(ValueError, match="df0 must be finite"):
        opt.update(np.zeros(2), 0.0, np.array([np.nan, 0.0]), np.zeros(1), np.zeros((1, 2)))


def test_dual_subproblem_with_an_infeasible_constraint_reaches_its_maximum():
    # Regression: 500 variables of an MMA subproblem from the large 3D example (keep-in
    # constraint infeasible within the move limits, so its multiplier passes the
    # infeasibility cost 1000 and the dual is flat where no x is inside its box). The
    # line search used to start at the full Newton step (1e13 here); 60 halvings did
    # not bring it back and the dual stopped at lambda = (804, 188), value 355, with a
    # gradient of 1.9. Reference: the KKT conditions of the concave dual (gradient zero
    # for a positive multiplier; Svanberg, IJNME 24:359-373, 1987), checked here, and
    # its value, which no other lambda may exceed.
    from pathlib import Path

    from topopt.optimizers import _solve_dual

    d = np.load(Path(__file__).resolve().parents[1] / "data" / "mma-dual-flat.npz",
                allow_pickle=False)
    p0, q0, p, q, r = d["p0"], d["q0"], d["p"], d["q"], d["r"]
    low, upp, alpha, beta, cost = d["low"], d["upp"], d["alpha"], d["beta"], float(d["cost"])

    def dual(lam):
        big_p, big_q = p0 + lam @ p, q0 + lam @ q
        x = np.clip((np.sqrt(big_p) * low + np.sqrt(big_q) * upp)
                    / (np.sqrt(big_p) + np.sqrt(big_q)), alpha, beta)
        slack = np.maximum(lam - cost, 0.0)
        value = (big_p @ (1 / (upp - x)) + big_q @ (1 / (x - low)) + lam @ r
                 + (cost - lam) @ slack + 0.5 * slack @ slack)
        return value, p @ (1 / (upp - x)) + q @ (1 / (x - low)) + r - slack

    x, lam = _solve_dual(p0, q0, p, q, r, low, upp, alpha, beta, cost, d["lam0"])
    value, grad = dual(lam)
    assert np.all(lam > 0)
    assert np.all(np.abs(grad) <= 1e-9 * (1 + np.abs(r)))
    for other in ([804.24992133, 188.41149597], lam * 0.99, lam * 1.01):
        assert dual(np.asarray(other))[0] <= value
    assert np.all((x >= alpha) & (x <= beta))
