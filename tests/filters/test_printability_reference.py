"""The fast printability sweeps against a straightforward version of the same filter.

The kernels below are the filter's sweeps as first written (every strut member found
by index arithmetic and a plate/domain test, one element and one strut after another,
the backward recomputing each strut's fold): kept here as the reference that the
restructured kernels of :mod:`filters.printability` (padded grid, bands of elements
computed together in SIMD lanes, stored derivative ratios) must reproduce. The method
is Langelaar's layer-wise AM filter (SMO 55:871-883, 2017; Additive Manufacturing
12:60-70, 2016) on the cone stencil of :func:`filters.printability.support_stencil`.
The tolerance 1e-12 is ours: the forward does the same floating-point operations in
both versions, and the backward adds the same terms in another order (measured
differences of a few 1e-15).
"""

from __future__ import annotations

import math

import numba
import numpy as np
import pytest

from filters.direction import element_heights, plate_level
from filters.printability import printability_filter, support_stencil


@numba.njit(cache=True)
def _locate(e, m, shape, d, plate):
    # flat index of element e moved by offset m, or -1 with 1.0 (on or under the
    # plate) or 0.0 (outside the domain)
    n0, n1, n2 = shape[0], shape[1], shape[2]
    i = e // (n1 * n2) + m[0]
    j = (e // n2) % n1 + m[1]
    k = e % n2 + m[2]
    centre = (i + 0.5) * d[0] + (j + 0.5) * d[1] + (k + 0.5) * d[2]
    if centre <= plate + 1e-9:
        return -1, 1.0
    if 0 <= i < n0 and 0 <= j < n1 and 0 <= k < n2:
        return (i * n1 + j) * n2 + k, 0.0
    return -1, 0.0


@numba.njit(cache=True)
def _smin(a, b, eps, sq):
    t = a - b
    return 0.5 * (a + b - math.sqrt(t * t + eps) + sq)


@numba.njit(cache=True)
def _forward(x, keep, hold, order, on_plate, shape, d, plate, members, starts, eps, p, q,
             xi, big, top, psum):
    sq = math.sqrt(eps)
    n_s = starts.size - 1
    vals = np.zeros(max(n_s, 1))
    for e in order:
        if on_plate[e]:
            xi[e] = x[e]
            big[e] = 1.0
            continue
        m = 0.0
        for s in range(n_s):
            v = 1.0
            for t in range(starts[s], starts[s + 1]):
                idx, under = _locate(e, members[t], shape, d, plate)
                w = xi[idx] if idx >= 0 else under
                v = w if t == starts[s] else _smin(v, w, eps, sq)
            vals[s] = v
            m = max(m, v)
        b = 0.0
        acc = 0.0
        if m > 0.0:
            for s in range(n_s):
                if vals[s] > 0.0:
                    acc += (vals[s] / m) ** p
            b = m ** (p / q) * acc ** (1.0 / q)
        big[e] = b
        top[e] = m
        psum[e] = acc
        xi[e] = x[e] if keep[e] and not hold else _smin(x[e], b, eps, sq)


@numba.njit(cache=True)
def _backward(x, keep, hold, order, on_plate, shape, d, plate, members, starts, eps, p, q,
              xi, big, top, psum, lam, dx):
    sq = math.sqrt(eps)
    n_s = starts.size - 1
    width = 1
    for s in range(n_s):
        width = max(width, starts[s + 1] - starts[s])
    fold = np.zeros(width)
    where = np.zeros(width, dtype=np.int64)
    under_at = np.zeros(width)
    for n in range(order.size - 1, -1, -1):
        e = order[n]
        g = lam[e]
        if on_plate[e] or (keep[e] and not hold):
            dx[e] = g
            continue
        t0 = x[e] - big[e]
        r = math.sqrt(t0 * t0 + eps)
        dx[e] = g * 0.5 * (1.0 - t0 / r)
        gb = g * 0.5 * (1.0 + t0 / r)
        m = top[e]
        if gb == 0.0 or m == 0.0:
            continue
        coef = gb * (p / q) * m ** (p / q - 1.0) * psum[e] ** (1.0 / q - 1.0)
        for s in range(n_s):
            length = starts[s + 1] - starts[s]
            v = 1.0
            for u in range(length):
                idx, under = _locate(e, members[starts[s] + u], shape, d, plate)
                w = xi[idx] if idx >= 0 else under
                where[u] = idx
                under_at[u] = w
                v = w if u == 0 else _smin(v, w, eps, sq)
                fold[u] = v
            if v <= 0.0:
                continue
            gv = coef * (v / m) ** (p - 1.0)
            for u in range(length - 1, 0, -1):
                t1 = fold[u - 1] - under_at[u]
                r1 = math.sqrt(t1 * t1 + eps)
                if where[u] >= 0:
                    lam[where[u]] += gv * 0.5 * (1.0 + t1 / r1)
                gv *= 0.5 * (1.0 - t1 / r1)
            if where[0] >= 0:
                lam[where[0]] += gv


def reference_filter(x, dy, *, direction, angle, keep, hold, plate_offset,
                     eps=1e-4, p=40.0, xi0=0.5):
    """Printed density and ``J^T dy`` by the straightforward sweeps (filter output form)."""
    shape = x.shape
    ndim = x.ndim
    st = support_stencil(direction, angle, ndim)
    d = st.direction
    heights = element_heights(shape, d[:ndim]).ravel()
    plate = plate_level(shape, d[:ndim], plate_offset)
    on_plate = heights - 0.5 * float(np.abs(d).sum()) <= plate + 1e-9
    order = np.argsort(heights, kind="stable")
    shape3 = np.array(shape + (1,) * (3 - ndim), dtype=np.int64)
    q = p + math.log(max(st.size, 1)) / math.log(xi0)
    xf = x.ravel().astype(float)
    kf = keep.ravel()
    xi, big, top, psum = (np.zeros_like(xf) for _ in range(4))
    args = (kf, hold, order, on_plate, shape3, d, plate, st.members, st.starts, eps, p, q)
    _forward(xf, *args, xi, big, top, psum)
    dyf = dy.ravel().astype(float)
    lam = np.where(kf, 0.0, dyf) if hold else dyf.copy()
    dx = np.zeros_like(xf)
    _backward(xf, *args, xi, big, top, psum, lam, dx)
    if hold:
        return np.where(kf, xf, xi).reshape(shape), (dx + np.where(kf, dyf, 0.0)).reshape(shape)
    return xi.reshape(shape), dx.reshape(shape)


CASES = [
    ((40, 24), [-1.0, 3.0], 35.0, 0.0),
    ((40, 24), [1.0, 2.0], 35.0, 0.0),
    ((40, 24), [-1.0, 3.0], 55.0, 1.5),
    ((40, 24), [2.0, -1.0], 20.0, 0.0),
    ((40, 24), [1.0, 1.0], 70.0, 2.0),
    ((40, 24), "+y", 30.0, 0.0),
    ((40, 24), "-x", 45.0, 0.0),
    ((12, 9, 8), [0.3, 0.5, 0.8], 55.0, 0.0),
    ((12, 9, 8), [0.0, 1.0, 1.0], 45.0, 1.0),
    ((12, 9, 8), [1.0, 1.0, 1.0], 35.0, 0.0),
    ((12, 9, 8), [-0.2, 0.9, -0.4], 25.0, 0.0),
    ((12, 9, 8), "+z", 30.0, 0.0),
]


@pytest.mark.parametrize("mode", ["print", "hold"])
@pytest.mark.parametrize(("shape", "direction", "angle", "plate_offset"), CASES)
def test_fast_sweeps_match_the_straightforward_ones(shape, direction, angle, plate_offset, mode):
    rng = np.random.default_rng(7)
    keep = rng.random(shape) < 0.05
    f = printability_filter(shape, direction=direction, overhang_angle=angle, keep=keep,
                            keep_mode=mode, plate_offset=plate_offset)
    for _ in range(2):  # a second design through the same filter object
        x = rng.uniform(0.0, 1.0, shape)
        x[rng.random(shape) < 0.2] = 0.0  # exact zeros: struts of value 0 are skipped
        dy = rng.standard_normal(shape)
        y_ref, g_ref = reference_filter(x, dy, direction=direction, angle=angle, keep=keep,
                                        hold=mode == "hold", plate_offset=plate_offset)
        np.testing.assert_allclose(f.forward(x), y_ref, rtol=0.0, atol=1e-12)
        np.testing.assert_allclose(f.backward(dy), g_ref, rtol=0.0, atol=1e-12)


@pytest.mark.parametrize(("eps", "p", "xi0"), [(1e-3, 7.5, 0.3), (1e-5, 12.0, 0.6)])
@pytest.mark.parametrize(("shape", "direction", "angle"), [((30, 20), [1.0, 2.0], 35.0),
                                                           ((10, 8, 7), [0.3, 0.5, 0.8], 55.0)])
def test_fast_sweeps_match_for_other_smoothing_parameters(shape, direction, angle, eps, p, xi0):
    # a non-integer P takes the general power, an integer one the repeated squaring
    rng = np.random.default_rng(11)
    keep = np.zeros(shape, dtype=bool)
    f = printability_filter(shape, direction=direction, overhang_angle=angle, epsilon=eps, p=p,
                            xi0=xi0)
    x = rng.uniform(0.0, 1.0, shape)
    dy = rng.standard_normal(shape)
    y_ref, g_ref = reference_filter(x, dy, direction=direction, angle=angle, keep=keep, hold=False,
                                    plate_offset=0.0, eps=eps, p=p, xi0=xi0)
    np.testing.assert_allclose(f.forward(x), y_ref, rtol=0.0, atol=1e-12)
    np.testing.assert_allclose(f.backward(dy), g_ref, rtol=0.0, atol=1e-12)
