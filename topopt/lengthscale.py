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


def _digital_ball(diameter: int, dim: int) -> np.ndarray:
    """Pixels of a ``diameter``-wide box whose centres lie in the inscribed disk/ball.

    For odd diameters the ball is centred on a pixel, for even ones on a pixel corner, so
    every integer width is available and a ball of diameter d fits in a strip of width d
    along any axis.
    """
    offsets = np.arange(diameter) - (diameter - 1) / 2.0
    grids = np.meshgrid(*([offsets] * dim), indexing="ij")
    dist2 = sum(gr**2 for gr in grids)
    return dist2 <= (diameter / 2.0) ** 2 + 1e-9


def _largest_fitting_diameter(phase: np.ndarray, limit: int, outside: bool | None) -> int:
    """Largest d <= limit such that opening ``phase`` with a d-ball leaves it unchanged.

    ``outside`` None mirrors the design across the domain edges; True or False pads with
    that constant.
    """
    from scipy import ndimage

    best = 0
    for d in range(1, limit + 1):
        pad = d + 1
        if outside is None:
            padded = np.pad(phase, pad, mode="symmetric")
        else:
            padded = np.pad(phase, pad, mode="constant", constant_values=outside)
        ball = _digital_ball(d, phase.ndim)
        opened = ndimage.binary_opening(padded, structure=ball)
        inner = tuple(slice(pad, pad + n) for n in phase.shape)
        if not np.array_equal(opened[inner], phase):
            break
        best = d
    return best


def minimum_member_size(
    density: np.ndarray, *, element_size: float, level: float = 0.5, boundary: str = "mirror"
) -> dict[str, float | None]:
    """Smallest solid member and smallest void gap of a design, in length units.

    The design is thresholded at ``level`` (solid where density > level). The solid size
    is ``d * element_size`` for the largest digital disk/ball diameter ``d`` (elements)
    whose opening leaves the solid unchanged; likewise for the void. A straight bar of
    ``w`` elements measures ``w``; oblique or curved members come out to within about one
    element of their width.

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
