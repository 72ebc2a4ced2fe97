"""Build directions as data: axis names or vectors, unit vectors, labels, the plate.

A build direction is given as an axis name (``"+x"`` ... ``"-z"``) or as a vector of 2
(2D) or 3 (3D) numbers of any non-zero length. Everything downstream works with the
unit vector ``d``; an axis name and its vector are the same direction.

Heights are measured along ``d`` in element units: the element with index ``i`` has its
centre at ``i + 0.5`` and its height is ``(i + 0.5) . d``. Its lowest point lies
``0.5 * |d|_1`` below its centre's height. The build plate is the plane normal to ``d``
through the lowest corner of the design domain, raised by an optional offset along
``d``; an element rests on the plate when its lowest point lies on or under the plate.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

__all__ = [
    "AXIS_NAMES",
    "axis_directions",
    "direction_label",
    "element_heights",
    "lateral_frame",
    "parse_directions",
    "plate_level",
    "spread_directions",
    "unit_vector",
]

#: Axis build directions for 2D and 3D domains.
AXIS_NAMES = {2: ("+x", "-x", "+y", "-y"), 3: ("+x", "-x", "+y", "-y", "+z", "-z")}

_TOL = 1e-12


def axis_directions(ndim: int) -> tuple[str, ...]:
    """Axis build directions of a 2D or 3D domain.

    Examples
    --------
    >>> axis_directions(2)
    ('+x', '-x', '+y', '-y')
    """
    if ndim not in AXIS_NAMES:
        raise ValueError(f"a domain has 2 or 3 axes, got {ndim}")
    return AXIS_NAMES[ndim]


def unit_vector(direction, ndim: int) -> np.ndarray:
    """Unit vector of a build direction given as an axis name or a vector.

    Parameters
    ----------
    direction : str or sequence of float
        ``"+x"`` ... ``"-z"``, or ``ndim`` finite numbers, not all zero.
    ndim : int
        2 or 3.

    Returns
    -------
    ndarray of float, shape (ndim,)

    Raises
    ------
    ValueError
        For an unknown name, a vector of the wrong length, a non-finite entry or a zero
        vector.

    Examples
    --------
    >>> unit_vector("-y", 2).tolist()
    [0.0, -1.0]
    >>> [round(float(v), 4) for v in unit_vector([0, 3, 4], 3)]
    [0.0, 0.6, 0.8]
    """
    names = axis_directions(ndim)
    if isinstance(direction, str):
        if direction not in names:
            raise ValueError(
                f"direction must be one of {', '.join(names)} or a vector of {ndim} numbers, "
                f"got {direction!r}"
            )
        out = np.zeros(ndim)
        out["xyz".index(direction[1])] = 1.0 if direction[0] == "+" else -1.0
        return out
    if isinstance(direction, (bytes, bool)) or not isinstance(direction, (Sequence, np.ndarray)):
        raise ValueError(
            f"direction must be an axis name or a vector of {ndim} numbers, got {direction!r}"
        )
    values = list(direction)
    if len(values) != ndim:
        raise ValueError(
            f"a build direction vector needs {ndim} numbers for a {ndim}D domain, "
            f"got {len(values)}"
        )
    for v in values:
        if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)):
            raise ValueError(f"a build direction vector holds numbers, got {v!r}")
    vec = np.array(values, dtype=float)
    if not np.all(np.isfinite(vec)):
        raise ValueError(f"a build direction vector must be finite, got {values}")
    norm = float(np.linalg.norm(vec))
    if not norm > 1e-12 * max(1.0, float(np.max(np.abs(vec)))) or norm == 0.0:
        raise ValueError(f"a build direction vector must not be zero, got {values}")
    return vec / norm


def direction_label(direction, ndim: int) -> str:
    """Short text for a direction: the axis name when it is an axis, else the unit vector.

    Examples
    --------
    >>> direction_label([0, 0, 2], 3)
    '+z'
    >>> direction_label([1, 1], 2)
    '[0.7071, 0.7071]'
    """
    vec = unit_vector(direction, ndim)
    for name in axis_directions(ndim):
        if np.allclose(vec, unit_vector(name, ndim), atol=1e-12, rtol=0):
            return name
    return "[" + ", ".join(f"{v:.4g}" if abs(v) >= 1e-12 else "0" for v in vec) + "]"


def lateral_frame(d: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two unit vectors that with the 3D unit vector ``d`` make a right-handed frame.

    Examples
    --------
    >>> e1, e2 = lateral_frame(np.array([0.0, 0.0, 1.0]))
    >>> [round(float(v), 12) + 0.0 for v in (e1 @ e2, e1 @ [0, 0, 1], e2 @ [0, 0, 1])]
    [0.0, 0.0, 0.0]
    """
    helper = np.array([1.0, 0.0, 0.0]) if abs(d[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    e1 = np.cross(d, helper)
    e1 /= np.linalg.norm(e1)
    return e1, np.cross(d, e1)


def element_heights(shape: Sequence[int], d: np.ndarray) -> np.ndarray:
    """Height of every element centre along the unit direction ``d``, element units."""
    grids = np.meshgrid(*[np.arange(n) + 0.5 for n in shape], indexing="ij")
    return sum(g * float(c) for g, c in zip(grids, d, strict=True))


def plate_level(shape: Sequence[int], d: np.ndarray, offset: float = 0.0) -> float:
    """Height of the build plate: the domain's lowest corner plus ``offset`` (element units).

    Examples
    --------
    >>> plate_level((4, 3), np.array([0.0, 1.0]))
    0.0
    >>> plate_level((4, 3), np.array([0.0, -1.0]))
    -3.0
    """
    low = sum(min(0.0, float(n) * float(c)) for n, c in zip(shape, d, strict=True))
    return low + float(offset)


def spread_directions(count: int, ndim: int) -> np.ndarray:
    """``count`` unit vectors spread evenly over the circle (2D) or the sphere (3D).

    The sphere uses the golden-angle (Fibonacci) lattice (Gonzalez, Mathematical
    Geosciences 42:49-64, 2010), which spreads points nearly evenly for any count.

    Examples
    --------
    >>> v = spread_directions(4, 2)
    >>> np.round(v, 6).tolist()
    [[1.0, 0.0], [0.0, 1.0], [-1.0, 0.0], [-0.0, -1.0]]
    >>> bool(np.allclose(np.linalg.norm(spread_directions(50, 3), axis=1), 1.0))
    True
    """
    if count < 1:
        raise ValueError(f"count must be at least 1, got {count}")
    k = np.arange(count, dtype=float)
    if ndim == 2:
        t = 2.0 * math.pi * k / count
        return np.column_stack([np.cos(t), np.sin(t)])
    if ndim != 3:
        raise ValueError(f"a domain has 2 or 3 axes, got {ndim}")
    z = 1.0 - (2.0 * k + 1.0) / count
    r = np.sqrt(np.maximum(0.0, 1.0 - z * z))
    phi = k * math.pi * (3.0 - math.sqrt(5.0))
    return np.column_stack([r * np.cos(phi), r * np.sin(phi), z])


def parse_directions(text: str | None, ndim: int) -> list | None:
    """Split ``"+x,-x,0 1 1"`` into axis names and vectors, checked for the dimension.

    Examples
    --------
    >>> parse_directions("+y, -y", 2)
    ['+y', '-y']
    >>> parse_directions("+z, 0 1 1", 3)
    ['+z', [0.0, 1.0, 1.0]]
    """
    if text is None:
        return None
    out: list = []
    for entry in (e.strip() for e in str(text).split(",")):
        if not entry:
            continue
        parts = entry.split()
        if len(parts) == 1 and parts[0][:1] in "+-" and parts[0][1:] in ("x", "y", "z"):
            value = parts[0]
        else:
            try:
                value = [float(v) for v in parts]
            except ValueError:
                raise ValueError(f"--directions: {entry!r} is neither an axis name such as +z "
                                 "nor a vector of numbers such as '0 1 1'") from None
        try:
            unit_vector(value, ndim)
        except ValueError as exc:
            raise ValueError(f"--directions: {entry!r}: {exc}") from None
        out.append(value)
    if not out:
        raise ValueError("--directions: give at least one direction, e.g. --directions +z,-z")
    labels = [direction_label(d, ndim) for d in out]
    if len(set(labels)) != len(labels):
        raise ValueError(f"--directions: a direction is repeated in {' '.join(labels)}")
    return out
