"""Layer-wise printability filter for any build direction and overhang angle.

The filter generalises the layer-wise additive-manufacturing filter of Langelaar
(2D: Structural and Multidisciplinary Optimization 55:871-883, 2017; 3D: Additive
Manufacturing 12:60-70, 2016), written here from the published method, to a build
direction given as any vector and an overhang angle between 20 and 70 degrees. The
support region of an element is the part of the cone below it (the cone of half-angle
90 degrees minus the overhang angle around the downward build direction), reaching a
few elements deep, as in the cone-shaped support regions of Gaynor & Guest
(Structural and Multidisciplinary Optimization 54:1157-1172, 2016); the discretisation
of that cone on the voxel grid, described below, is ours.

Rule (exact, 0/1 designs)
-------------------------
Heights are measured along the unit build direction ``d`` (see :mod:`filters.direction`);
elements are visited from the lowest height up. An element *prints* when it is solid
and either rests on the build plate or is held by a *strut*: an offset ``o`` of the
support stencil such that the element ``q = p + o`` below it prints and so does every
element on the straight line from ``q`` up to ``p`` (sampled once per unit of depth, each
sample taken to the nearby element on the inner side of the line, see ``_strut``). The stencil holds the offsets
``o`` whose depth ``-o . d`` lies in (0, D] and whose angle from straight down is at
most 90 degrees minus the overhang angle. A straight strut inside the cone is what
a down-facing surface at least as steep as the overhang angle offers below each of its
elements; requiring the whole strut (not only its foot) to print keeps a part from
jumping sideways over a powder gap. Positions outside the domain are void, except
on or under the plate (inside the domain too, when the plate is
raised), which holds everything. The depth ``D`` (1 to 12 elements) is chosen
per direction and angle: the smallest for which the shallowest overhang the stencil
accepts in some direction around the build axis is within 1 degree of the angle asked
and the steepest it demands is within 10 degrees (see :func:`support_stencil`). For
the axis directions at 45 degrees the stencil is the element below and its face
neighbours in that layer (3 in 2D, 5 in 3D): the rule of the papers.

Smooth filter
-------------
The printed density ``xi`` follows the same sweep with the smooth minimum and maximum of
the papers::

    xi_p = x_p                                       (on the plate)
    xi_p = smin(x_p, smax over o of v_o)             otherwise
    v_o  = smin fold of xi over q and the strut of o
    smin(a, b) = 0.5 * (a + b - sqrt((a - b)**2 + epsilon) + sqrt(epsilon))
    smax(c_1..c_Ns) = (sum_k c_k**P) ** (1 / Q),  Q = P + log(Ns) / log(xi0)

``Q`` makes ``smax`` exact when all ``Ns`` inputs equal ``xi0``. The forms of ``smin`` and
``smax``, the ``Q`` correction and the defaults ``epsilon = 1e-4``, ``P = 40``,
``xi0 = 0.5`` are recalled from the papers, not read from them while writing this code.
The optimiser uses ``P = 80`` (problem key ``build.smooth_max_power``): ``smax`` of a single
support ``c`` is ``c**(P/Q) < c``, a loss that compounds layer by layer where a thin strut
feeds a wide region, and 80 halves it (measured there).
The adjoint is a reverse sweep in falling height (exact; checked by finite
differences in the tests).

The smooth sweeps are arranged for speed without changing the formula: the grid is
padded by the stencil's reach so that every strut member is a fixed flat offset, and the
height order is cut into bands narrower than the shallowest strut member, whose
elements never read each other and are computed together in SIMD lanes (a member place
shared by several struts is read once per band). The forward keeps the derivative
ratios of its smooth minima and maxima for the backward when they fit in 32 MB (else
the backward folds the struts again, with the same operations). The forward does the
same floating-point operations as an element-by-element sweep; the backward adds the
same terms in another order (``tests/filters/test_printability_reference.py`` keeps
the straightforward sweeps and compares).

Keep-in elements (``keep``) are handled in one of two ways. ``keep_mode="print"``: they
print as their input whatever lies below them (supports will be added under them) and
hold up what is built on them. ``keep_mode="hold"``: the sweep treats them like any
element, so they count as printed only when something holds them; the output still
carries their input value (the analysis never loses them), and
:meth:`PrintabilityFilter.keep_printed` gives their printed density for a constraint.
"""

from __future__ import annotations

import functools
import itertools
import math
from dataclasses import dataclass

import numba
import numpy as np

from filters.direction import AXIS_NAMES, element_heights, lateral_frame, plate_level, unit_vector

__all__ = [
    "ANGLE_RANGE",
    "DIRECTIONS",
    "PrintabilityFilter",
    "Stencil",
    "enforced_overhang_angle",
    "overhang_area",
    "printability_filter",
    "printable_part",
    "support_stencil",
    "supported_mask",
    "unsupported_count",
]

#: Axis build directions for 2D and 3D domains (vectors are accepted too).
DIRECTIONS = AXIS_NAMES

#: Overhang angles (degrees) the filter accepts.
ANGLE_RANGE = (20.0, 70.0)

_MAX_DEPTH = 12
_MIN_EXCESS = 1.0  # degrees: the shallowest accepted overhang is at most this much steeper
_MAX_EXCESS = 10.0  # degrees: ... and the steepest demanded at most this much
_AZIMUTHS = 720
_KEPT_LIMIT = 1 << 22  # numbers the forward keeps for the backward, at most (32 MB)


# ----------------------------------------------------------------------------------
# the support stencil
# ----------------------------------------------------------------------------------


@dataclass(frozen=True)
class Stencil:
    """The support stencil of one build direction and overhang angle.

    Attributes
    ----------
    direction : ndarray
        Unit build direction (3 entries; the third is 0 for a 2D domain).
    overhang_angle : float
        The angle asked, degrees.
    depth : int
        Reach ``D`` of the stencil along the build direction, elements.
    offsets : ndarray of int, shape (N, 3)
        Offset ``o`` of the foot ``q = p + o`` of each strut.
    members : ndarray of int, shape (M, 3)
        Elements every strut needs, foot first then upwards; strut ``k`` owns rows
        ``starts[k]:starts[k + 1]``.
    starts : ndarray of int, shape (N + 1,)
    enforced_angle : float
        Shallowest overhang (degrees) the stencil accepts in any direction around the
        build axis: never below the angle asked.
    steepest_angle : float
        Steepest overhang it demands in the least favourable direction around the axis.
    """

    direction: np.ndarray
    overhang_angle: float
    depth: int
    offsets: np.ndarray
    members: np.ndarray
    starts: np.ndarray
    enforced_angle: float
    steepest_angle: float

    @property
    def size(self) -> int:
        """Number of struts (the ``Ns`` of the smooth maximum)."""
        return int(self.offsets.shape[0])


def _strut(o: np.ndarray, d: np.ndarray) -> list[tuple[int, ...]] | None:
    """Members of the strut of offset ``o``: its foot, then one per unit of depth upwards.

    None when a member would not lie below the element held.

    Each sample point of the line from the foot to the element held is taken to the
    corner element of its cell that lies furthest towards the inside of a surface
    through the line (up along ``d`` and sideways towards the foot): on a down-facing
    plane at least as steep as the strut, that element is solid whenever the line is.
    """
    h = -float(o @ d)
    n = math.ceil(h - 1e-9)
    lateral = o + h * d
    size = float(np.linalg.norm(lateral))
    inside = d * size + (lateral / size if size > 1e-12 else 0.0) * h
    out = [tuple(int(v) for v in o)]
    for k in range(n - 1, 0, -1):
        v = o * (k / n)
        corners = itertools.product(*[sorted({math.floor(c + 1e-9), math.ceil(c - 1e-9)})
                                      for c in v])
        best, score = None, -math.inf
        for c in corners:
            u = np.array(c, dtype=float)
            if -float(u @ d) <= 1e-9 or not any(c):
                continue
            value = float(u @ inside)
            if value > score + 1e-12:
                best, score = c, value
        if best is None:
            return None
        key = tuple(int(c) for c in best)
        if key != out[-1]:
            out.append(key)
    return out


def _lateral_directions(d: np.ndarray, ndim: int) -> np.ndarray:
    """Unit vectors normal to ``d``: two in 2D, ``_AZIMUTHS`` around the axis in 3D."""
    if ndim == 2:
        side = np.array([-d[1], d[0], 0.0])
        return np.array([side, -side])
    e1, e2 = lateral_frame(d)
    t = np.linspace(0.0, 2.0 * math.pi, _AZIMUTHS, endpoint=False)
    return np.cos(t)[:, None] * e1 + np.sin(t)[:, None] * e2


def _accepted_angles(offsets: np.ndarray, d: np.ndarray, ndim: int) -> np.ndarray:
    """Shallowest overhang accepted per direction around the axis, degrees.

    A down-facing plane whose overhang leans towards lateral direction ``a`` passes
    when some strut reaches into the solid above it, that is when the strut's lateral
    reach along ``a`` per unit of depth is at least cot(angle).
    """
    lateral = _lateral_directions(d, ndim)
    if offsets.size == 0:
        return np.full(lateral.shape[0], 90.0)
    o = offsets.astype(float)
    depth = -(o @ d)
    reach = (o @ lateral.T) / depth[:, None]
    best = np.maximum(reach.max(axis=0), 0.0)
    return np.degrees(np.arctan2(1.0, best))


def _candidates(d: np.ndarray, angle: float, depth: int, ndim: int):
    beta = math.radians(90.0 - angle)
    cos_b = math.cos(beta)
    r = math.ceil(depth / cos_b) + 1
    span = range(-r, r + 1)
    third = span if ndim == 3 else (0,)
    offsets, struts = [], []
    for i, j, k in itertools.product(span, span, third):
        o = np.array([i, j, k], dtype=float)
        h = -float(o @ d)
        if h <= 1e-9 or h > depth + 1e-9 or h < float(np.linalg.norm(o)) * cos_b - 1e-9:
            continue
        strut = _strut(o, d)
        if strut is not None:
            offsets.append((i, j, k))
            struts.append(strut)
    return offsets, struts


def _prune(offsets, struts):
    """Drop struts that need a superset of another strut's elements (never decisive)."""
    sets = [frozenset(s) for s in struts]
    keep = []
    for a, sa in enumerate(sets):
        redundant = any(
            (sb < sa) or (sb == sa and b < a) for b, sb in enumerate(sets) if b != a
        )
        if not redundant:
            keep.append(a)
    return [offsets[a] for a in keep], [struts[a] for a in keep]


@functools.lru_cache(maxsize=256)
def _stencil_cached(d_key: tuple[float, ...], angle: float, ndim: int) -> Stencil:
    d = np.array(d_key + (0.0,) * (3 - len(d_key)), dtype=float)
    entries = []
    for depth in range(1, _MAX_DEPTH + 1):
        offsets, struts = _candidates(d, angle, depth, ndim)
        accepted = _accepted_angles(np.array(offsets, dtype=float).reshape(-1, 3), d, ndim)
        low, high = float(accepted.min()), float(accepted.max())
        entries.append((depth, offsets, struts, low, high))
        if low - angle <= _MIN_EXCESS and high - angle <= _MAX_EXCESS:
            break
    # the first depth meeting both bounds; else the closest shallowest angle, then the
    # smallest spread around the axis
    chosen = entries[-1]
    if not (chosen[3] - angle <= _MIN_EXCESS and chosen[4] - angle <= _MAX_EXCESS):
        chosen = min(entries, key=lambda en: (max(en[3] - angle, _MIN_EXCESS), en[4], en[0]))
    depth, offsets, struts, low, high = chosen
    offsets, struts = _prune(offsets, struts)
    members = np.array([m for s in struts for m in s], dtype=np.int64).reshape(-1, 3)
    starts = np.cumsum([0] + [len(s) for s in struts]).astype(np.int64)
    return Stencil(
        direction=d,
        overhang_angle=angle,
        depth=depth,
        offsets=np.array(offsets, dtype=np.int64).reshape(-1, 3),
        members=members,
        starts=starts,
        enforced_angle=low,
        steepest_angle=high,
    )


def _check_angle(overhang_angle) -> float:
    if isinstance(overhang_angle, bool) or not isinstance(
        overhang_angle, (int, float, np.integer, np.floating)
    ):
        raise TypeError(
            f"overhang_angle must be a number of degrees, got {type(overhang_angle).__name__}"
        )
    angle = float(overhang_angle)
    low, high = ANGLE_RANGE
    if not (math.isfinite(angle) and low <= angle <= high):
        raise ValueError(
            f"overhang_angle must be between {low:g} and {high:g} degrees, got {overhang_angle!r}"
        )
    return angle


def support_stencil(direction, overhang_angle: float, ndim: int) -> Stencil:
    """The support stencil for a build direction (name or vector) and overhang angle.

    Parameters
    ----------
    direction : str or sequence of float
        Build direction, an axis name such as ``"+z"`` or a vector.
    overhang_angle : float
        Smallest printable angle between a down-facing surface and the plate, degrees,
        within :data:`ANGLE_RANGE`.
    ndim : int
        2 or 3.

    Returns
    -------
    Stencil

    Examples
    --------
    >>> s = support_stencil("+y", 45.0, 2)
    >>> s.depth, s.size, s.enforced_angle
    (1, 3, 45.0)
    >>> s = support_stencil([0.0, 1.0, 1.0], 40.0, 3)
    >>> bool(40.0 <= s.enforced_angle <= 41.0)
    True
    """
    angle = _check_angle(overhang_angle)
    d = unit_vector(direction, ndim)
    key = tuple(round(float(v), 12) + 0.0 for v in d)
    return _stencil_cached(key, round(angle, 9), ndim)


def enforced_overhang_angle(overhang_angle: float, direction="+z", ndim: int = 3) -> float:
    """The overhang angle the grid actually enforces for a requested angle and direction.

    The shallowest down-facing surface the support stencil accepts, over all directions
    around the build axis: never below the angle asked, and within 1 degree of it for
    the default choice of stencil depth (see :func:`support_stencil`).

    Examples
    --------
    >>> enforced_overhang_angle(45.0)
    45.0
    >>> bool(30.0 <= enforced_overhang_angle(30.0, "+y", 2) <= 31.0)
    True
    """
    return support_stencil(direction, overhang_angle, ndim).enforced_angle


# ----------------------------------------------------------------------------------
# sweeps (numba): flat arrays in C order over the grid, visited in order of height
# ----------------------------------------------------------------------------------


@numba.njit(cache=True)
def _locate(e, m, shape, d, plate):  # noqa: D103 - kernel
    # flat index of element e moved by member offset m, or -1 when the place's centre
    # lies on or under the plate (second value 1.0: the plate holds everything) or
    # outside the domain (0.0: void)
    n0, n1, n2 = shape[0], shape[1], shape[2]
    i = e // (n1 * n2) + m[0]
    j = (e // n2) % n1 + m[1]
    k = e % n2 + m[2]
    centre = (i + 0.5) * d[0] + (j + 0.5) * d[1] + (k + 0.5) * d[2]
    if centre <= plate + 1e-9:
        return -1, 1.0  # the plate (inside the domain too, when it is raised)
    if 0 <= i < n0 and 0 <= j < n1 and 0 <= k < n2:
        return (i * n1 + j) * n2 + k, 0.0
    return -1, 0.0


@numba.njit(cache=True)
def _place(e, t, inner, mflat, members, shape, d, plate):  # noqa: D103 - kernel
    # _locate of member t, with a fast path for elements whose whole stencil lies
    # inside the domain and above the plate (flat offsets, no divisions)
    if inner[e]:
        return e + mflat[t], 0.0
    return _locate(e, members[t], shape, d, plate)


@numba.njit(cache=True)
def _power(r, p, p_int):  # noqa: D103 - kernel
    # r**p; integer exponents (40 of the papers, 80 of the optimiser) by repeated
    # squaring, several times faster than the general pow, which dominates the filter
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
def _smin(a, b, eps, sq):  # noqa: D103 - kernel
    t = a - b
    return 0.5 * (a + b - math.sqrt(t * t + eps) + sq)


@numba.njit(cache=True)
def _logical_sweep(solid, order, on_plate, inner, mflat, shape, d, plate, members, starts,  # noqa: D103
                   printed_only):
    out = np.zeros(solid.size, dtype=np.bool_)
    n_s = starts.size - 1
    for e in order:
        if not solid[e]:
            continue
        if on_plate[e]:
            out[e] = True
            continue
        held = False
        for s in range(n_s):
            ok = True
            for t in range(starts[s], starts[s + 1]):
                idx, under = _place(e, t, inner, mflat, members, shape, d, plate)
                if idx < 0:
                    ok = under > 0.5
                else:
                    ok = out[idx] if printed_only else solid[idx]
                if not ok:
                    break
            if ok:
                held = True
                break
        out[e] = held
    return out


@numba.njit(cache=True, error_model="numpy")
def _fold_band(val, pos, nl, places, table, count, slot, eps, sq, width, buf,
               ratios):  # noqa: D103 - kernel
    # every strut's smooth-min fold (foot first, as in the docstring) for the nl lanes of
    # a band, in the rows of buf (width lanes each): row m holds the distinct member place
    # m (struts share members, so each place is gathered once), row n_p + c the fold of
    # the strut in column c when it has two members or more (see _Smooth.vrow). With
    # ratios, also keeps t / r of each smin(a, w) (its derivatives are 0.5 * (1 -+ t / r)):
    # that of member u of column c at (slot[u] + c) * nl. Every loop but the gather runs
    # over contiguous lanes, so that the square roots and divisions run in SIMD lanes (the
    # same operations element by element).
    n_p = places.size
    for m in range(n_p):
        off = places[m]
        for i in range(nl):
            buf[m * width + i] = val[pos[i] + off]
    for u in range(1, count.size):
        for c in range(count[u]):
            fold = buf[(n_p + c) * width:(n_p + c) * width + nl]
            # the first smin reads the foot's row, the later ones the fold (separate
            # loops: a read and a write of one array stay in SIMD lanes only in place)
            a = buf[table[0, c] * width:table[0, c] * width + nl] if u == 1 else fold[:0]
            w = buf[table[u, c] * width:table[u, c] * width + nl]
            if ratios.size:
                ratio = ratios[(slot[u] + c) * nl:(slot[u] + c + 1) * nl]
                if u == 1:
                    for i in range(nl):
                        ti = a[i] - w[i]
                        ri = math.sqrt(ti * ti + eps)
                        fold[i] = 0.5 * (a[i] + w[i] - ri + sq)
                        ratio[i] = ti / ri
                else:
                    for i in range(nl):
                        ti = fold[i] - w[i]
                        ri = math.sqrt(ti * ti + eps)
                        fold[i] = 0.5 * (fold[i] + w[i] - ri + sq)
                        ratio[i] = ti / ri
            elif u == 1:
                for i in range(nl):
                    ti = a[i] - w[i]
                    fold[i] = 0.5 * (a[i] + w[i] - math.sqrt(ti * ti + eps) + sq)
            else:
                for i in range(nl):
                    ti = fold[i] - w[i]
                    fold[i] = 0.5 * (fold[i] + w[i] - math.sqrt(ti * ti + eps) + sq)


@numba.njit(cache=True, error_model="numpy")
def _power_lanes(r, nb, p, p_int, out):  # noqa: D103 - kernel
    # out[i] = _power(r[i], p, p_int) for i < nb, the squarings done lane by lane
    # (the same products in the same order as _power, so the same numbers); r is spent
    if p_int < 0:
        for i in range(nb):
            out[i] = r[i] ** p
        return
    for i in range(nb):
        out[i] = 1.0
    n = p_int
    while n > 0:
        if n & 1:
            for i in range(nb):
                out[i] *= r[i]
        for i in range(nb):
            r[i] *= r[i]
        n >>= 1


@numba.njit(cache=True, error_model="numpy")
def _smax_band(buf, vrow, width, nl, p, p_int, most, r, pw, acc, kept_r):  # noqa: D103
    # the largest strut value (most) and the scaled P-sum (acc) of each of the nl lanes;
    # the ratios v / most of all struts are raised to the power together (r and pw hold a
    # row of nl lanes per strut; kept_r, when not empty, keeps a copy of the ratios), then
    # summed strut by strut as in the formula; strut s's values are row vrow[s] of buf
    n_s = vrow.size
    for i in range(nl):
        most[i] = 0.0
        acc[i] = 0.0
    for s in range(n_s):
        v = buf[vrow[s] * width:vrow[s] * width + nl]
        for i in range(nl):
            # max(most, v) written out: the builtin max keeps this loop out of SIMD lanes
            most[i] = v[i] if v[i] > most[i] else most[i]
    for s in range(n_s):
        at = vrow[s] * width
        for i in range(nl):
            v = buf[at + i]
            # a strut of value <= 0 adds nothing (0.0 here, skipped in the formula)
            r[s * nl + i] = v / most[i] if v > 0.0 else 0.0
    if kept_r.size:
        kept_r[:n_s * nl] = r[:n_s * nl]
    _power_lanes(r, n_s * nl, p, p_int, pw)
    for s in range(n_s):
        for i in range(nl):
            acc[i] += pw[s * nl + i]


@numba.njit(cache=True, error_model="numpy")
def _lanes(nb):  # noqa: D103 - kernel
    # lanes computed for nb elements: a multiple of 4 (the SIMD width for doubles), so
    # that no loop ends in a scalar remainder; the extra lanes repeat the first element
    return (nb + 3) & ~3


@numba.njit(cache=True, error_model="numpy")
def _forward_kernel(x, keep, hold, order, bands, width, on_plate, pidx, under, places, table,
                    count, slot, column, lengths, vrow, kept_at, eps, p, p_int, q, val, kept,
                    xi, big, top, psum):  # noqa: D103 - kernel
    # val is the padded grid (see _Smooth): constant 1.0 on or under the plate, 0.0
    # outside the domain, and each element's printed density once it is known. Bands
    # are runs of the height order in which no element reads another: their elements
    # are computed together, member by member, so that the square roots run in SIMD
    # lanes. Every element still does exactly the operations of the formula in the
    # docstring, in the same order.
    # Stores per element the smooth maximum (big), its largest input (top) and the
    # scaled P-sum (psum), so that the backward sweep needs no second maximum, and, when
    # kept is not empty, band k's smin ratios t / r and strut ratios v / most (in the
    # layout of _fold_band's ratios, then of _smax_band's) from kept_at[k] on, so that the
    # backward need not fold again.
    sq = math.sqrt(eps)
    n_s = column.size
    buf = np.zeros((places.size + n_s) * width)
    pos = np.zeros(width, dtype=np.int64)
    elem = np.zeros(width, dtype=np.int64)
    most = np.zeros(width)
    acc = np.zeros(width)
    r = np.zeros(max(n_s, 1) * width)
    pw = np.zeros(max(n_s, 1) * width)
    n_r = int(count[1:].sum())
    for k in range(bands.size - 1):
        nb = 0
        for n in range(bands[k], bands[k + 1]):
            e = order[n]
            if on_plate[e]:
                xi[e] = x[e]
                big[e] = 1.0
                top[e] = 0.0
                psum[e] = 0.0
                if not under[e]:
                    val[pidx[e]] = x[e]
                continue
            elem[nb] = e
            pos[nb] = pidx[e]
            nb += 1
        if nb == 0:
            continue
        nl = _lanes(nb)
        pos[nb:nl] = pos[0]
        block = kept[kept_at[k]:kept_at[k + 1]]
        _fold_band(val, pos, nl, places, table, count, slot, eps, sq, width, buf, block)
        _smax_band(buf, vrow, width, nl, p, p_int, most, r, pw, acc, block[n_r * nl:])
        for i in range(nb):
            e = elem[i]
            m = most[i]
            b = 0.0
            if m > 0.0:
                # (sum v^P)^(1/Q) scaled by the largest value, so nothing underflows
                b = m ** (p / q) * acc[i] ** (1.0 / q)
            big[e] = b
            top[e] = m
            psum[e] = acc[i] if m > 0.0 else 0.0
            if keep[e] and not hold:
                xi[e] = x[e]
            else:
                xi[e] = _smin(x[e], b, eps, sq)
            if not under[e]:
                val[pos[i]] = xi[e]


@numba.njit(cache=True, error_model="numpy")
def _backward_kernel(x, keep, hold, order, bands, width, on_plate, pidx, under, places, table,
                     count, slot, column, lengths, vrow, kept_at, eps, p, p_int, q, val, kept,
                     big, top, psum, seed, lamp, dx):  # noqa: D103 - kernel
    # lamp is the adjoint on the padded grid; it enters holding the seed at every element
    # not under the plate (under it, an element is read as the constant 1.0, so nothing
    # flows back into it) and is completed in falling height, band by band. A band's
    # smin ratios t / r (d smin / d(inputs) = 0.5 * (1 -+ t / r)) and strut ratios
    # v / most come from the forward's lanes when it kept them (kept not empty), else the
    # band's struts are folded again in the same lanes; then the band's elements send their adjoints
    # down strut by strut into one lane row per distinct member place (lw), and each row
    # goes to lamp once. The sums into lamp come in another order than in an
    # element-by-element sweep: the same terms, rounded differently in the last bits.
    sq = math.sqrt(eps)
    n_s = column.size
    n_c = table.shape[1]
    buf = np.zeros((places.size + n_s) * width)
    ratios = np.zeros(max(count.size * n_c, 1) * width)
    lw = np.zeros(max(places.size, 1) * width)
    pos = np.zeros(width, dtype=np.int64)
    coef = np.zeros(width)
    most = np.zeros(width)
    r = np.zeros(max(n_s, 1) * width)
    grads = np.zeros(max(n_s, 1) * width)
    coef_s = np.zeros(max(n_s, 1) * width)
    n_r = int(count[1:].sum())
    for k in range(bands.size - 2, -1, -1):
        # the forward's lanes, in its order; lanes with nothing to pass back get coef 0
        # (and their largest strut value, so that no power overflows)
        nb = 0
        for n in range(bands[k], bands[k + 1]):
            e = order[n]
            g = seed[e] if under[e] else lamp[pidx[e]]
            if on_plate[e]:
                dx[e] = g
                continue
            m = top[e]
            pos[nb] = pidx[e]
            coef[nb] = 0.0
            most[nb] = m if m > 0.0 else 1.0
            nb += 1
            if keep[e] and not hold:
                dx[e] = g
                continue
            t0 = x[e] - big[e]
            r0 = math.sqrt(t0 * t0 + eps)
            dx[e] = g * 0.5 * (1.0 - t0 / r0)
            gb = g * 0.5 * (1.0 + t0 / r0)
            if gb == 0.0 or m == 0.0:
                continue  # all supports zero: the smax gradient vanishes in the limit
            # gb * d smax / d v_top, m**(P/Q - 1) * psum**(1/Q - 1) written as big / (m * psum)
            # from the forward (no powers here; equal up to rounding)
            coef[nb - 1] = gb * (p / q) * (big[e] / (m * psum[e]))
        if nb == 0:
            continue
        nl = _lanes(nb)
        pos[nb:nl] = pos[0]
        most[nb:nl] = most[0]
        coef[nb:nl] = 0.0  # the extra lanes pass nothing back
        if kept.size:
            ratio_band = kept[kept_at[k]:kept_at[k + 1]]
            r[:n_s * nl] = ratio_band[n_r * nl:(n_r + n_s) * nl]
        else:
            ratio_band = ratios
            _fold_band(val, pos, nl, places, table, count, slot, eps, sq, width, buf, ratios)
            for s in range(n_s):
                at = vrow[s] * width
                for i in range(nl):
                    v = buf[at + i]
                    r[s * nl + i] = v / most[i] if v > 0.0 else 0.0
        # a strut of value <= 0 passes nothing back (skipped in the formula); its ratio
        # is 0.0 (the power spends r, so the test is made first)
        for s in range(n_s):
            rs = r[s * nl:(s + 1) * nl]
            cs = coef_s[s * nl:(s + 1) * nl]
            for i in range(nl):
                cs[i] = coef[i] if rs[i] > 0.0 else 0.0
        _power_lanes(r, n_s * nl, p - 1.0, p_int - 1, grads)
        lw[: places.size * nl] = 0.0
        for s in range(n_s):
            gv = grads[s * nl:(s + 1) * nl]
            cs = coef_s[s * nl:(s + 1) * nl]
            for i in range(nl):
                # (a select, not a product: 0 ** (P - 1) is infinite for P < 1)
                gv[i] = cs[i] * gv[i] if cs[i] != 0.0 else 0.0
            # down the strut, top member first: d smin / d w goes to the member, d smin /
            # d a on down the fold
            c = column[s]
            for u in range(lengths[s] - 1, 0, -1):
                ratio = ratio_band[(slot[u] + c) * nl:(slot[u] + c + 1) * nl]
                lane = lw[table[u, c] * nl:(table[u, c] + 1) * nl]
                for i in range(nl):
                    lane[i] += gv[i] * 0.5 * (1.0 + ratio[i])
                    gv[i] *= 0.5 * (1.0 - ratio[i])
            lane = lw[table[0, c] * nl:(table[0, c] + 1) * nl]
            for i in range(nl):
                lane[i] += gv[i]
        # for one member place the band's elements hit distinct places of lamp
        for m in range(places.size):
            off = places[m]
            for i in range(nb):
                lamp[pos[i] + off] += lw[m * nl + i]

# ----------------------------------------------------------------------------------
# the grid set-up shared by the smooth filter and the logical helpers
# ----------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Sweep:
    shape3: np.ndarray  # grid shape padded to 3 entries
    stencil: Stencil
    heights: np.ndarray  # flat: height of every element centre
    order: np.ndarray  # flat indices by rising height
    on_plate: np.ndarray  # flat, bool
    plate: float
    inner: np.ndarray  # flat, bool: the whole stencil inside the domain and above the plate
    mflat: np.ndarray  # flat-index offset of every strut member


def _sweep_setup(shape, direction, overhang_angle, plate_offset: float = 0.0) -> _Sweep:
    shape = tuple(int(n) for n in shape)
    ndim = len(shape)
    stencil = support_stencil(direction, overhang_angle, ndim)
    d = stencil.direction
    heights = element_heights(shape, d[:ndim]).ravel()
    plate = plate_level(shape, d[:ndim], plate_offset)
    lowest = heights - 0.5 * float(np.abs(d).sum())
    shape3 = np.array(shape + (1,) * (3 - ndim), dtype=np.int64)
    m = stencil.members
    inner = np.ones(shape3, dtype=bool)
    if m.size:
        idx = np.indices(tuple(shape3))
        for a in range(3):
            inner &= (idx[a] + m[:, a].min() >= 0) & (idx[a] + m[:, a].max() < shape3[a])
        inner = inner.ravel() & (heights + float((m @ d).min()) > plate + 1e-9)
    mflat = (m[:, 0] * shape3[1] * shape3[2] + m[:, 1] * shape3[2] + m[:, 2]).astype(np.int64)
    return _Sweep(
        shape3=shape3,
        stencil=stencil,
        heights=heights,
        order=np.argsort(heights, kind="stable").astype(np.int64),
        on_plate=lowest <= plate + 1e-9,
        plate=plate,
        inner=np.ascontiguousarray(inner.ravel()),
        mflat=mflat,
    )


@dataclass(frozen=True)
class _Smooth:
    """Layout of the smooth sweeps (built once per filter).

    The grid is padded by the stencil's reach on every side, so that every strut member
    is a fixed flat offset from its element (no bounds or plate tests in the loops).
    """

    pidx: np.ndarray  # padded flat index of every element
    under: np.ndarray  # flat, bool: the element's centre lies on or under the plate
    base: np.ndarray  # padded grid: 1.0 on or under the plate, 0.0 elsewhere
    places: np.ndarray  # padded offsets of the distinct strut members
    table: np.ndarray  # (rows, struts): member u of the strut in column c, as a row of places
    count: np.ndarray  # (rows,): struts at least u + 1 members long (columns by falling length)
    column: np.ndarray  # (struts,): column of strut s in the table
    vrow: np.ndarray  # (struts,): lane row of strut s's value in the kernels (see _fold_band)
    slot: np.ndarray  # (rows,): number of the first smin of member u in a band's lanes
    lengths: np.ndarray  # (struts,): members of strut s
    bands: np.ndarray  # starts of runs of the height order in which no element reads another
    kept_at: np.ndarray  # (bands + 1,): start of band k's numbers kept by the forward
    keep: bool  # the forward keeps smin ratios and strut values for the backward
    width: int  # lanes of the longest band (see _lanes): the kernels' lane buffers


@numba.njit(cache=True)
def _band_starts(sorted_heights, gap):  # noqa: D103 - kernel
    # greedy runs spanning less than gap in height
    starts = np.zeros(sorted_heights.size + 1, dtype=np.int64)
    n_b = 0
    first = 0
    for n in range(sorted_heights.size):
        if n == 0 or sorted_heights[n] - sorted_heights[first] >= gap:
            starts[n_b] = n
            n_b += 1
            first = n
    starts[n_b] = sorted_heights.size
    return starts[: n_b + 1].copy()


def _smooth_setup(sw: _Sweep) -> _Smooth:
    stencil = sw.stencil
    m = stencil.members
    d = stencil.direction
    reach = np.abs(m).max(axis=0) if m.size else np.zeros(3, dtype=np.int64)
    padded = sw.shape3 + 2 * reach
    strides = np.array([padded[1] * padded[2], padded[2], 1], dtype=np.int64)
    idx = np.indices(tuple(sw.shape3)).reshape(3, -1)
    pidx = ((idx + reach[:, None]) * strides[:, None]).sum(axis=0).astype(np.int64)
    # the plate test of a place, the centre's height summed as in element_heights
    i, j, k = (np.arange(n) - r for n, r in zip(padded, reach, strict=True))
    centre = ((i[:, None, None] + 0.5) * d[0] + (j[None, :, None] + 0.5) * d[1]
              + (k[None, None, :] + 0.5) * d[2])
    below = (centre <= sw.plate + 1e-9).ravel()
    lengths = np.diff(stencil.starts).astype(np.int64)
    by_length = np.argsort(-lengths, kind="stable")
    column = np.empty(lengths.size, dtype=np.int64)
    column[by_length] = np.arange(lengths.size)
    rows = int(lengths.max()) if lengths.size else 0
    table = np.zeros((rows, lengths.size), dtype=np.int64)
    flat = m @ strides if m.size else np.zeros(0, dtype=np.int64)
    # struts share members: each distinct place is read once per band
    places, member = np.unique(flat, return_inverse=True)
    for s in range(lengths.size):
        start = stencil.starts[s]
        table[: lengths[s], column[s]] = member[start : start + lengths[s]]
    count = np.array([np.count_nonzero(lengths > u) for u in range(rows)], dtype=np.int64)
    slot = np.concatenate([[0, 0], np.cumsum(count[1:])])[:rows].astype(np.int64)
    # every member lies at least `shallowest` lower than its element, so elements less
    # than that apart in height never read each other (the margin covers rounding)
    shallowest = float((-(m @ d)).min()) if m.size else math.inf
    bands = _band_starts(sw.heights[sw.order], shallowest - 1e-9)
    # the smin ratios and strut values of a band's lanes (its elements off the plate),
    # kept by the forward for the backward when they fit (see _KEPT_LIMIT)
    lifted = np.add.reduceat(~sw.on_plate[sw.order], bands[:-1])
    lanes = np.array([_lanes(n) for n in lifted], dtype=np.int64)
    kept = lanes * int(count[1:].sum() + lengths.size)
    kept_at = np.concatenate([[0], np.cumsum(kept)]).astype(np.int64)
    return _Smooth(pidx=pidx, under=np.ascontiguousarray(below[pidx]),
                   base=np.where(below, 1.0, 0.0), places=places.astype(np.int64),
                   table=table, count=count, column=column, lengths=lengths,
                   vrow=np.where(lengths > 1, places.size + column, table[0, column]),
                   slot=slot, bands=bands, kept_at=kept_at, keep=bool(kept_at[-1] <= _KEPT_LIMIT),
                   width=_lanes(max(1, int(np.diff(bands).max(initial=1)))))


class PrintabilityFilter:
    """The smoothed layer-wise printability filter; build with :func:`printability_filter`.

    The object keeps the last ``forward`` input and the printed densities, because
    ``backward`` is the vector-Jacobian product at that input.
    """

    def __init__(self, shape, *, direction, overhang_angle, epsilon, p, xi0, keep=None,
                 keep_mode="print", plate_offset=0.0):
        self.shape = tuple(int(n) for n in shape)
        ndim = len(self.shape)
        self.vector = unit_vector(direction, ndim)
        self.direction = direction
        if keep is None:
            keep = np.zeros(self.shape, dtype=bool)
        keep = np.asarray(keep)
        if keep.shape != self.shape or keep.dtype != bool:
            raise ValueError(f"keep must be a boolean array of shape {self.shape}, got "
                             f"{keep.dtype} {keep.shape}")
        if keep_mode not in ("print", "hold"):
            raise ValueError(f"keep_mode must be 'print' or 'hold', got {keep_mode!r}")
        self.keep = keep
        self.keep_mode = keep_mode
        self._keep = np.ascontiguousarray(keep.ravel())
        self._sweep = _sweep_setup(self.shape, direction, overhang_angle, plate_offset)
        self._smooth = _smooth_setup(self._sweep)
        stencil = self._sweep.stencil
        self.overhang_angle = float(overhang_angle)
        self.enforced_angle = stencil.enforced_angle
        self.steepest_angle = stencil.steepest_angle
        self.support_size = max(stencil.size, 1)
        self.epsilon, self.p, self.xi0 = float(epsilon), float(p), float(xi0)
        # integer exponents up to 256 take the fast path of _power
        self._p_int = int(self.p) if self.p == int(self.p) and 1 <= self.p <= 256 else -1
        self.q = self.p + math.log(self.support_size) / math.log(self.xi0)
        if self.q <= 0.0:
            raise ValueError(
                f"p must exceed log(Ns)/log(1/xi0) = {self.p - self.q:.3g} for a support "
                f"region of {self.support_size} elements, got p={p!r}"
            )
        self._last = None
        self._kept = None

    def __repr__(self) -> str:
        return (
            f"PrintabilityFilter(shape={self.shape}, direction={self.direction!r}, "
            f"enforced_angle={self.enforced_angle:.2f})"
        )

    def _flat(self, a: np.ndarray, name: str) -> np.ndarray:
        arr = np.asarray(a, dtype=float)
        if arr.shape != self.shape:
            raise ValueError(f"{name} must have shape {self.shape}, got {arr.shape}")
        if not np.all(np.isfinite(arr)):
            raise ValueError(f"{name} must be finite")
        return np.ascontiguousarray(arr.ravel())

    def _args(self):
        sw, sm = self._sweep, self._smooth
        return (self._keep, self.keep_mode == "hold", sw.order, sm.bands, sm.width, sw.on_plate,
                sm.pidx, sm.under, sm.places, sm.table, sm.count, sm.slot, sm.column,
                sm.lengths, sm.vrow, sm.kept_at, self.epsilon, self.p, self._p_int, self.q)

    def forward(self, x: np.ndarray) -> np.ndarray:
        """Return the printed density of the blueprint density ``x`` (grid shape)."""
        xf = self._flat(x, "x")
        if xf.size and xf.min() < -1e-9:
            raise ValueError(f"x must be non-negative, got a minimum of {xf.min():.3g}")
        xi, big, top, psum = (np.zeros_like(xf) for _ in range(4))
        val = self._smooth.base.copy()
        kept = np.empty(0)
        if self._smooth.keep:
            # one buffer for the filter's life: fresh pages would cost more than the sweep
            if self._kept is None:
                self._kept = np.empty(int(self._smooth.kept_at[-1]))
            kept = self._kept
        _forward_kernel(xf, *self._args(), val, kept, xi, big, top, psum)
        self._last = (xf, xi, big, top, psum, val, kept)
        out = xi if self.keep_mode == "print" else np.where(self._keep, xf, xi)
        return out.reshape(self.shape)

    def _reverse(self, seed: np.ndarray) -> np.ndarray:
        if self._last is None:
            raise ValueError("backward needs a forward call first")
        xf, xi, big, top, psum, val, kept = self._last
        sm = self._smooth
        lamp = np.zeros_like(val)
        lamp[sm.pidx] = np.where(sm.under, 0.0, seed)
        dx = np.zeros_like(xf)
        _backward_kernel(xf, *self._args(), val, kept, big, top, psum, seed, lamp, dx)
        return dx

    def backward(self, dy: np.ndarray) -> np.ndarray:
        """Vector-Jacobian product ``J(x)^T dy`` at the last ``forward`` input."""
        dyf = self._flat(dy, "dy")
        if self.keep_mode == "print":
            return self._reverse(dyf.copy()).reshape(self.shape)
        # held keep-in elements pass their input straight to the output
        dx = self._reverse(np.where(self._keep, 0.0, dyf))
        return (dx + np.where(self._keep, dyf, 0.0)).reshape(self.shape)

    def keep_printed(self) -> np.ndarray:
        """Printed density the last ``forward`` gave the keep-in elements (1-D array)."""
        if self._last is None:
            raise ValueError("keep_printed needs a forward call first")
        return self._last[1][self._keep].copy()

    def keep_printed_backward(self, weights: np.ndarray) -> np.ndarray:
        """Gradient of ``sum(weights * keep_printed())`` with respect to the input."""
        seed = np.zeros(self._keep.size)
        seed[self._keep] = np.asarray(weights, dtype=float)
        return self._reverse(seed).reshape(self.shape)


def printability_filter(
    shape: tuple[int, ...],
    *,
    direction,
    overhang_angle: float = 45.0,
    epsilon: float = 1e-4,
    p: float = 40.0,
    xi0: float = 0.5,
    keep: np.ndarray | None = None,
    keep_mode: str = "print",
    plate_offset: float = 0.0,
) -> PrintabilityFilter:
    """Make the smoothed layer-wise printability filter for a grid and build direction.

    Parameters
    ----------
    shape : tuple of int
        Elements along x, y (and z).
    direction : str or sequence of float
        Build direction: ``"+x"``, ``"-x"``, ``"+y"``, ``"-y"`` (and ``"+z"``, ``"-z"``
        in 3D), or a vector of 2 (3) numbers. ``"+y"`` stacks layers towards +y with the
        plate at y = 0; a vector puts the plate through the domain's lowest corner.
    overhang_angle : float
        Smallest printable angle from the plate in degrees, 20 to 70; see
        :func:`enforced_overhang_angle` for the angle actually enforced.
    epsilon : float
        Smoothing parameter of the smooth minimum (> 0).
    p : float
        Exponent of the P-mean smooth maximum (> 0).
    xi0 : float
        Density at which the smooth maximum is exact for equal inputs, in (0, 1).
    keep : ndarray of bool, optional
        Keep-in elements (see ``keep_mode``).
    keep_mode : {"print", "hold"}
        ``"print"``: keep-in elements print as their input whatever lies below them.
        ``"hold"``: they print only when held like any element; the output keeps their
        input value and :meth:`PrintabilityFilter.keep_printed` reports their printed
        density.
    plate_offset : float
        Raise the plate along the build direction by this many element edges.

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
    for name, value in (("epsilon", epsilon), ("p", p), ("xi0", xi0),
                        ("plate_offset", plate_offset)):
        if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
            raise TypeError(f"{name} must be a number, got {type(value).__name__}")
    if not (math.isfinite(epsilon) and epsilon > 0):
        raise ValueError(f"epsilon must be positive, got {epsilon!r}")
    if not (math.isfinite(p) and p > 0):
        raise ValueError(f"p must be positive, got {p!r}")
    if not (0.0 < xi0 < 1.0):
        raise ValueError(f"xi0 must lie in (0, 1), got {xi0!r}")
    if not (math.isfinite(plate_offset) and plate_offset >= 0):
        raise ValueError(f"plate_offset must be a finite number >= 0, got {plate_offset!r}")
    return PrintabilityFilter(
        shape, direction=direction, overhang_angle=overhang_angle, epsilon=epsilon, p=p,
        xi0=xi0, keep=keep, keep_mode=keep_mode, plate_offset=plate_offset,
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


def _logical(solid, direction, overhang_angle, plate_offset, *, printed_only):
    arr = _as_solid(solid)
    if arr.ndim not in (2, 3):
        raise ValueError(f"solid must have 2 or 3 axes, got {arr.ndim}")
    sw = _sweep_setup(arr.shape, direction, overhang_angle, plate_offset)
    st = sw.stencil
    out = _logical_sweep(np.ascontiguousarray(arr.ravel()), sw.order, sw.on_plate, sw.inner,
                         sw.mflat, sw.shape3,
                         st.direction, sw.plate, st.members, st.starts, printed_only)
    return out.reshape(arr.shape)


def supported_mask(
    solid: np.ndarray, *, direction, overhang_angle: float = 45.0, plate_offset: float = 0.0
) -> np.ndarray:
    """Solid elements that rest on the plate or stand on a solid strut of the stencil.

    Parameters
    ----------
    solid : ndarray of bool (or density, read at the 0.5 level)
        Design in grid shape (x, y[, z]).
    direction : str or sequence of float
        Build direction, e.g. ``"+y"`` or ``[1.0, 1.0]``.
    overhang_angle : float
        Overhang angle in degrees (see :func:`enforced_overhang_angle`).
    plate_offset : float
        Raise of the plate along the direction, element edges.

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
    return _logical(solid, direction, overhang_angle, plate_offset, printed_only=False)


def printable_part(
    solid: np.ndarray, *, direction, overhang_angle: float = 45.0, plate_offset: float = 0.0
) -> np.ndarray:
    """Return what actually prints, by a plain logical sweep from the plate.

    An element prints when it is solid and rests on the plate, or a strut of its
    support stencil below it prints.

    Examples
    --------
    >>> s = np.array([[1, 0, 0, 1], [0, 0, 0, 0], [0, 1, 1, 1]], dtype=bool)
    >>> printable_part(s, direction="+y").astype(int).tolist()
    [[1, 0, 0, 0], [0, 0, 0, 0], [0, 0, 0, 0]]
    """
    return _logical(solid, direction, overhang_angle, plate_offset, printed_only=True)


def unsupported_count(
    solid: np.ndarray, *, direction, overhang_angle: float = 45.0, plate_offset: float = 0.0
) -> int:
    """Count solid elements with no solid strut of their support stencil below them.

    Examples
    --------
    >>> unsupported_count(np.array([[0.9, 0.2, 0.8]]), direction="+y")
    1
    """
    arr = _as_solid(solid)
    mask = supported_mask(arr, direction=direction, overhang_angle=overhang_angle,
                          plate_offset=plate_offset)
    return int(np.count_nonzero(arr & ~mask))


def overhang_area(
    solid: np.ndarray,
    *,
    direction,
    overhang_angle: float = 45.0,
    element_size: float,
    thickness: float = 1.0,
    plate_offset: float = 0.0,
) -> float:
    """Area of down-facing faces that violate the overhang rule.

    Each unsupported solid element is counted with one face of ``element_size *
    thickness`` (2D: a length times the out-of-plane thickness) or ``element_size**2``
    (3D): the face it turns to the powder below.

    Examples
    --------
    >>> overhang_area(np.array([[1, 0, 1]]), direction="+y", element_size=0.5)
    0.5
    """
    if not (isinstance(element_size, (int, float)) and element_size > 0):
        raise ValueError(f"element_size must be a positive number, got {element_size!r}")
    arr = _as_solid(solid)
    face = element_size * thickness if arr.ndim == 2 else element_size**2
    return unsupported_count(arr, direction=direction, overhang_angle=overhang_angle,
                             plate_offset=plate_offset) * face
