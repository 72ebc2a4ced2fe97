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
