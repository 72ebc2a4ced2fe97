"""Smoothed Heaviside projection (tanh form), beta continuation, length-scale thresholds.

The projection maps a filtered density ``x`` in [0, 1] to

    y = (tanh(beta * eta) + tanh(beta * (x - eta))) / (tanh(beta * eta) + tanh(beta * (1 - eta)))

(Wang, Lazarov & Sigmund, "On projection methods, convergence and robust formulations in
topology optimization", SMO 43:767-784, 2011). ``beta`` sets the sharpness (beta -> 0 is
the identity, beta -> inf a step at ``eta``); ``eta`` is the threshold. The same paper's
robust formulation uses three thresholds (eroded, intermediate, dilated);
:func:`length_scale_radius` turns a wanted minimum member size into a filter radius for a
given pair of thresholds by the paper's one-dimensional argument.
"""

from __future__ import annotations

import math

import numpy as np

# cosh overflows float64 near 710; beyond |z| = 300 sech^2 is 0 to double precision anyway.
_Z_CLIP = 300.0


def _check_beta(beta: float) -> float:
    beta = float(beta)
    if not math.isfinite(beta) or beta <= 0.0:
        raise ValueError(f"beta must be a finite number > 0, got {beta!r}")
    return beta


def _check_eta(eta: float, *, name: str = "eta") -> float:
    eta = float(eta)
    if not (0.0 <= eta <= 1.0):
        raise ValueError(f"{name} must lie in [0, 1], got {eta!r}")
    return eta


def project(x: np.ndarray, *, beta: float, eta: float) -> np.ndarray:
    """Tanh Heaviside projection of an array.

    Parameters
    ----------
    x : ndarray
        Values, normally in [0, 1].
    beta : float
        Sharpness (> 0).
    eta : float
        Threshold in [0, 1].

    Returns
    -------
    ndarray
        Projected values; 0 maps to 0 and 1 to 1 for every beta and eta.

    Examples
    --------
    >>> float(project(np.array([0.5]), beta=8.0, eta=0.5)[0])
    0.5
    """
    beta = _check_beta(beta)
    eta = _check_eta(eta)
    x = np.asarray(x, dtype=float)
    a = math.tanh(beta * eta)
    return (a + np.tanh(beta * (x - eta))) / (a + math.tanh(beta * (1.0 - eta)))


def _dproject_dx(x: np.ndarray, beta: float, eta: float) -> np.ndarray:
    """Return d project / d x (elementwise)."""
    denom = math.tanh(beta * eta) + math.tanh(beta * (1.0 - eta))
    z = np.clip(beta * (x - eta), -_Z_CLIP, _Z_CLIP)
    return beta / np.cosh(z) ** 2 / denom


def _dproject_deta(x: np.ndarray, beta: float, eta: float) -> np.ndarray:
    """Return d project / d eta (elementwise)."""
    a = math.tanh(beta * eta)
    b = math.tanh(beta * (1.0 - eta))
    denom = a + b
    sech2_eta = 1.0 / math.cosh(min(beta * eta, _Z_CLIP)) ** 2
    sech2_one = 1.0 / math.cosh(min(beta * (1.0 - eta), _Z_CLIP)) ** 2
    z = np.clip(beta * (x - eta), -_Z_CLIP, _Z_CLIP)
    numer = a + np.tanh(beta * (x - eta))
    dnumer = beta * (sech2_eta - 1.0 / np.cosh(z) ** 2)
    ddenom = beta * (sech2_eta - sech2_one)
    return (dnumer * denom - numer * ddenom) / denom**2


def volume_preserving_eta(
    x: np.ndarray, *, beta: float, tol: float = 1e-12, max_iterations: int = 200
) -> float:
    """Threshold for which the projected mean equals the mean of ``x``.

    The projected mean decreases monotonically as eta grows (each projected value does),
    so bisection on [0, 1] finds it. The idea of moving the threshold to keep the volume
    is from Xu, Cai & Cheng, SMO 41:495-505, 2010.

    Parameters
    ----------
    x : ndarray
        Values in [0, 1].
    beta : float
        Sharpness (> 0).
    tol : float
        Stop when the bracket on eta is narrower than this.
    max_iterations : int
        Upper bound on the bisection steps.

    Returns
    -------
    float
        The threshold eta in [0, 1].

    Examples
    --------
    >>> x = np.array([0.2, 0.4, 0.9])
    >>> eta = volume_preserving_eta(x, beta=4.0)
    >>> round(float(project(x, beta=4.0, eta=eta).mean() - x.mean()), 10)
    0.0
    """
    beta = _check_beta(beta)
    x = np.asarray(x, dtype=float)
    if x.size == 0:
        raise ValueError("x must not be empty")
    target = float(x.mean())
    low, high = 0.0, 1.0
    for _ in range(int(max_iterations)):
        mid = 0.5 * (low + high)
        if project(x, beta=beta, eta=mid).mean() > target:
            low = mid
        else:
            high = mid
        if high - low < tol:
            break
    return 0.5 * (low + high)


class HeavisideProjection:
    """Tanh Heaviside projection as a filter (``forward`` / ``backward``).

    State is real here: ``beta`` changes during continuation and, with
    ``preserve_volume``, the threshold is recomputed from each forward input. Create it
    with :func:`heaviside_projection`.

    Attributes
    ----------
    shape : tuple of int
        Shape of the arrays the filter accepts.
    beta : float
        Sharpness; may be changed between iterations (continuation).
    eta : float
        Threshold; with ``preserve_volume`` it is the value found at the last forward call.
    preserve_volume : bool
        Choose eta on every forward call so that the projected mean equals the input mean.
    """

    def __init__(self, shape: tuple[int, ...], *, beta: float, eta: float, preserve_volume: bool):
        self.shape = tuple(int(n) for n in shape)
        self._beta = _check_beta(beta)
        self.eta = _check_eta(eta)
        self.preserve_volume = bool(preserve_volume)
        self._x: np.ndarray | None = None

    @property
    def beta(self) -> float:
        """Sharpness of the projection."""
        return self._beta

    @beta.setter
    def beta(self, value: float) -> None:
        self._beta = _check_beta(value)

    def _check_shape(self, a: np.ndarray, name: str) -> np.ndarray:
        a = np.asarray(a, dtype=float)
        if a.shape != self.shape:
            raise ValueError(f"{name} must have shape {self.shape}, got {a.shape}")
        return a

    def forward(self, x: np.ndarray) -> np.ndarray:
        """Project ``x`` (remembered for :meth:`backward`)."""
        x = self._check_shape(x, "x")
        if self.preserve_volume:
            self.eta = volume_preserving_eta(x, beta=self._beta)
        self._x = x.copy()
        return project(x, beta=self._beta, eta=self.eta)

    def backward(self, dy: np.ndarray) -> np.ndarray:
        """Vector-Jacobian product at the last forward input.

        With ``preserve_volume`` the threshold depends on every input value through
        ``mean(project(x, eta(x))) = mean(x)``; the implicit-function derivative of eta is
        included so that the result is the exact gradient.
        """
        if self._x is None:
            raise ValueError("backward called before forward")
        dy = self._check_shape(dy, "dy")
        x, beta, eta = self._x, self._beta, self.eta
        dydx = _dproject_dx(x, beta, eta)
        dx = dy * dydx
        if self.preserve_volume:
            dydeta = _dproject_deta(x, beta, eta)
            slope = dydeta.mean()
            if slope != 0.0:
                # eta(x) solves g = mean(project(x, eta)) - mean(x) = 0, so
                # d eta / d x_i = -(dydx_i - 1) / (n * slope)
                dx = dx + float(np.sum(dy * dydeta)) * (-(dydx - 1.0) / (x.size * slope))
        return dx


def heaviside_projection(
    shape: tuple[int, ...], *, beta: float, eta: float = 0.5, preserve_volume: bool = False
) -> HeavisideProjection:
    """Create a tanh Heaviside projection filter.

    Parameters
    ----------
    shape : tuple of int
        Shape of the element arrays.
    beta : float
        Initial sharpness (> 0); change ``.beta`` later for continuation.
    eta : float
        Threshold in [0, 1]; ignored (recomputed) when ``preserve_volume`` is true.
    preserve_volume : bool
        Pick eta at every forward call so that the projected mean equals the input mean.

    Returns
    -------
    HeavisideProjection
        An object with ``forward(x)`` and ``backward(dy)``.

    Examples
    --------
    >>> f = heaviside_projection((3,), beta=1e-6)
    >>> np.allclose(f.forward(np.array([0.1, 0.5, 0.8])), [0.1, 0.5, 0.8])
    True
    """
    if isinstance(shape, (int, np.integer)):
        shape = (int(shape),)
    if len(shape) == 0 or any(int(n) < 1 for n in shape):
        raise ValueError(f"shape must be a non-empty tuple of positive ints, got {shape!r}")
    return HeavisideProjection(shape, beta=beta, eta=eta, preserve_volume=preserve_volume)


class BetaContinuation:
    """A beta schedule: double beta every ``every`` iterations or on stagnation.

    The loop calls :meth:`step` once per iteration with the design change of that
    iteration. Beta is multiplied by ``factor`` (capped at ``beta_max``) when ``every``
    iterations have passed since the last increase, or earlier when the change falls below
    ``stagnation`` (after at least ``min_gap`` iterations at the current beta), because a
    stalled design at one beta gains nothing from more iterations there. Doubling beta in
    steps is common practice (e.g. Guest, Prevost & Belytschko, IJNME 61:238-254, 2004;
    Wang, Lazarov & Sigmund, SMO 43:767-784, 2011).

    Parameters
    ----------
    beta_start, beta_max : float
        First and last beta (0 < beta_start <= beta_max).
    every : int
        Iterations between increases (>= 1).
    factor : float
        Multiplier per increase (> 1).
    stagnation : float
        Increase early when the change drops below this (0 switches it off).
    min_gap : int
        Fewest iterations at one beta before an early increase.
    extra_steps : int
        Further increases past ``beta_max`` that :meth:`extend` may make on request
        (the optimiser asks when a design still stalls grey at ``beta_max``).

    Examples
    --------
    >>> c = BetaContinuation(beta_start=1.0, beta_max=4.0, every=2)
    >>> [c.step(change=0.5) for _ in range(6)]
    [False, True, False, True, False, False]
    >>> c.beta, c.at_max
    (4.0, True)
    """

    def __init__(
        self,
        *,
        beta_start: float,
        beta_max: float,
        every: int,
        factor: float = 2.0,
        stagnation: float = 0.0,
        min_gap: int = 5,
        extra_steps: int = 0,
    ):
        self.beta_start = _check_beta(beta_start)
        self.beta_max = _check_beta(beta_max)
        if self.beta_max < self.beta_start:
            raise ValueError(f"beta_max must be >= beta_start, got {beta_max!r} < {beta_start!r}")
        if int(every) != every or every < 1:
            raise ValueError(f"every must be an integer >= 1, got {every!r}")
        if not factor > 1.0:
            raise ValueError(f"factor must be > 1, got {factor!r}")
        if not stagnation >= 0.0:
            raise ValueError(f"stagnation must be >= 0, got {stagnation!r}")
        if int(min_gap) != min_gap or min_gap < 1:
            raise ValueError(f"min_gap must be an integer >= 1, got {min_gap!r}")
        if int(extra_steps) != extra_steps or extra_steps < 0:
            raise ValueError(f"extra_steps must be an integer >= 0, got {extra_steps!r}")
        self.every = int(every)
        self.factor = float(factor)
        self.extra_steps = int(extra_steps)
        self.stagnation = float(stagnation)
        self.min_gap = int(min_gap)
        self.beta = self.beta_start
        self.since_increase = 0

    @property
    def at_max(self) -> bool:
        """True once beta has reached ``beta_max``."""
        return self.beta >= self.beta_max

    def step(self, *, change: float) -> bool:
        """Record one finished iteration; return True when beta was increased."""
        if self.at_max:
            return False
        self.since_increase += 1
        due = self.since_increase >= self.every
        stalled = (
            self.stagnation > 0.0
            and change < self.stagnation
            and self.since_increase >= self.min_gap
        )
        if not (due or stalled):
            return False
        self.beta = min(self.beta * self.factor, self.beta_max)
        self.since_increase = 0
        return True

    @property
    def beta_limit(self) -> float:
        """Largest beta :meth:`extend` may reach."""
        return self.beta_max * self.factor**self.extra_steps

    def extend(self) -> bool:
        """Once at ``beta_max``, multiply beta by ``factor`` again if ``extra_steps`` allow.

        Returns True when beta was increased.
        """
        if not self.at_max or self.beta * self.factor > self.beta_limit * (1 + 1e-12):
            return False
        self.beta *= self.factor
        self.since_increase = 0
        return True

    def state(self) -> dict:
        """Plain-data state for checkpoints."""
        return {"beta": self.beta, "since_increase": self.since_increase}

    def restore(self, state: dict) -> None:
        """Restore from :meth:`state` output."""
        self.beta = min(max(_check_beta(state["beta"]), self.beta_start), self.beta_limit)
        self.since_increase = int(state["since_increase"])


def _bar_kernel_cdf(dim: int, samples: int = 4001):
    """Cumulative marginal of the unit-radius hat kernel across a straight member.

    In ``dim`` dimensions the density filter weights are max(0, 1 - |r|) (radius 1). A
    straight member (a bar in 2D, a plate in 3D) sees the kernel integrated over the
    directions along it; this returns that marginal's cumulative distribution on [-1, 1].
    """
    s = np.linspace(-1.0, 1.0, samples)
    if dim == 1:
        k = 1.0 - np.abs(s)
    elif dim == 2:
        # integral over t of (1 - sqrt(s^2 + t^2))_+ dt, in closed form
        a = np.sqrt(np.clip(1.0 - s**2, 0.0, None))
        with np.errstate(divide="ignore", invalid="ignore"):
            log_term = np.where(np.abs(s) > 0, np.log((1.0 + a) / np.abs(s)), 0.0)
        k = 2.0 * a - (a + s**2 * log_term)
    else:
        # integral over a disk of (1 - sqrt(s^2 + r^2))_+ 2 pi r dr
        a = np.sqrt(np.clip(1.0 - s**2, 0.0, None))
        k = 2.0 * np.pi * (a**2 / 2.0 - ((1.0) ** 3 - np.abs(s) ** 3) / 3.0)
    k = np.clip(k, 0.0, None)
    c = np.concatenate([[0.0], np.cumsum(0.5 * (k[1:] + k[:-1]) * np.diff(s))])
    c /= c[-1]
    return s, c


def length_scale_radius(
    min_size: float, *, eta_eroded: float = 0.75, eta_blueprint: float = 0.5, dim: int = 2
) -> float:
    """Filter radius that gives a minimum member size in the robust formulation.

    One-dimensional argument of Wang, Lazarov & Sigmund (SMO 43:767-784, 2011), worked
    out here for the hat (cone) density filter across a straight member: the thinnest
    member that still exists in the eroded design (threshold ``eta_eroded``) is a solid
    strip of width b whose filtered value reaches exactly ``eta_eroded`` at its centre; the
    same strip, thresholded at ``eta_blueprint``, is the thinnest member of the blueprint
    (intermediate) design. Its width divided by the filter radius is a constant; this
    returns ``min_size`` divided by that constant. For the void phase use
    ``eta_eroded = 1 - eta_dilated`` and ``eta_blueprint = 1 - eta_blueprint``.

    Parameters
    ----------
    min_size : float
        Wanted smallest member width (length unit, > 0).
    eta_eroded : float
        Threshold of the eroded design, in (eta_blueprint, 1).
    eta_blueprint : float
        Threshold of the blueprint design, in (0, eta_eroded).
    dim : int
        Dimension of the filter kernel (1, 2 or 3).

    Returns
    -------
    float
        Filter radius in the length unit of ``min_size``.

    Examples
    --------
    >>> round(length_scale_radius(1.0, eta_eroded=0.75, eta_blueprint=0.5, dim=1), 6)
    1.0
    """
    min_size = float(min_size)
    if not (math.isfinite(min_size) and min_size > 0.0):
        raise ValueError(f"min_size must be a finite number > 0, got {min_size!r}")
    if dim not in (1, 2, 3):
        raise ValueError(f"dim must be 1, 2 or 3, got {dim!r}")
    if not (0.0 < eta_blueprint < eta_eroded < 1.0):
        raise ValueError(
            "need 0 < eta_blueprint < eta_eroded < 1, got "
            f"eta_blueprint={eta_blueprint!r}, eta_eroded={eta_eroded!r}"
        )
    from scipy.optimize import brentq

    s, c = _bar_kernel_cdf(dim)

    def cdf(t):
        return np.interp(t, s, c, left=0.0, right=1.0)

    def filtered(x, half):
        # filtered value at x of a solid strip [-half, half] (radius 1)
        return cdf(x + half) - cdf(x - half)

    # half width of the strip whose centre reaches eta_eroded
    half = brentq(lambda h: filtered(0.0, h) - eta_eroded, 1e-12, 1.0)
    # where the same strip's filtered field falls to eta_blueprint
    edge = brentq(lambda x: filtered(x, half) - eta_blueprint, 0.0, half + 1.0)
    ratio = 2.0 * edge  # member width per unit filter radius
    return min_size / ratio
