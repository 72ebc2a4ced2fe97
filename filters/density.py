"""Linear-hat density filter (Bruns & Tortorelli 2001; Bourdin 2001), boundary-normalised.

The filtered density of element e is a weighted mean of the densities of the elements
whose centres lie within ``radius`` of its centre, with weights ``radius - distance``.
Near the domain boundary the weights are normalised over the elements that exist, so a
uniform field stays uniform. Applied as a normalised convolution, O(n) in time and
memory; :func:`density_filter_matrix` builds the same operator as a sparse matrix for
checks.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage, sparse


def hat_kernel(dim: int, *, radius: float, element_size: float,
               shape: tuple[int, ...] | None = None) -> np.ndarray:
    """Weights ``max(0, radius - distance)`` on the element lattice around the centre.

    With ``shape`` (the grid the kernel is used on) the kernel reaches at most
    ``shape[a] - 1`` elements along axis ``a``: farther weights would only ever meet
    the zero padding, so the filter is unchanged and a radius far larger than the
    domain costs no memory.

    Examples
    --------
    >>> hat_kernel(2, radius=1.5, element_size=1.0).shape
    (3, 3)
    """
    if not radius > 0:
        raise ValueError(f"radius must be > 0, got {radius!r}")
    if not element_size > 0:
        raise ValueError(f"element_size must be > 0, got {element_size!r}")
    reach = int(np.ceil(min(radius / element_size, 1e12))) - 1  # inf-safe
    reach = max(reach, 0)
    reaches = [reach] * dim if shape is None else [min(reach, int(n) - 1) for n in shape]
    axes = [np.arange(-r, r + 1) * element_size for r in reaches]
    grids = np.meshgrid(*axes, indexing="ij")
    dist = np.sqrt(sum(g**2 for g in grids))
    return np.maximum(0.0, radius - dist)


class DensityFilter:
    """Normalised convolution with the hat kernel; see :func:`density_filter`."""

    def __init__(self, shape: tuple[int, ...], *, radius: float, element_size: float):
        self.shape = tuple(shape)
        self.kernel = hat_kernel(len(self.shape), radius=radius, element_size=element_size,
                                 shape=self.shape)
        self.weight_sum = self._convolve(np.ones(self.shape))

    def _convolve(self, x: np.ndarray) -> np.ndarray:
        # The kernel is symmetric, so correlation equals convolution and the operator
        # is its own transpose up to the normalisation.
        return ndimage.correlate(x, self.kernel, mode="constant", cval=0.0)

    def forward(self, x: np.ndarray) -> np.ndarray:
        """Filtered densities."""
        return self._convolve(np.asarray(x, dtype=float)) / self.weight_sum

    def backward(self, dy: np.ndarray) -> np.ndarray:
        """Vector-Jacobian product (the filter is linear, so no state is needed)."""
        return self._convolve(np.asarray(dy, dtype=float) / self.weight_sum)


def density_filter(shape: tuple[int, ...], *, radius: float, element_size: float) -> DensityFilter:
    """Linear-hat density filter on a grid of ``shape`` elements.

    Parameters
    ----------
    shape : tuple of int
        Element grid shape (2 or 3 entries).
    radius : float
        Filter radius in length units; elements closer than this contribute.
    element_size : float
        Element edge length.

    Examples
    --------
    >>> f = density_filter((5, 4), radius=1.5, element_size=1.0)
    >>> bool(np.allclose(f.forward(np.full((5, 4), 0.3)), 0.3))
    True
    """
    if len(shape) not in (2, 3):
        raise ValueError(f"shape must have 2 or 3 entries, got {shape!r}")
    return DensityFilter(shape, radius=radius, element_size=element_size)


def density_filter_matrix(
    shape: tuple[int, ...], *, radius: float, element_size: float
) -> sparse.csr_matrix:
    """The same filter as an explicit row-normalised sparse matrix (reference for checks).

    Examples
    --------
    >>> H = density_filter_matrix((3, 3), radius=1.5, element_size=1.0)
    >>> bool(np.allclose(H.sum(axis=1), 1.0))
    True
    """
    dim = len(shape)
    n = int(np.prod(shape))
    centres = np.indices(shape).reshape(dim, -1).T * element_size
    from scipy.spatial import cKDTree

    tree = cKDTree(centres)
    pairs = tree.query_pairs(radius, output_type="ndarray")
    rows = np.concatenate([pairs[:, 0], pairs[:, 1], np.arange(n)])
    cols = np.concatenate([pairs[:, 1], pairs[:, 0], np.arange(n)])
    dist = np.linalg.norm(centres[rows] - centres[cols], axis=1)
    w = np.maximum(0.0, radius - dist)
    H = sparse.csr_matrix((w, (rows, cols)), shape=(n, n))
    H.eliminate_zeros()
    row_sum = np.asarray(H.sum(axis=1)).ravel()
    return sparse.diags(1.0 / row_sum) @ H
