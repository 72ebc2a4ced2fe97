"""Pure array transforms with their adjoints (vector-Jacobian products).

A filter is any object with ``forward(x) -> y`` and ``backward(dy) -> dx``, where
``backward`` is the vector-Jacobian product at the last ``forward`` input. Filters
compose in a :class:`~filters.chain.FilterChain`; the last link yields the physical
density used by the finite-element model. This package never imports ``topopt``.
"""

from filters.chain import Filter, FilterChain, FixedValues

__all__ = ["Filter", "FilterChain", "FixedValues"]
