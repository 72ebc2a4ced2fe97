"""Design updates: optimality criteria (and MMA), found by name in :data:`OPTIMIZERS`."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np


def oc_update(
    x: np.ndarray,
    dc: np.ndarray,
    dv: np.ndarray,
    *,
    volume: float,
    volume_fraction: float,
    move: float = 0.2,
    active: np.ndarray | None = None,
    damping: float = 0.5,
    floor: float = 1e-3,
) -> np.ndarray:
    """Optimality-criteria update with bisection on the volume multiplier.

    The heuristic fixed-point update x_e * (-dc_e / (lambda dv_e))**damping with move
    limits (Bendsoe & Sigmund 2003, sec. 1.2.1). The volume constraint is linearised
    at ``x`` (``volume + dv . (x_new - x) = volume_fraction``), which is exact for a
    linear filter chain and self-correcting for nonlinear ones.

    Variables stay at or above ``floor`` (0.001, as in Sigmund's 99-line code, SMO
    21:120-127, 2001) because 0 is a fixed point of the multiplicative update: a variable
    that reaches 0 can never come back. Measured on the half MBB beam (tolerance 0.001):
    with a floor of 0, OC stalled at compliance 218.1, unable to put material back where
    it had once removed it; with 0.001 it went on to 210.9, next to MMA's 210.7. A
    variable below the floor is lifted to it even if that is more than ``move``.

    Parameters
    ----------
    x : ndarray
        Current design variables in [0, 1].
    dc : ndarray
        Objective gradient with respect to ``x`` (non-positive for compliance).
    dv : ndarray
        Gradient of the volume fraction with respect to ``x`` (non-negative).
    volume : float
        Current volume fraction.
    volume_fraction : float
        Target volume fraction.
    move : float
        Largest change of a variable in one update.
    active : ndarray of bool, optional
        Variables allowed to change; the others keep their value.
    damping : float
        Exponent of the update (0.5 is the classic choice).
    floor : float
        Smallest value of a variable that moves (in [0, 1)).

    Examples
    --------
    >>> x = np.full(4, 0.5)
    >>> x_new = oc_update(x, -np.array([1.0, 2.0, 3.0, 4.0]), np.full(4, 0.25),
    ...                   volume=0.5, volume_fraction=0.5)
    >>> bool(abs(x_new.mean() - 0.5) < 1e-6)
    True
    """
    x = np.asarray(x, dtype=float)
    if active is None:
        active = np.ones(x.shape, dtype=bool)
    # Guard: positive-definite ratios even where gradients round to the wrong sign.
    ratio = np.maximum(-np.asarray(dc), 1e-30) / np.maximum(np.asarray(dv), 1e-30)
    if not 0.0 <= floor < 1.0:
        raise ValueError(f"floor must be in [0, 1), got {floor!r}")
    lo_x = np.maximum(floor, x - move)
    hi_x = np.maximum(np.minimum(1.0, x + move), lo_x)
    lo, hi = 1e-40, 1e40
    x_new = x
    for _ in range(200):
        mid = np.sqrt(lo * hi)
        x_new = np.where(active, np.clip(x * (ratio / mid) ** damping, lo_x, hi_x), x)
        predicted = volume + float(np.sum(dv * (x_new - x)))
        if predicted > volume_fraction:
            lo = mid
        else:
            hi = mid
        if hi / lo < 1.0 + 1e-12:
            break
    return x_new


#: Update rules by name; MMA registers itself here.
OPTIMIZERS: dict[str, Callable[..., object]] = {"oc": oc_update}


# ---------------------------------------------------------------------------- MMA
# The method of moving asymptotes (MMA) for problems with inequality constraints.
#
# Problem: minimise f0(x) subject to g_i(x) <= 0 (i = 1..m) and lower <= x <= upper.
#
# At each iterate the functions are replaced by convex separable approximations
#
#     f_i(x) ~ r_i + sum_j p_ij / (U_j - x_j) + q_ij / (x_j - L_j)
#
# with moving asymptotes L < x < U, p_ij = (U_j - x_j)^2 max(0, df_i/dx_j) and
# q_ij = (x_j - L_j)^2 max(0, -df_i/dx_j) (Svanberg, "The method of moving asymptotes - a
# new method for structural optimization", IJNME 24:359-373, 1987). The asymptotes move
# towards the iterate when it oscillates and away when it moves steadily in one direction.
# The subproblem is solved through its dual: for multipliers lambda >= 0 the Lagrangian
# separates per variable and its minimiser has a closed form; the concave dual in the m
# multipliers is maximised by a projected Newton method.
#
# Two standard additions from Svanberg's later papers keep every subproblem well posed:
# a small extra curvature term (so the minimiser in x is unique even where a derivative is
# zero; Svanberg, SIAM J. Optim. 12:555-573, 2002) and non-negative slack variables y_i with
# cost c_i y_i + y_i^2 / 2 (so a subproblem whose linearised constraints cannot all be met
# still has a solution; Svanberg, "MMA and GCMMA - two methods for nonlinear optimization",
# KTH report, 2007).


# Extra curvature of the approximations relative to |df| and relative to the box width;
# values as in Svanberg's 2007 notes.
_CURVATURE_REL = 1e-3
_CURVATURE_ABS = 1e-5


class MMA:
    """State of an MMA run: asymptotes and the two previous iterates.

    Parameters
    ----------
    n : int
        Number of variables.
    m : int
        Number of inequality constraints g_i(x) <= 0 (>= 0).
    lower, upper : float or ndarray
        Box bounds (lower < upper everywhere).
    move : float
        Largest step per iteration as a share of ``upper - lower`` (0 < move <= 1).
    asyinit : float
        Distance of the first asymptotes from x, as a share of ``upper - lower``.
    asyincr, asydecr : float
        Factors widening (steady direction) or narrowing (oscillation) the asymptotes.
    infeasibility_cost : float
        Linear cost c_i of the slack variables; must exceed the multipliers of the
        solution, so scale the objective to order 1-100.

    Notes
    -----
    The implied curvature of the approximations is proportional to the gradient, so near an
    optimum where a gradient vanishes (an unconstrained interior optimum) the steps shrink
    only as the asymptotes close in; they are kept at least 0.01 of the box from x, so such
    variables can end oscillating with an amplitude of about that size. Where constraints
    are active (the usual case in topology optimisation) this does not arise.

    Examples
    --------
    Minimise (x0 - 2)^2 + (x1 - 2)^2 subject to x0 + x1 <= 2 (optimum at x = (1, 1)):

    >>> opt = MMA(2, 1, lower=0.0, upper=3.0)
    >>> x = np.array([0.5, 0.2])
    >>> for _ in range(40):
    ...     x = opt.update(x, ((x - 2) ** 2).sum(), 2 * (x - 2),
    ...                    np.array([x.sum() - 2]), np.ones((1, 2)))
    >>> np.round(x, 4).tolist()
    [1.0, 1.0]
    """

    def __init__(
        self,
        n: int,
        m: int,
        *,
        lower: float | np.ndarray,
        upper: float | np.ndarray,
        move: float = 0.5,
        asyinit: float = 0.5,
        asyincr: float = 1.2,
        asydecr: float = 0.7,
        infeasibility_cost: float = 1000.0,
    ):
        if int(n) != n or n < 1:
            raise ValueError(f"n must be an integer >= 1, got {n!r}")
        if int(m) != m or m < 0:
            raise ValueError(f"m must be an integer >= 0, got {m!r}")
        self.n, self.m = int(n), int(m)
        self.lower = np.broadcast_to(np.asarray(lower, dtype=float), (self.n,)).copy()
        self.upper = np.broadcast_to(np.asarray(upper, dtype=float), (self.n,)).copy()
        if not np.all(np.isfinite(self.lower)) or not np.all(np.isfinite(self.upper)):
            raise ValueError("lower and upper must be finite")
        if np.any(self.upper <= self.lower):
            raise ValueError("upper must exceed lower for every variable")
        if not 0.0 < move <= 1.0:
            raise ValueError(f"move must lie in (0, 1], got {move!r}")
        if not 0.0 < asyinit <= 1.0:
            raise ValueError(f"asyinit must lie in (0, 1], got {asyinit!r}")
        if not asyincr >= 1.0:
            raise ValueError(f"asyincr must be >= 1, got {asyincr!r}")
        if not 0.0 < asydecr <= 1.0:
            raise ValueError(f"asydecr must lie in (0, 1], got {asydecr!r}")
        if not infeasibility_cost > 0.0:
            raise ValueError(f"infeasibility_cost must be > 0, got {infeasibility_cost!r}")
        self.move = float(move)
        self.asyinit = float(asyinit)
        self.asyincr = float(asyincr)
        self.asydecr = float(asydecr)
        self.infeasibility_cost = float(infeasibility_cost)
        self.iteration = 0
        self.x_prev1: np.ndarray | None = None  # iterate k-1
        self.x_prev2: np.ndarray | None = None  # iterate k-2
        self.asy_low: np.ndarray | None = None
        self.asy_upp: np.ndarray | None = None
        #: multipliers of the last subproblem (length m)
        self.multipliers = np.zeros(self.m)

    # -- asymptotes ---------------------------------------------------------------------
    def _move_asymptotes(self, x: np.ndarray) -> None:
        span = self.upper - self.lower
        if self.iteration < 2 or self.asy_low is None:
            self.asy_low = x - self.asyinit * span
            self.asy_upp = x + self.asyinit * span
            return
        trend = (x - self.x_prev1) * (self.x_prev1 - self.x_prev2)
        factor = np.ones(self.n)
        factor[trend > 0] = self.asyincr  # steady direction: widen, larger steps
        factor[trend < 0] = self.asydecr  # oscillation: narrow, damp
        low = x - factor * (self.x_prev1 - self.asy_low)
        upp = x + factor * (self.asy_upp - self.x_prev1)
        # keep the asymptotes neither glued to x nor so far away that MMA becomes linear
        self.asy_low = np.clip(low, x - 10.0 * span, x - 0.01 * span)
        self.asy_upp = np.clip(upp, x + 0.01 * span, x + 10.0 * span)

    # -- one iteration --------------------------------------------------------------------
    def update(
        self,
        x: np.ndarray,
        f0: float,
        df0: np.ndarray,
        g: np.ndarray,
        dg: np.ndarray,
    ) -> np.ndarray:
        """Return the next iterate.

        Parameters
        ----------
        x : ndarray, shape (n,)
            Current iterate (inside the box).
        f0 : float
            Objective at x.
        df0 : ndarray, shape (n,)
            Objective gradient.
        g : ndarray, shape (m,)
            Constraint values (feasible when <= 0).
        dg : ndarray, shape (m, n)
            Constraint gradients, one row per constraint.

        Returns
        -------
        ndarray, shape (n,)
            The minimiser of the MMA subproblem.
        """
        x = np.asarray(x, dtype=float).reshape(-1)
        df0 = np.asarray(df0, dtype=float).reshape(-1)
        g = np.asarray(g, dtype=float).reshape(-1)
        dg = np.asarray(dg, dtype=float).reshape(self.m, -1) if self.m else np.zeros((0, self.n))
        if x.shape != (self.n,) or df0.shape != (self.n,):
            raise ValueError(f"x and df0 must have shape ({self.n},)")
        if g.shape != (self.m,) or dg.shape != (self.m, self.n):
            raise ValueError(f"g must have shape ({self.m},) and dg ({self.m}, {self.n})")
        for name, a in (("x", x), ("df0", df0), ("g", g), ("dg", dg)):
            if not np.all(np.isfinite(a)):
                raise ValueError(f"{name} must be finite")
        x = np.clip(x, self.lower, self.upper)

        self._move_asymptotes(x)
        low, upp = self.asy_low, self.asy_upp
        span = self.upper - self.lower
        alpha = np.maximum.reduce([self.lower, low + 0.1 * (x - low), x - self.move * span])
        beta = np.minimum.reduce([self.upper, upp - 0.1 * (upp - x), x + self.move * span])

        ux2 = (upp - x) ** 2
        xl2 = (x - low) ** 2
        extra = _CURVATURE_ABS / span

        def coefficients(df):
            curv = _CURVATURE_REL * np.abs(df) + extra
            return ux2 * (np.maximum(df, 0.0) + curv), xl2 * (np.maximum(-df, 0.0) + curv)

        p0, q0 = coefficients(df0)
        if self.m:
            p, q = coefficients(dg)
            # constant terms so the approximations equal g at x
            r = g - (p / (upp - x)).sum(axis=1) - (q / (x - low)).sum(axis=1)
        else:
            p = q = np.zeros((0, self.n))
            r = np.zeros(0)

        x_new, lam = _solve_dual(
            p0, q0, p, q, r, low, upp, alpha, beta, self.infeasibility_cost, self.multipliers
        )
        self.multipliers = lam
        self.x_prev2 = self.x_prev1
        self.x_prev1 = x.copy()
        self.iteration += 1
        return x_new

    # -- checkpoints ----------------------------------------------------------------------
    def state(self) -> dict[str, np.ndarray]:
        """Plain arrays describing the run so far (for ``np.savez``)."""
        out = {"mma_iteration": np.array(self.iteration), "mma_multipliers": self.multipliers}
        for key in ("x_prev1", "x_prev2", "asy_low", "asy_upp"):
            value = getattr(self, key)
            if value is not None:
                out["mma_" + key] = value
        return out

    def restore(self, state: dict[str, np.ndarray]) -> None:
        """Restore from :meth:`state` output (missing entries stay unset)."""
        self.iteration = int(state["mma_iteration"])
        mult = np.asarray(state.get("mma_multipliers", np.zeros(self.m)), dtype=float)
        self.multipliers = mult if mult.shape == (self.m,) else np.zeros(self.m)
        for key in ("x_prev1", "x_prev2", "asy_low", "asy_upp"):
            value = state.get("mma_" + key)
            if value is not None:
                value = np.asarray(value, dtype=float)
                if value.shape != (self.n,):
                    raise ValueError(f"mma_{key} must have shape ({self.n},)")
            setattr(self, key, value)


def _solve_dual(p0, q0, p, q, r, low, upp, alpha, beta, cost, lam0, tol=1e-12, max_steps=200):
    """Maximise the concave dual of the separable subproblem over lambda >= 0.

    Projected Newton method (Bertsekas, SIAM J. Control Optim. 20:221-246, 1982) with an
    Armijo backtracking search: multipliers at zero whose gradient points outwards stay
    fixed, the others take a Newton step with the exact dual Hessian. The dual is only
    piecewise twice differentiable (x(lambda) is clipped to the box), which the line search
    absorbs. Returns the primal minimiser x(lambda*) and lambda*.
    """
    m = r.size

    def evaluate(lam):
        big_p = p0 + lam @ p
        big_q = q0 + lam @ q
        sp, sq = np.sqrt(big_p), np.sqrt(big_q)
        # stationary point of P/(U-x) + Q/(x-L), then the box
        x = np.clip((sp * low + sq * upp) / (sp + sq), alpha, beta)
        inv_u = 1.0 / (upp - x)
        inv_l = 1.0 / (x - low)
        slack = np.maximum(lam - cost, 0.0)  # minimiser of (c - lam) y + y^2 / 2, y >= 0
        value = big_p @ inv_u + big_q @ inv_l + lam @ r + (cost - lam) @ slack + 0.5 * slack @ slack
        grad = p @ inv_u + q @ inv_l + r - slack
        return x, value, grad, (big_p, big_q, inv_u, inv_l, slack)

    def hessian(x, parts):
        big_p, big_q, inv_u, inv_l, slack = parts
        free = (x > alpha) & (x < beta)
        # d(grad_i)/d(lam_k) = -sum_j a_ij a_kj / D_j over free x_j, with a_ij the slope of
        # approximation i at x_j and D_j the curvature of the Lagrangian in x_j
        a = p[:, free] * inv_u[free] ** 2 - q[:, free] * inv_l[free] ** 2
        curv = 2.0 * big_p[free] * inv_u[free] ** 3 + 2.0 * big_q[free] * inv_l[free] ** 3
        h = -(a / curv) @ a.T
        h[np.diag_indices(m)] -= (slack > 0).astype(float)
        return h

    if m == 0:
        return evaluate(np.zeros(0))[0], np.zeros(0)

    lam = np.maximum(np.asarray(lam0, dtype=float), 0.0)
    x, value, grad, parts = evaluate(lam)
    scale = 1.0 + np.abs(r)
    for _ in range(max_steps):
        at_bound = (lam <= 0.0) & (grad <= 0.0)
        free = ~at_bound
        if np.all(np.abs(grad[free]) <= tol * scale[free]):
            break
        direction = np.zeros(m)
        if free.any():
            h = -hessian(x, parts)[np.ix_(free, free)]
            shift = 1e-12 * max(float(np.max(np.abs(np.diag(h)))), 1e-300)
            try:
                step = np.linalg.solve(h + shift * np.eye(h.shape[0]), grad[free])
            except np.linalg.LinAlgError:
                step = grad[free]
            if not np.all(np.isfinite(step)) or step @ grad[free] <= 0.0:
                step = grad[free]  # fall back to steepest ascent
            direction[free] = step
        # Where no x is strictly inside its box the dual is flat and the Newton step
        # huge (seen: 4e13 with the keep-in constraint infeasible): start the line search
        # at a step no longer than the multipliers can usefully move, not at 2^-40 of it
        # after 40 halvings.
        reach = max(1.0, cost, 10.0 * float(np.max(lam)))
        t = min(1.0, reach / max(float(np.max(np.abs(direction))), 1e-300))
        improved = False
        for _ in range(60):
            trial = np.maximum(lam + t * direction, 0.0)
            x_t, value_t, grad_t, parts_t = evaluate(trial)
            if value_t >= value + 1e-4 * grad @ (trial - lam):
                improved = True
                break
            t *= 0.5
        if not improved:
            break
        # The dual is only piecewise smooth: next to a kink the Newton direction can be
        # so poor that only a vanishing step passes the line search, and lambda then
        # crawls in its last digits. Measured on the large 3D example (keep-in
        # constraint, multiplier 8e-7): 10,000 evaluations, 100 s, for one update. A
        # step that no longer raises the dual value is the end.
        stalled = value_t - value <= 1e-15 * (abs(value) + 1.0)
        done = np.array_equal(trial, lam)
        lam, x, value, grad, parts = trial, x_t, value_t, grad_t, parts_t
        if done or stalled:
            break
    return x, lam


class MMAComplianceUpdate:
    """MMA for the compliance problem: min max_k c_k(x) subject to volume <= target.

    With one compliance (``n_designs = 1``) the objective is the compliance itself. With
    several (the eroded, blueprint and dilated designs of the robust formulation) the
    worst case is minimised through the bound formulation: an extra variable z, objective
    z, and constraints c_k(x) <= z (Wang, Lazarov & Sigmund, SMO 43:767-784, 2011).
    Compliances are divided by the largest compliance of the first call so the objective
    is of order one (see ``infeasibility_cost`` of :class:`MMA`); the volume constraint is
    ``volume / target - 1 <= 0``. Only ``active`` variables move.

    In the bound formulation the constraints use log(c_k / c_0) instead of c_k / c_0 (the
    same minimiser, since log is increasing) and z restarts at the current worst value
    before every update. When beta grows, an eroded design can lose a member and its
    compliance jump by orders of magnitude (measured on the robust MBB beam: 361 -> 1.1e8
    at beta 32); on the linear scale z then lagged far behind and the run ended in a much
    worse design, on the log scale the jump is a step of about 12.

    Parameters
    ----------
    active : ndarray of bool
        Design variables that may change (grid shape).
    volume_fraction : float
        Target volume fraction.
    n_designs : int
        Number of compliances whose maximum is minimised.
    move : float
        Move limit per iteration (share of the [0, 1] box).
    extra_constraints : int
        Further constraints ``g(x) <= 0`` given at every call (``extra=[(g, dg), ...]``,
        gradients in grid shape), such as the printability of keep-in regions.

    Examples
    --------
    >>> upd = MMAComplianceUpdate(np.ones(2, dtype=bool), volume_fraction=0.5)
    >>> x = upd(np.array([0.5, 0.5]), compliances=[1.0], gradients=[np.array([-2.0, -1.0])],
    ...         volume=0.5, dv=np.array([0.5, 0.5]))
    >>> bool(x[0] > x[1])
    True
    """

    def __init__(
        self, active: np.ndarray, *, volume_fraction: float, n_designs: int = 1, move: float = 0.2,
        extra_constraints: int = 0,
    ):
        self.active = np.asarray(active, dtype=bool)
        self.volume_fraction = float(volume_fraction)
        self.n_designs = int(n_designs)
        if self.n_designs < 1:
            raise ValueError(f"n_designs must be >= 1, got {n_designs!r}")
        n = int(self.active.sum())
        self.bound = self.n_designs > 1
        lower = np.zeros(n + self.bound)
        upper = np.ones(n + self.bound)
        if self.bound:
            lower[-1], upper[-1] = -self._Z_MAX, self._Z_MAX
        self.n_extra = int(extra_constraints)
        self.move = float(move)
        self.mma = MMA(n + self.bound, self.n_designs * self.bound + 1 + self.n_extra,
                       lower=lower, upper=upper, move=move)
        self.scale: float | None = None
        self.z: float | None = None

    #: Bounds +-_Z_MAX of the bound variable z = log(c / c_0): far beyond the ratio of a
    #: fully disconnected design (about 1 / void_stiffness, log 1e9 = 21).
    _Z_MAX = 40.0

    def __call__(
        self,
        x: np.ndarray,
        *,
        compliances,
        gradients,
        volume: float,
        dv: np.ndarray,
        extra=(),
    ) -> np.ndarray:
        """Return the updated design (grid shape); gradients are with respect to ``x``."""
        extra = list(extra)
        if len(extra) != self.n_extra:
            raise ValueError(f"expected {self.n_extra} extra constraints, got {len(extra)}")
        g_extra = np.array([float(g) for g, _ in extra])
        dg_extra = [np.asarray(dg, dtype=float)[self.active] for _, dg in extra]
        c = np.asarray(compliances, dtype=float).reshape(-1)
        if c.size != self.n_designs:
            raise ValueError(f"expected {self.n_designs} compliances, got {c.size}")
        if self.scale is None:
            self.scale = float(np.max(np.abs(c))) or 1.0
        if self.bound:
            if np.any(c <= 0.0):
                raise ValueError("compliances must be > 0")
            # d log(c_k) / dx = (dc_k / dx) / c_k
            dcs = [
                np.asarray(g, dtype=float)[self.active] / ck
                for g, ck in zip(gradients, c, strict=True)
            ]
            c = np.log(c / self.scale)
        else:
            c = c / self.scale
            dcs = [np.asarray(g, dtype=float)[self.active] / self.scale for g in gradients]
        xa = np.asarray(x, dtype=float)[self.active]
        g_vol = volume / self.volume_fraction - 1.0
        dg_vol = np.asarray(dv, dtype=float)[self.active] / self.volume_fraction
        if not self.bound:
            g = np.append(g_vol, g_extra)
            rows = np.vstack([dg_vol] + dg_extra)
            new = self.mma.update(xa, c[0], dcs[0], g, rows)
        else:
            self.z = float(np.clip(c.max(), -self._Z_MAX, self._Z_MAX))
            var = np.append(xa, self.z)
            df0 = np.zeros(var.size)
            df0[-1] = 1.0
            rows = [np.append(d, -1.0) for d in dcs] + [np.append(dg_vol, 0.0)]
            rows += [np.append(d, 0.0) for d in dg_extra]
            g = np.concatenate([c - self.z, [g_vol], g_extra])
            new = self.mma.update(var, self.z, df0, g, np.vstack(rows))
            self.z = float(new[-1])
            new = new[:-1]
        out = np.array(x, dtype=float, copy=True)
        out[self.active] = new
        return out

    def set_move(self, move) -> None:
        """Set the move limit: one number, or one per element (grid shape)."""
        move = np.asarray(move, dtype=float)
        if move.ndim == 0:
            self.mma.move = float(move)
            return
        per_variable = move[self.active]
        if self.bound:  # the bound variable z keeps the limit it was given
            per_variable = np.append(per_variable, self.move)
        self.mma.move = per_variable

    def state(self) -> dict[str, np.ndarray]:
        """Plain arrays for checkpoints."""
        out = self.mma.state()
        if self.scale is not None:
            out["mma_scale"] = np.array(self.scale)
        if self.z is not None:
            out["mma_z"] = np.array(self.z)
        return out

    def restore(self, state) -> None:
        """Restore from :meth:`state` output."""
        if "mma_iteration" not in state:
            return
        self.mma.restore(state)
        if "mma_scale" in state:
            self.scale = float(state["mma_scale"])
        if "mma_z" in state:
            self.z = float(state["mma_z"])


OPTIMIZERS["mma"] = MMAComplianceUpdate
