"""Measure the smallest solid member and the smallest void gap of a finished design.

The test is morphological opening (erosion then dilation) with a digital disk (2D) or
ball (3D): opening a set with a disk removes exactly the parts where the disk does not
fit, so the largest disk whose opening leaves the solid unchanged is the width of the
thinnest solid member; the same on the complement gives the narrowest void gap
(common practice in image analysis; used for length scale in topology optimisation by
e.g. Sigmund, SMO 33:401-424, 2007, and Wang, Lazarov & Sigmund, SMO 43:767-784, 2011).
"""

from __future__ import annotations

import math

import numpy as np


def _opening_keeps(phase: np.ndarray, diameter: int, outside: bool | None) -> bool:
    """Whether opening ``phase`` with the digital ball of ``diameter`` leaves it unchanged.

    The digital ball of diameter d holds the pixels of a d-wide box whose centres lie
    within d/2 of the box centre: centred on a pixel for odd d and on a pixel corner for
    even d, so every integer width is available and the ball fits in a straight strip of
    width d. Erosion and dilation are done with Euclidean distance transforms (on a lattice
    of half-element spacing for even d, so corner centres are lattice points), which costs
    O(n) whatever the diameter. ``outside`` None mirrors the design across the domain
    edges; True or False pads with that constant.
    """
    from scipy import ndimage

    pad = diameter + 1
    if outside is None:
        padded = np.pad(phase, pad, mode="symmetric")
    else:
        padded = np.pad(phase, pad, mode="constant", constant_values=outside)
    if padded.all():
        return True
    reach = diameter / 2.0 + 1e-9
    if diameter % 2:
        # ball centres on pixel centres: work on the element lattice
        eroded = ndimage.distance_transform_edt(padded) > reach
        if not eroded.any():
            return False
        covered = ndimage.distance_transform_edt(~eroded) <= reach
    else:
        # ball centres on pixel corners: half-spacing lattice, pixel centres at odd indices
        fine_shape = tuple(2 * n + 1 for n in padded.shape)
        centres = tuple(slice(1, None, 2) for _ in padded.shape)
        corners = tuple(slice(0, None, 2) for _ in padded.shape)
        free = np.ones(fine_shape, dtype=bool)
        free[centres] = padded  # zeros at the centres of the other phase
        eroded_corners = ndimage.distance_transform_edt(free)[corners] / 2.0 > reach
        if not eroded_corners.any():
            return False
        not_eroded = np.ones(fine_shape, dtype=bool)
        not_eroded[corners] = ~eroded_corners
        covered = ndimage.distance_transform_edt(not_eroded)[centres] / 2.0 <= reach
    inner = tuple(slice(pad, pad + n) for n in phase.shape)
    return bool(np.all(covered[inner][phase]))


_EVEN_CHECK_UP_TO = 16


def _largest_fitting_diameter(phase: np.ndarray, limit: int, outside: bool | None) -> int:
    """Largest d <= limit such that opening ``phase`` with a d-ball leaves it unchanged.

    Diameters up to 6 are tried one by one. Beyond them the search runs over odd
    diameters (cheap: element lattice), growing geometrically and then bisecting, and
    finally tries the next even diameter once (up to 16 elements; above that the result
    can be one element short); it assumes that when a ball fits
    everywhere every smaller ball does (true for continuous disks, close for digital ones).
    """
    small = min(limit, 6)
    best = 0
    for d in range(1, small + 1):
        if not _opening_keeps(phase, d, outside):
            return best
        best = d
    if best == limit:
        return best
    best_odd = 5
    failed = None
    d = 7
    while d <= limit:
        if not _opening_keeps(phase, d, outside):
            failed = d
            break
        best_odd = d
        d = d + 2 * max(1, d // 4)
    if failed is None:
        failed = limit + 1 if limit % 2 == 0 else limit + 2  # first odd diameter beyond
    while failed - best_odd > 2:
        mid = best_odd + 2 * ((failed - best_odd) // 4)
        if _opening_keeps(phase, mid, outside):
            best_odd = mid
        else:
            failed = mid
    best = max(best, best_odd)
    # Even diameters need the half-spacing lattice (2**dim times the points); above
    # _EVEN_CHECK_UP_TO elements the one-element refinement is not worth that memory.
    candidate = best + 1
    if candidate <= min(limit, _EVEN_CHECK_UP_TO) and candidate != failed:
        if _opening_keeps(phase, candidate, outside):
            best = candidate
    return best


def minimum_member_size(
    density: np.ndarray, *, element_size: float, level: float = 0.5, boundary: str = "mirror"
) -> dict[str, float | None]:
    """Smallest solid member and smallest void gap of a design, in length units.

    The design is thresholded at ``level`` (solid where density > level). The solid size
    is ``d * element_size`` for the largest digital disk/ball diameter ``d`` (elements)
    whose opening leaves the solid unchanged; likewise for the void. A straight bar of
    ``w`` elements measures ``w`` (above 16 elements possibly ``w - 1``); oblique or curved
    members come out to within about one element of their width. A sharp convex corner
    counts as thin (a disk does not reach into it), so a rectangle cut off by an edge
    measures small with ``boundary="void"``.

    Parameters
    ----------
    density : ndarray
        Element densities, 2D or 3D.
    element_size : float
        Edge length of one element (> 0).
    level : float
        Threshold in (0, 1).
    boundary : {"mirror", "void"}
        What is assumed beyond the domain edges.

    Returns
    -------
    dict
        ``{"solid": float | None, "void": float | None}``; ``None`` when the phase is
        absent. A phase filling the whole domain measures the longest domain side.

    Examples
    --------
    >>> rho = np.zeros((20, 20)); rho[:, 5:9] = 1.0
    >>> minimum_member_size(rho, element_size=0.5)["solid"]
    2.0
    """
    rho = np.asarray(density, dtype=float)
    if rho.ndim not in (2, 3):
        raise ValueError(f"density must be 2D or 3D, got {rho.ndim} dimensions")
    if not np.all(np.isfinite(rho)):
        raise ValueError("density must be finite")
    element_size = float(element_size)
    if not (math.isfinite(element_size) and element_size > 0.0):
        raise ValueError(f"element_size must be a finite number > 0, got {element_size!r}")
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must lie in (0, 1), got {level!r}")
    if boundary not in ("mirror", "void"):
        raise ValueError(f'boundary must be "mirror" or "void", got {boundary!r}')
    solid = rho > level
    limit = max(rho.shape)
    out: dict[str, float | None] = {}
    for name, phase, outside in (("solid", solid, False), ("void", ~solid, True)):
        if not phase.any():
            out[name] = None
            continue
        outside = None if boundary == "mirror" else outside
        out[name] = _largest_fitting_diameter(phase, limit, outside) * element_size
    return out
