"""Structured voxel grid: shape, element size, coordinates, dof maps and region selection.

Numbering (used by every module that touches dofs):

* elements are numbered in C order over their (i, j[, k]) index, so ``density.ravel()``
  lists them in element-number order;
* nodes likewise in C order over the node array of shape ``shape + 1``;
* dof ``d`` of node ``n`` has number ``n * dim + d`` (d = 0 for x, 1 for y, 2 for z);
* local node order of an element: counter-clockwise in the bottom face
  (0,0), (1,0), (1,1), (0,1), then the same at the top face in 3D.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from functools import cached_property

import numpy as np

AXES = ("x", "y", "z")

#: Local node offsets of a Q4 (2D) and an H8 (3D) element.
LOCAL_NODES = {
    2: np.array([[0, 0], [1, 0], [1, 1], [0, 1]]),
    3: np.array(
        [[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0], [0, 0, 1], [1, 0, 1], [1, 1, 1], [0, 1, 1]]
    ),
}


@dataclass(frozen=True)
class Grid:
    """A structured grid of square (2D) or cubic (3D) elements.

    Parameters
    ----------
    shape : tuple of int
        Number of elements along x, y (and z).
    element_size : float
        Edge length of one element.
    thickness : float
        Out-of-plane thickness (2D only; 1.0 in 3D).

    Examples
    --------
    >>> g = Grid((4, 2), 0.5)
    >>> g.n_elements, g.n_nodes, g.n_dofs
    (8, 15, 30)
    """

    shape: tuple[int, ...]
    element_size: float
    thickness: float = 1.0

    def __post_init__(self) -> None:
        if len(self.shape) not in (2, 3):
            raise ValueError(f"shape must have 2 or 3 entries, got {self.shape!r}")
        if any(int(n) < 1 for n in self.shape):
            raise ValueError(f"shape entries must be >= 1, got {self.shape!r}")
        if not self.element_size > 0:
            raise ValueError(f"element_size must be > 0, got {self.element_size!r}")
        object.__setattr__(self, "shape", tuple(int(n) for n in self.shape))

    @property
    def dim(self) -> int:
        """Number of space dimensions."""
        return len(self.shape)

    @property
    def node_shape(self) -> tuple[int, ...]:
        """Shape of the node array (one more than ``shape`` along each axis)."""
        return tuple(n + 1 for n in self.shape)

    @property
    def n_elements(self) -> int:
        """Number of elements."""
        return int(np.prod(self.shape))

    @property
    def n_nodes(self) -> int:
        """Number of nodes."""
        return int(np.prod(self.node_shape))

    @property
    def n_dofs(self) -> int:
        """Number of displacement degrees of freedom."""
        return self.n_nodes * self.dim

    @property
    def size(self) -> tuple[float, ...]:
        """Physical extent of the domain along each axis."""
        return tuple(n * self.element_size for n in self.shape)

    @property
    def element_volume(self) -> float:
        """Volume of one element (area times thickness in 2D)."""
        h = self.element_size
        return h * h * self.thickness if self.dim == 2 else h**3

    @cached_property
    def element_nodes(self) -> np.ndarray:
        """Node numbers of each element, shape (n_elements, 2**dim), local order."""
        index = np.indices(self.shape).reshape(self.dim, -1).T  # (n_el, dim)
        corners = index[:, None, :] + LOCAL_NODES[self.dim][None, :, :]
        return np.ravel_multi_index(tuple(np.moveaxis(corners, -1, 0)), self.node_shape)

    @cached_property
    def element_dofs(self) -> np.ndarray:
        """Dof numbers of each element, shape (n_elements, dim * 2**dim)."""
        nodes = self.element_nodes
        d = self.dim
        return (nodes[:, :, None] * d + np.arange(d)).reshape(nodes.shape[0], -1)

    def node_coordinates(self) -> np.ndarray:
        """Coordinates of the nodes, shape (n_nodes, dim)."""
        return np.indices(self.node_shape).reshape(self.dim, -1).T * self.element_size

    def element_centers(self) -> np.ndarray:
        """Coordinates of the element centres, shape (n_elements, dim)."""
        return (np.indices(self.shape).reshape(self.dim, -1).T + 0.5) * self.element_size

    def select_nodes(self, region: Mapping) -> np.ndarray:
        """Node numbers inside ``region`` (see :func:`region_mask`)."""
        return np.flatnonzero(region_mask(self.node_coordinates(), region, tol=1e-6 * self.element_size))

    def select_elements(self, region: Mapping) -> np.ndarray:
        """Boolean array of element shape: True where the element centre lies in ``region``."""
        mask = region_mask(self.element_centers(), region, tol=1e-6 * self.element_size)
        return mask.reshape(self.shape)


def region_mask(points: np.ndarray, region: Mapping, *, tol: float) -> np.ndarray:
    """Which points lie in a box, disk or cylinder.

    Parameters
    ----------
    points : ndarray, shape (n, dim)
        Coordinates.
    region : mapping
        A box ``{"x": [lo, hi], "y": [lo, hi], ...}`` (an absent axis means the whole
        range), or a disk ``{"center": [...], "radius": r}``; in 3D a cylinder adds
        ``"axis": "x"|"y"|"z"`` and its ``center`` gives the two coordinates across the
        axis, or three coordinates with the one along the axis ignored. A box may be
        combined with a disk/cylinder: a point must satisfy both.
    tol : float
        Points within ``tol`` of the boundary count as inside.

    Returns
    -------
    ndarray of bool, shape (n,)

    Examples
    --------
    >>> pts = np.array([[0.0, 0.0], [1.0, 0.0], [2.0, 0.0]])
    >>> region_mask(pts, {"x": [0.0, 1.0]}, tol=1e-9).tolist()
    [True, True, False]
    """
    dim = points.shape[1]
    inside = np.ones(points.shape[0], dtype=bool)
    for a, name in enumerate(AXES[:dim]):
        if name in region:
            lo, hi = region[name]
            inside &= (points[:, a] >= lo - tol) & (points[:, a] <= hi + tol)
    if "center" in region:
        center = np.asarray(region["center"], dtype=float)
        across = list(range(dim))
        if dim == 3:
            along = AXES.index(region.get("axis", "z"))
            across.remove(along)
            if center.size == 3:
                center = center[across]
        dist = np.linalg.norm(points[:, across] - center, axis=1)
        inside &= dist <= float(region["radius"]) + tol
    return inside


def resample(values: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    """Element values of one grid carried over to a grid of ``shape`` on the same domain.

    Linear interpolation between element centres, with the edge values held beyond the
    outer centres (``scipy.ndimage.zoom``, order 1, ``grid_mode=True``: the elements are
    cells spanning the domain, not samples at its corners). The result stays within the
    range of ``values``; the same shape gives the values back unchanged.

    Examples
    --------
    >>> resample(np.array([[0.0, 1.0]]), (1, 4))
    array([[0.  , 0.25, 0.75, 1.  ]])
    """
    from scipy import ndimage

    values = np.asarray(values, dtype=float)
    shape = tuple(int(n) for n in shape)
    if values.ndim != len(shape):
        raise ValueError(f"resample: {values.ndim}D values for a {len(shape)}D grid")
    if values.shape == shape:
        return values.copy()
    factors = [new / old for new, old in zip(shape, values.shape, strict=True)]
    out = ndimage.zoom(values, factors, order=1, mode="nearest", grid_mode=True)
    return np.clip(out, values.min(), values.max())
