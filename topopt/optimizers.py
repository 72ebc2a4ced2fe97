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
) -> np.ndarray:
    """Optimality-criteria update with bisection on the volume multiplier.

    The heuristic fixed-point update x_e * (-dc_e / (lambda dv_e))**damping with move
    limits (Bendsoe & Sigmund 2003, sec. 1.2.1). The volume constraint is linearised
    at ``x`` (``volume + dv . (x_new - x) = volume_fraction``), which is exact for a
    linear filter chain and self-correcting for nonlinear ones.

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
    lo_x = np.maximum(0.0, x - move)
    hi_x = np.minimum(1.0, x + move)
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
