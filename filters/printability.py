"""Layer-wise printability filter for a build direction and an overhang angle.

The filter follows the layer-wise additive-manufacturing filter of Langelaar
(2D: Structural and Multidisciplinary Optimization 55:871-883, 2017; 3D: Additive
Manufacturing 12:60-70, 2016), written here from the published method. The build axis
is moved to the front of the array (and flipped for a minus direction), so layer ``l``
is ``x[l]`` and layer 0 rests on the build plate. The printed density ``xi`` is swept
layer by layer::

    xi[0]    = x[0]                                   (the plate supports layer 0)
    xi[l]    = smin(x[l], Xi[l])                      for l >= 1
    Xi[l]    = smax(values of the support region of the element in the layers below)
    smin(a, b) = 0.5 * (a + b - sqrt((a - b)**2 + epsilon) + sqrt(epsilon))
    smax(c_1..c_Ns) = (sum_k c_k**P) ** (1 / Q),  Q = P + log(Ns) / log(xi0)

``Q`` makes ``smax`` exact when all ``Ns`` inputs equal ``xi0``. The forms of ``smin`` and
``smax``, the ``Q`` correction and the defaults ``epsilon = 1e-4``, ``P = 40``,
``xi0 = 0.5`` are recalled from the papers, not read from them while writing this code.
Also from memory: that layer 0 is passed through unchanged (``xi[0] = x[0]``) rather
than through ``smin(x, 1)``; both say "the plate supports the first layer", ours has no
smoothing error there. Elements of the support region that lie outside the domain count
as void (zero); they add nothing to the P-sum, so ``Ns`` is the same for every element.

Smoothing error (measured and computed for the defaults, 0/1 inputs): printed elements
come out within 0.005 of 1 (smax of equal ones is ``Ns**(1/Q) > 1``, so values slightly
above 1 occur); removed elements come out at most about 0.06, the fixed point of
``a -> smin(1, Ns**(1/Q) a**(P/Q))`` reached along tall unsupported columns (0.059 for
Ns = 3, 0.032 for Ns = 5, 0.017 for Ns = 13). At the 0.5 level the output equals the
exact printable part. Grey inputs are another matter: an element just above 0.5 can sit
on supports just below 0.5 (smin exceeds the smaller input by up to sqrt(epsilon)/2).

Support region and the overhang angle
-------------------------------------
Angles are measured from the build plate along a grid axis; a down-facing surface at
least as steep as the enforced angle prints without support. On square / cubic elements
the grid represents three angles, by two kinds of support region:

* **reach r, one layer** (``tan(angle) = 1 / r``): the support of an element is every
  element of the layer directly below whose lateral offset has Manhattan length <= r.
  ``r = 1`` is the 45 degree rule of the papers: 3 elements in 2D, the element below and
  its 4 face neighbours (5 elements) in 3D. ``r = 2`` enforces atan(1/2) = 26.57 degrees
  (5 elements in 2D, 13 in 3D).
* **rise k, reach 1** (``tan(angle) = k``): an element is supported by the element
  directly below it, or by a face neighbour of that element provided the neighbour
  stands on a column of ``k`` elements (the neighbour and the ``k - 1`` elements under
  it; layers under the plate count as solid). In the smooth filter the column value is
  a ``smin`` fold of those ``k`` printed densities. ``k = 2`` enforces atan(2) = 63.43
  degrees. A plain region over several layers would let a part jump over a powder gap,
  which is why the column must be complete.

Rule for the requested ``overhang_angle``: it must lie in [26.5, 63.5] degrees, and the
enforced angle is the smallest representable angle (26.57, 45, 63.43) that is not below
the requested angle by more than 0.1 degree. Rounding up never lets the filter accept an
overhang shallower than asked: 30 degrees is enforced as 45, 50 as 63.43. Along grid
diagonals (3D) every rule is stricter than along the axes. See
:func:`enforced_overhang_angle`.

Exact logical helpers
---------------------
:func:`supported_mask`, :func:`printable_part`, :func:`unsupported_count` and
:func:`overhang_area` apply the same support rule to boolean (0/1) designs with plain
logic, without smoothing; they are what the build analysis and the reports use.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba
import numpy as np

__all__ = [
    "DIRECTIONS",
    "REPRESENTABLE_ANGLES",
    "PrintabilityFilter",
    "enforced_overhang_angle",
    "overhang_area",
    "printability_filter",
    "printable_part",
    "supported_mask",
    "unsupported_count",
]

#: Axis build directions for 2D and 3D domains.
DIRECTIONS = {2: ("+x", "-x", "+y", "-y"), 3: ("+x", "-x", "+y", "-y", "+z", "-z")}

_AXIS_INDEX = {"x": 0, "y": 1, "z": 2}


@dataclass(frozen=True)
class _SupportRule:
    angle: float  # degrees, along a grid axis
    reach: int  # lateral Manhattan reach in one layer
    rise: int  # layers of column needed under a side neighbour


_RULES = (
    _SupportRule(math.degrees(math.atan(0.5)), reach=2, rise=1),
    _SupportRule(45.0, reach=1, rise=1),
    _SupportRule(math.degrees(math.atan(2.0)), reach=1, rise=2),
)

#: The overhang angles (degrees) that the grid represents.
REPRESENTABLE_ANGLES = tuple(rule.angle for rule in _RULES)

_ANGLE_RANGE = (26.5, 63.5)
_ANGLE_SLACK = 0.1  # degrees a requested angle may exceed the enforced one


def _rule_for(overhang_angle: float) -> _SupportRule:
    if isinstance(overhang_angle, bool) or not isinstance(
        overhang_angle, (int, float, np.integer, np.floating)
    ):
        raise TypeError(
            f"overhang_angle must be a number of degrees, got {type(overhang_angle).__name__}"
        )
    angle = float(overhang_angle)
    low, high = _ANGLE_RANGE
    if not (math.isfinite(angle) and low <= angle <= high):
        shown = ", ".join(f"{a:.2f}" for a in REPRESENTABLE_ANGLES)
        raise ValueError(
            f"overhang_angle must be between {low} and {high} degrees (the grid represents "
            f"{shown} degrees; other angles in the range are rounded up), got {overhang_angle!r}"
        )
    for rule in _RULES:
        if rule.angle >= angle - _ANGLE_SLACK:
            return rule
    raise AssertionError("unreachable: the range check covers every rule")  # pragma: no cover


def enforced_overhang_angle(overhang_angle: float) -> float:
    """Return the overhang angle the grid actually enforces for a requested angle.

    Parameters
    ----------
    overhang_angle : float
        Requested smallest printable angle between a down-facing surface and the build
        plate, in degrees, within [26.5, 63.5].

    Returns
    -------
    float
        The smallest representable angle (atan(1/2) = 26.57, 45 or atan(2) = 63.43
        degrees) not below the request by more than 0.1 degree.

    Raises
    ------
    ValueError
        If the angle lies outside [26.5, 63.5] degrees or is not finite.
    TypeError
        If the angle is not a number.

    Examples
    --------
    >>> enforced_overhang_angle(45.0)
    45.0
    >>> round(enforced_overhang_angle(30.0), 2), round(enforced_overhang_angle(60.0), 2)
    (45.0, 63.43)
    """
    return _rule_for(overhang_angle).angle


def _check_direction(direction: str, ndim: int) -> tuple[int, int]:
    allowed = DIRECTIONS.get(ndim)
    if allowed is None:
        raise ValueError(f"shape must have 2 or 3 axes, got {ndim}")
    if not isinstance(direction, str) or direction not in allowed:
        raise ValueError(
            f"direction must be one of {', '.join(allowed)} for a {ndim}D domain, got {direction!r}"
        )
    return _AXIS_INDEX[direction[1]], (1 if direction[0] == "+" else -1)


def _to_layers(a: np.ndarray, axis: int, sign: int) -> np.ndarray:
    """Grid-shaped array -> (layers, lateral_a, lateral_b), layer 0 on the plate."""
    v = np.moveaxis(a, axis, 0)
    if sign < 0:
        v = v[::-1]
    if v.ndim == 2:
        v = v[:, :, None]
    return v


def _from_layers(v: np.ndarray, axis: int, sign: int, ndim: int) -> np.ndarray:
    if ndim == 2:
        v = v[:, :, 0]
    if sign < 0:
        v = v[::-1]
    return np.moveaxis(v, 0, axis)


def _offsets(ndim: int, reach: int) -> np.ndarray:
    """Lateral offsets with Manhattan length <= reach; (0, 0) first."""
    out = [(0, 0)]
    second = range(-reach, reach + 1) if ndim == 3 else (0,)
    for da in range(-reach, reach + 1):
        for db in second:
            if (da, db) != (0, 0) and abs(da) + abs(db) <= reach:
                out.append((da, db))
    return np.array(out, dtype=np.int64)


# ----------------------------------------------------------------------------------
# smooth filter kernels (numba): arrays are (layers, a, b) in the build frame
# ----------------------------------------------------------------------------------


@numba.njit(cache=True)
def _column(xi, ly, rise, eps, sq, col):  # noqa: D103 - kernel
    # smin fold of the printed densities at layers ly-1 .. ly-rise; under the plate = solid
    n_a, n_b = col.shape
    for a in range(n_a):
        for b in range(n_b):
            v = xi[ly - 1, a, b]
            for j in range(2, rise + 1):
                if ly - j < 0:
                    break
                w = xi[ly - j, a, b]
                d = v - w
                v = 0.5 * (v + w - math.sqrt(d * d + eps) + sq)
            col[a, b] = v


@numba.njit(cache=True)
def _candidate(xi, col, ly, a, b, da, db, rise):  # noqa: D103 - kernel
    n_a, n_b = col.shape
    aa = a + da
    bb = b + db
    if aa < 0 or aa >= n_a or bb < 0 or bb >= n_b:
        return -1.0, aa, bb, False  # outside the domain: no support
    if rise == 1 or (da == 0 and db == 0):
        return max(xi[ly - 1, aa, bb], 0.0), aa, bb, True
    return max(col[aa, bb], 0.0), aa, bb, False


@numba.njit(cache=True)
def _power(r, p, p_int):  # noqa: D103 - kernel
    # r**p; integer exponents (the default P = 40) by repeated squaring, several times
    # faster than the general pow, which dominates the cost of the filter
    if p_int < 0:
        return r**p
    out = 1.0
    base = r
    n = p_int
    while n > 0:
        if n & 1:
            out *= base
        base *= base
        n >>= 1
    return out


@numba.njit(cache=True)
def _forward_kernel(x, keep, offsets, rise, eps, p, p_int, q, xi, support, top, psum):  # noqa: D103
    # Also stores, per element, the largest support value (top) and the scaled P-sum
    # (psum) so that backward needs no second pass over the support region. Elements
    # with keep = 1 print as their input whatever lies below (xi = x).
    n_l, n_a, n_b = x.shape
    sq = math.sqrt(eps)
    n_s = offsets.shape[0]
    col = np.zeros((n_a, n_b))
    for a in range(n_a):
        for b in range(n_b):
            xi[0, a, b] = x[0, a, b]
            support[0, a, b] = 1.0
            top[0, a, b] = 0.0
            psum[0, a, b] = 0.0
    for ly in range(1, n_l):
        if rise > 1:
            _column(xi, ly, rise, eps, sq, col)
        for a in range(n_a):
            for b in range(n_b):
                m = 0.0
                for n in range(n_s):
                    c, _, _, _ = _candidate(xi, col, ly, a, b, offsets[n, 0], offsets[n, 1], rise)
                    if c > m:
                        m = c
                big = 0.0
                s = 0.0
                if m > 0.0:
                    for n in range(n_s):
                        c, _, _, _ = _candidate(
                            xi, col, ly, a, b, offsets[n, 0], offsets[n, 1], rise
                        )
                        if c > 0.0:
                            s += _power(c / m, p, p_int)
                    # (sum c^P)^(1/Q) scaled by the largest value, so nothing underflows
                    big = m ** (p / q) * s ** (1.0 / q)
                top[ly, a, b] = m
                psum[ly, a, b] = s
                support[ly, a, b] = big
                if keep[ly, a, b]:
                    xi[ly, a, b] = x[ly, a, b]
                    continue
                d = x[ly, a, b] - big
                xi[ly, a, b] = 0.5 * (x[ly, a, b] + big - math.sqrt(d * d + eps) + sq)


@numba.njit(cache=True)
def _backward_kernel(x, keep, xi, support, top, psum, offsets, rise, eps, p, p_int, q, dy, dx):  # noqa: D103
    n_l, n_a, n_b = x.shape
    sq = math.sqrt(eps)
    n_s = offsets.shape[0]
    lam = dy.copy()  # adjoint of the printed density, completed layer by layer downwards
    col = np.zeros((n_a, n_b))
    gcol = np.zeros((n_a, n_b))
    fold = np.zeros(rise + 1)
    for ly in range(n_l - 1, 0, -1):
        if rise > 1:
            _column(xi, ly, rise, eps, sq, col)
            gcol[:, :] = 0.0
        for a in range(n_a):
            for b in range(n_b):
                g = lam[ly, a, b]
                if keep[ly, a, b]:
                    dx[ly, a, b] = g  # xi = x: nothing flows to the supports below
                    continue
                big = support[ly, a, b]
                d = x[ly, a, b] - big
                r = math.sqrt(d * d + eps)
                dx[ly, a, b] = g * 0.5 * (1.0 - d / r)
                gbig = g * 0.5 * (1.0 + d / r)
                m = top[ly, a, b]
                if gbig == 0.0 or m == 0.0:
                    continue  # all supports zero: the smax gradient vanishes in the limit
                coef = gbig * (p / q) * m ** (p / q - 1.0) * psum[ly, a, b] ** (1.0 / q - 1.0)
                for n in range(n_s):
                    c, aa, bb, direct = _candidate(
                        xi, col, ly, a, b, offsets[n, 0], offsets[n, 1], rise
                    )
                    if c <= 0.0:
                        continue
                    gc = coef * _power(c / m, p - 1.0, p_int - 1)
                    if direct:
                        lam[ly - 1, aa, bb] += gc
                    else:
                        gcol[aa, bb] += gc
        if rise > 1:
            last = min(rise, ly)
            for a in range(n_a):
                for b in range(n_b):
                    gf = gcol[a, b]
                    if gf == 0.0:
                        continue
                    fold[1] = xi[ly - 1, a, b]
                    for j in range(2, last + 1):
                        w = xi[ly - j, a, b]
                        dd = fold[j - 1] - w
                        fold[j] = 0.5 * (fold[j - 1] + w - math.sqrt(dd * dd + eps) + sq)
                    for j in range(last, 1, -1):
                        w = xi[ly - j, a, b]
                        dd = fold[j - 1] - w
                        r = math.sqrt(dd * dd + eps)
                        lam[ly - j, a, b] += gf * 0.5 * (1.0 + dd / r)
                        gf *= 0.5 * (1.0 - dd / r)
                    lam[ly - 1, a, b] += gf
    for a in range(n_a):
        for b in range(n_b):
            dx[0, a, b] = lam[0, a, b]


class PrintabilityFilter:
    """The smoothed layer-wise printability filter; build with :func:`printability_filter`.

    The object keeps the last ``forward`` input and the printed densities, because
    ``backward`` is the vector-Jacobian product at that input.
    """

    def __init__(self, shape, *, direction, overhang_angle, epsilon, p, xi0, keep=None):
        self.shape = tuple(int(n) for n in shape)
        self.direction = direction
        self._axis, self._sign = _check_direction(direction, len(self.shape))
        if keep is None:
            keep = np.zeros(self.shape, dtype=bool)
        keep = np.asarray(keep)
        if keep.shape != self.shape or keep.dtype != bool:
            raise ValueError(f"keep must be a boolean array of shape {self.shape}, got "
                             f"{keep.dtype} {keep.shape}")
        self._keep = np.ascontiguousarray(_to_layers(keep, self._axis, self._sign)).astype(np.uint8)
        rule = _rule_for(overhang_angle)
        self.overhang_angle = float(overhang_angle)
        self.enforced_angle = rule.angle
        self.reach, self.rise = rule.reach, rule.rise
        self._offsets = _offsets(len(self.shape), rule.reach)
        self.support_size = int(self._offsets.shape[0])
        self.epsilon, self.p, self.xi0 = float(epsilon), float(p), float(xi0)
        # integer exponents up to 64 take the fast path of _power
        self._p_int = int(self.p) if self.p == int(self.p) and 1 <= self.p <= 64 else -1
        self.q = self.p + math.log(self.support_size) / math.log(self.xi0)
        if self.q <= 0.0:
            raise ValueError(
                f"p must exceed log(Ns)/log(1/xi0) = {self.p - self.q:.3g} for a support "
                f"region of {self.support_size} elements, got p={p!r}"
            )
        self._last = None

    def __repr__(self) -> str:
        return (
            f"PrintabilityFilter(shape={self.shape}, direction={self.direction!r}, "
            f"enforced_angle={self.enforced_angle:.2f})"
        )

    def _frame(self, a: np.ndarray, name: str) -> np.ndarray:
        arr = np.asarray(a, dtype=float)
        if arr.shape != self.shape:
            raise ValueError(f"{name} must have shape {self.shape}, got {arr.shape}")
        if not np.all(np.isfinite(arr)):
            raise ValueError(f"{name} must be finite")
        return np.ascontiguousarray(_to_layers(arr, self._axis, self._sign))

    def forward(self, x: np.ndarray) -> np.ndarray:
        """Return the printed density of the blueprint density ``x`` (grid shape)."""
        xl = self._frame(x, "x")
        if xl.size and xl.min() < -1e-9:
            raise ValueError(f"x must be non-negative, got a minimum of {xl.min():.3g}")
        xi, support, top, psum = (np.empty_like(xl) for _ in range(4))
        _forward_kernel(
            xl,
            self._keep,
            self._offsets,
            self.rise,
            self.epsilon,
            self.p,
            self._p_int,
            self.q,
            xi,
            support,
            top,
            psum,
        )
        self._last = (xl, xi, support, top, psum)
        return np.ascontiguousarray(_from_layers(xi, self._axis, self._sign, len(self.shape)))

    def backward(self, dy: np.ndarray) -> np.ndarray:
        """Vector-Jacobian product ``J(x)^T dy`` at the last ``forward`` input."""
        if self._last is None:
            raise ValueError("backward needs a forward call first")
        dyl = self._frame(dy, "dy")
        xl, xi, support, top, psum = self._last
        dx = np.empty_like(xl)
        _backward_kernel(
            xl,
            self._keep,
            xi,
            support,
            top,
            psum,
            self._offsets,
            self.rise,
            self.epsilon,
            self.p,
            self._p_int,
            self.q,
            dyl,
            dx,
        )
        return np.ascontiguousarray(_from_layers(dx, self._axis, self._sign, len(self.shape)))


def printability_filter(
    shape: tuple[int, ...],
    *,
    direction: str,
    overhang_angle: float = 45.0,
    epsilon: float = 1e-4,
    p: float = 40.0,
    xi0: float = 0.5,
    keep: np.ndarray | None = None,
) -> PrintabilityFilter:
    """Make the smoothed layer-wise printability filter for a grid and build direction.

    Parameters
    ----------
    shape : tuple of int
        Elements along x, y (and z).
    direction : str
        Build direction, ``"+x"``, ``"-x"``, ``"+y"``, ``"-y"`` (and ``"+z"``, ``"-z"``
        in 3D). ``"+y"`` stacks layers towards +y with the plate at y = 0.
    overhang_angle : float
        Smallest printable angle from the plate in degrees; see
        :func:`enforced_overhang_angle` for the angle actually enforced.
    epsilon : float
        Smoothing parameter of the smooth minimum (> 0).
    p : float
        Exponent of the P-mean smooth maximum (> 0).
    xi0 : float
        Density at which the smooth maximum is exact for equal inputs, in (0, 1).
    keep : ndarray of bool, optional
        Elements that print as they are whatever lies below them: keep-in regions the
        user requires, which build preparation will support if the design does not.
        They support the elements above them like any printed element.

    Returns
    -------
    PrintabilityFilter
        An object with ``forward(x)`` and ``backward(dy)``.

    Examples
    --------
    >>> f = printability_filter((3, 3), direction="+y")
    >>> x = np.zeros((3, 3)); x[1, 2] = 1.0      # one element floating in the top layer
    >>> float(f.forward(x).max()) < 0.01
    True
    """
    if not isinstance(shape, (tuple, list)) or len(shape) not in (2, 3):
        raise ValueError(f"shape must be a tuple of 2 or 3 element counts, got {shape!r}")
    if any(isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1 for n in shape):
        raise ValueError(f"shape entries must be positive integers, got {shape!r}")
    for name, value in (("epsilon", epsilon), ("p", p), ("xi0", xi0)):
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
            raise TypeError(f"{name} must be a number, got {type(value).__name__}")
    if not (math.isfinite(epsilon) and epsilon > 0):
        raise ValueError(f"epsilon must be positive, got {epsilon!r}")
    if not (math.isfinite(p) and p > 0):
        raise ValueError(f"p must be positive, got {p!r}")
    if not (0.0 < xi0 < 1.0):
        raise ValueError(f"xi0 must lie in (0, 1), got {xi0!r}")
    return PrintabilityFilter(
        shape, direction=direction, overhang_angle=overhang_angle, epsilon=epsilon, p=p, xi0=xi0,
        keep=keep,
    )


# ----------------------------------------------------------------------------------
# exact logical helpers
# ----------------------------------------------------------------------------------


def _as_solid(solid: np.ndarray) -> np.ndarray:
    arr = np.asarray(solid)
    if arr.dtype == bool:
        return arr
    if not np.issubdtype(arr.dtype, np.number):
        raise TypeError(f"solid must be a boolean or numeric array, got dtype {arr.dtype}")
    return arr > 0.5  # a density array is read at the 0.5 level


def _shifted(layer: np.ndarray, da: int, db: int) -> np.ndarray:
    """out[a, b] = layer[a + da, b + db], False outside the domain."""
    n_a, n_b = layer.shape
    out = np.zeros_like(layer)
    a0, a1 = max(0, -da), min(n_a, n_a - da)
    b0, b1 = max(0, -db), min(n_b, n_b - db)
    if a0 < a1 and b0 < b1:
        out[a0:a1, b0:b1] = layer[a0 + da : a1 + da, b0 + db : b1 + db]
    return out


def _has_support(below: np.ndarray, ly: int, offsets: np.ndarray, rise: int) -> np.ndarray:
    """Whether the support region of each element of layer index ly (>= 1) holds solid."""
    direct = below[ly - 1]
    if rise > 1:
        column = below[ly - 1].copy()
        for j in range(2, rise + 1):
            if ly - j < 0:
                break  # under the plate counts as solid
            column &= below[ly - j]
    else:
        column = direct
    found = direct.copy()
    for da, db in offsets[1:]:
        found |= _shifted(column, int(da), int(db))
    return found


def _prepare(solid, direction, overhang_angle):
    arr = _as_solid(solid)
    axis, sign = _check_direction(direction, arr.ndim)
    rule = _rule_for(overhang_angle)
    return arr, axis, sign, _offsets(arr.ndim, rule.reach), rule.rise


def _layer_sweep(solid, direction, overhang_angle, *, printed_only: bool) -> np.ndarray:
    """Solid elements with support below, layer by layer from the plate.

    ``printed_only`` counts as support only what itself printed (the printable part);
    otherwise any solid element below counts (the supported mask).
    """
    arr, axis, sign, offsets, rise = _prepare(solid, direction, overhang_angle)
    layers = _to_layers(arr, axis, sign)
    out = np.zeros_like(layers)
    if layers.shape[0]:
        out[0] = layers[0]
    for ly in range(1, layers.shape[0]):
        out[ly] = layers[ly] & _has_support(out if printed_only else layers, ly, offsets, rise)
    return _from_layers(out, axis, sign, arr.ndim).copy()


def supported_mask(
    solid: np.ndarray, *, direction: str, overhang_angle: float = 45.0
) -> np.ndarray:
    """Solid elements that rest on the plate or have solid in their support region below.

    Parameters
    ----------
    solid : ndarray of bool (or density, read at the 0.5 level)
        Design in grid shape (x, y[, z]).
    direction : str
        Build direction, e.g. ``"+y"``.
    overhang_angle : float
        Overhang angle in degrees (see :func:`enforced_overhang_angle`).

    Returns
    -------
    ndarray of bool
        True for supported solid elements; False for void and for unsupported solid.

    Examples
    --------
    >>> s = np.array([[1, 1, 0], [0, 0, 0], [0, 0, 1]], dtype=bool)  # (2, 2) floats
    >>> supported_mask(s, direction="+y").astype(int).tolist()
    [[1, 1, 0], [0, 0, 0], [0, 0, 0]]
    """
    return _layer_sweep(solid, direction, overhang_angle, printed_only=False)


def printable_part(
    solid: np.ndarray, *, direction: str, overhang_angle: float = 45.0
) -> np.ndarray:
    """Return what actually prints, by a plain logical layer sweep from the plate.

    An element prints when it is solid and the support region below it holds printed
    elements (layer 0 always rests on the plate).

    Parameters
    ----------
    solid : ndarray of bool (or density, read at the 0.5 level)
        Design in grid shape.
    direction : str
        Build direction.
    overhang_angle : float
        Overhang angle in degrees.

    Returns
    -------
    ndarray of bool
        The printed part, a subset of ``solid``.

    Examples
    --------
    >>> s = np.array([[1, 0, 0, 1], [0, 0, 0, 0], [0, 1, 1, 1]], dtype=bool)
    >>> printable_part(s, direction="+y").astype(int).tolist()
    [[1, 0, 0, 0], [0, 0, 0, 0], [0, 0, 0, 0]]
    """
    return _layer_sweep(solid, direction, overhang_angle, printed_only=True)


def unsupported_count(solid: np.ndarray, *, direction: str, overhang_angle: float = 45.0) -> int:
    """Count solid elements with no solid element in their support region below.

    Parameters
    ----------
    solid : ndarray of bool (or density, read at the 0.5 level)
        Design in grid shape.
    direction : str
        Build direction.
    overhang_angle : float
        Overhang angle in degrees.

    Returns
    -------
    int
        Zero exactly when the design is its own printable part.

    Examples
    --------
    >>> unsupported_count(np.array([[0.9, 0.2, 0.8]]), direction="+y")
    1
    """
    arr = _as_solid(solid)
    mask = supported_mask(arr, direction=direction, overhang_angle=overhang_angle)
    return int(np.count_nonzero(arr & ~mask))


def overhang_area(
    solid: np.ndarray,
    *,
    direction: str,
    overhang_angle: float = 45.0,
    element_size: float,
    thickness: float = 1.0,
) -> float:
    """Area of down-facing faces that violate the overhang rule.

    The bottom face of every unsupported solid element faces powder (the element
    directly below is part of its support region, so it is void) and needs support.
    The area is that face count times ``element_size * thickness`` in 2D (a length times
    the out-of-plane thickness) or ``element_size**2`` in 3D.

    Parameters
    ----------
    solid : ndarray of bool (or density, read at the 0.5 level)
        Design in grid shape.
    direction : str
        Build direction.
    overhang_angle : float
        Overhang angle in degrees.
    element_size : float
        Edge length of an element.
    thickness : float
        Out-of-plane thickness (2D only).

    Returns
    -------
    float

    Examples
    --------
    >>> overhang_area(np.array([[1, 0, 1]]), direction="+y", element_size=0.5)
    0.5
    """
    if not (isinstance(element_size, (int, float)) and element_size > 0):
        raise ValueError(f"element_size must be a positive number, got {element_size!r}")
    arr = _as_solid(solid)
    face = element_size * thickness if arr.ndim == 2 else element_size**2
    return unsupported_count(arr, direction=direction, overhang_angle=overhang_angle) * face
