"""Print-preparation masks for a build direction given as any vector.

The axis directions are handled in :mod:`topopt.build` by turning the arrays so that
the build axis comes first. A tilted direction has no layers on the voxel grid, so the
analysis is done in the design's own grid with the exact printability rule of
:mod:`filters.printability` for that direction:

* the part is placed on the plate: the plate is the plane normal to the direction
  through the part's lowest point;
* an element *needs support* when it is solid, the element one step below it (along
  the nearest lattice step to minus the direction) is void, and the printability rule
  does not hold it (no solid strut of its support stencil below it);
* its support column runs from it straight down along minus the direction, through
  void, until it meets the part (support on the part) or the plate (support on the
  plate; outside the domain the column continues through empty space to the plate);
  its volume is its length times the element's cross-section, sampled in quarter
  elements along the ray;
* trapped powder and tool access do not depend on the direction here: the domain is
  open to loose powder on every side (no face of it lies on the plate).
"""

from __future__ import annotations

import math

import numba
import numpy as np

from filters.direction import element_heights, unit_vector

_STEP = 0.25  # sample spacing along a support column, element edges


@numba.njit(cache=True)
def _columns(needs, solid, accessible, shape, d, plate, start_heights, support,  # noqa: D103
             on_plate_cells):
    # returns (total, on_plate, unremovable) column lengths in element edges
    n0, n1, n2 = shape[0], shape[1], shape[2]
    total = 0.0
    plate_len = 0.0
    stuck = 0.0
    # a column visits at most one cell per sample along the domain's diagonal
    cells = np.empty(int(4.0 / _STEP * (n0 + n1 + n2)) + 8, dtype=np.int64)
    for e in range(needs.size):
        if not needs[e]:
            continue
        i0 = e // (n1 * n2)
        j0 = (e // n2) % n1
        k0 = e % n2
        cx, cy, cz = i0 + 0.5, j0 + 0.5, k0 + 0.5
        s0 = start_heights[e]
        t = 0.5
        visited_len = 0.0
        visited_stuck = 0.0
        reached_plate = False
        count = 0  # the column's cells, kept to mark them if it reaches the plate
        while True:
            px, py, pz = cx - t * d[0], cy - t * d[1], cz - t * d[2]
            h = s0 - t
            if h <= plate:
                reached_plate = True
                break
            i = int(math.floor(px))
            j = int(math.floor(py))
            k = int(math.floor(pz))
            if i < 0 or i >= n0 or j < 0 or j >= n1 or k < 0 or k >= n2:
                visited_len += h - plate  # through empty space down to the plate
                reached_plate = True
                break
            c = (i * n1 + j) * n2 + k
            if c != e:
                if solid[c]:
                    break
                support[c] = True
                cells[count] = c
                count += 1
                visited_len += _STEP
                if not accessible[c]:
                    visited_stuck += _STEP
            t += _STEP
        total += visited_len
        stuck += visited_stuck
        if reached_plate:
            plate_len += visited_len
            for n in range(count):
                on_plate_cells[cells[n]] = True
    return total, plate_len, stuck


def lower_neighbour_step(d: np.ndarray) -> np.ndarray:
    """The lattice step closest to minus the unit direction ``d`` (one element down).

    Examples
    --------
    >>> lower_neighbour_step(np.array([0.0, 1.0])).tolist()
    [0, -1]
    >>> lower_neighbour_step(np.array([0.6, 0.8, 0.0])).tolist()
    [-1, -1, 0]
    """
    # a component counts when the direction leans at most 67.5 degrees from that axis
    keep = np.abs(d) >= math.sin(math.radians(22.5)) - 1e-12
    return np.where(keep, -np.sign(d), 0).astype(int)


def tilted_masks(solid: np.ndarray, direction, overhang_angle: float, accessible: np.ndarray,
                 trapped: np.ndarray, trapped_count: int) -> dict:
    """Masks and column lengths of a design for one build direction (any vector).

    ``accessible`` and ``trapped`` are the direction-independent void masks (see the
    module notes). Returns a dict of the masks of :class:`topopt.build.BuildMasks` plus
    ``support_length``, ``on_plate_length``, ``unremovable_length`` (element edges, one
    element cross-section) and ``height`` (extent of the part along the direction,
    element edges).
    """
    from filters.printability import supported_mask

    ndim = solid.ndim
    d = unit_vector(direction, ndim)
    heights = element_heights(solid.shape, d)
    half = 0.5 * float(np.abs(d).sum())
    low = float(heights[solid].min()) - half
    high = float(heights[solid].max()) + half
    corner = sum(min(0.0, float(n) * float(c)) for n, c in zip(solid.shape, d, strict=True))
    plate = low
    supported = supported_mask(solid, direction=d.tolist(), overhang_angle=overhang_angle,
                               plate_offset=max(0.0, low - corner))
    step = lower_neighbour_step(d)
    below = np.zeros_like(solid)
    src = tuple(slice(max(0, -s), n - max(0, s)) for s, n in zip(step, solid.shape, strict=True))
    dst = tuple(slice(max(0, s), n - max(0, -s)) for s, n in zip(step, solid.shape, strict=True))
    below[src] = solid[dst]
    lowest = heights - half <= plate + 1e-9
    down = solid & ~below & ~lowest
    needs = down & ~supported
    d3 = np.zeros(3)
    d3[:ndim] = d
    shape3 = np.array(solid.shape + (1,) * (3 - ndim), dtype=np.int64)
    support = np.zeros(solid.size, dtype=bool)
    on_plate = np.zeros(solid.size, dtype=bool)
    total, plate_len, stuck = _columns(
        np.ascontiguousarray(needs.ravel()), np.ascontiguousarray(solid.ravel()),
        np.ascontiguousarray(accessible.ravel()), shape3, d3, plate,
        np.ascontiguousarray(heights.ravel()), support, on_plate)
    return {
        "solid": solid,
        "down_facing": down,
        "needs_support": needs,
        "support": support.reshape(solid.shape),
        "support_on_plate": on_plate.reshape(solid.shape),
        "accessible": accessible,
        "trapped": trapped,
        "trapped_cavities": trapped_count,
        "support_length": float(total),
        "on_plate_length": float(plate_len),
        "unremovable_length": float(stuck),
        "height": high - low,
    }
