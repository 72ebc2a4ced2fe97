"""The filter protocol and a chain that composes filters."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Protocol, runtime_checkable

import numpy as np


@runtime_checkable
class Filter(Protocol):
    """What every filter provides.

    ``forward`` maps an array to an array of the same shape; ``backward`` returns the
    vector-Jacobian product ``J(x)^T dy`` at the last ``forward`` input ``x``.
    """

    def forward(self, x: np.ndarray) -> np.ndarray:  # pragma: no cover - protocol
        """Apply the filter."""
        ...

    def backward(self, dy: np.ndarray) -> np.ndarray:  # pragma: no cover - protocol
        """Vector-Jacobian product at the last forward input."""
        ...


class FilterChain:
    """Filters applied one after another; ``backward`` runs them in reverse.

    Examples
    --------
    >>> chain = FilterChain([])
    >>> chain.forward(np.ones(3)).tolist()
    [1.0, 1.0, 1.0]
    """

    def __init__(self, links: Sequence[Filter]):
        self.links = list(links)

    def forward(self, x: np.ndarray) -> np.ndarray:
        """Apply every link in order."""
        y = np.asarray(x, dtype=float)
        for link in self.links:
            y = link.forward(y)
        return y

    def backward(self, dy: np.ndarray) -> np.ndarray:
        """Vector-Jacobian product of the whole chain at the last forward input."""
        d = np.asarray(dy, dtype=float)
        for link in reversed(self.links):
            d = link.backward(d)
        return d


class FixedValues:
    """Hold some entries at fixed values (passive solid = 1, passive void = 0).

    Parameters
    ----------
    solid, void : ndarray of bool
        Entries forced to 1 and to 0; their derivative is zero.

    Examples
    --------
    >>> f = FixedValues(np.array([True, False]), np.array([False, False]))
    >>> f.forward(np.array([0.2, 0.2])).tolist()
    [1.0, 0.2]
    """

    def __init__(self, solid: np.ndarray, void: np.ndarray):
        self.solid = np.asarray(solid, dtype=bool)
        self.void = np.asarray(void, dtype=bool)
        self.free = ~(self.solid | self.void)

    def forward(self, x: np.ndarray) -> np.ndarray:
        """Overwrite the fixed entries."""
        return np.where(self.solid, 1.0, np.where(self.void, 0.0, x))

    def backward(self, dy: np.ndarray) -> np.ndarray:
        """Zero the derivative of the fixed entries."""
        return np.where(self.free, dy, 0.0)
