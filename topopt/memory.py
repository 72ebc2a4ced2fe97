"""Memory budget of a run, checked before anything large is allocated.

:func:`estimate_memory` gives a lower estimate of the bytes a run must hold at once
(element arrays, the density-filter kernel, the stiffness matrix and its solver);
:func:`check_memory` refuses a problem whose estimate exceeds :func:`memory_cap`, with
one line naming the key that drives the size. The cap is the machine's physical
memory, or the user's cap in GB (``buttress --max-memory GB`` or the environment
variable ``BUTTRESS_MAX_MEMORY``).

The estimate is deliberately low (a direct solver's factor is counted as no larger
than the matrix, though it is several times larger in practice): a refused problem
certainly does not fit, and a problem that passes may still be too large for a direct
solver. Counting rules are common practice for sparse storage (8-byte values and
8-byte indices per stored entry).
"""

from __future__ import annotations

import math
import os

ENV = "BUTTRESS_MAX_MEMORY"


def machine_memory() -> int:
    """Physical memory of this machine in bytes (a large number where unknown)."""
    try:
        return int(os.sysconf("SC_PHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (AttributeError, OSError, ValueError):
        return 2**46


def memory_cap() -> int:
    """The memory a run may use: ``BUTTRESS_MAX_MEMORY`` (GB) or the machine's memory."""
    text = os.environ.get(ENV)
    if text:
        gb = parse_gigabytes(text, name=ENV)
        return int(gb * 2**30)
    return machine_memory()


def parse_gigabytes(text: str, *, name: str = "--max-memory") -> float:
    """A positive, finite number of gigabytes (GiB), or ``ValueError`` naming ``name``."""
    try:
        gb = float(text)
    except (TypeError, ValueError):
        raise ValueError(f"{name}: expected a number of gigabytes, got {text!r}") from None
    if not (math.isfinite(gb) and 0 < gb <= 2**40):
        raise ValueError(f"{name}: expected a positive number of gigabytes, got {text!r}")
    return gb


def estimate_memory(shape, *, filter_radius: float, element_size: float,
                    solver: str = "auto") -> dict[str, int]:
    """Lower estimate of the bytes a run holds at once, by part.

    Examples
    --------
    >>> parts = estimate_memory((120, 60), filter_radius=1.5, element_size=1.0)
    >>> sorted(parts)
    ['elements', 'filter', 'matrix', 'solver']
    """
    shape = [int(n) for n in shape]
    dim = len(shape)
    n_elements = math.prod(shape)
    n_dofs = dim * math.prod(n + 1 for n in shape)
    ratio = filter_radius / element_size if element_size > 0 else math.inf
    reach = int(math.ceil(min(ratio, 1e12))) - 1 if math.isfinite(ratio) else 10**12
    reach = max(reach, 0)
    kernel = math.prod(2 * min(reach, n - 1) + 1 for n in shape)
    # each node couples with 3^dim nodes (itself and its neighbours), dim x dim entries
    stored = n_dofs * dim * 3**dim // 2  # one triangle of the symmetric matrix
    parts = {
        # design, physical density, moduli, gradients, filter buffers: ~12 arrays
        "elements": 12 * 8 * n_elements,
        # the kernel and the distance grids built to make it (3 arrays)
        "filter": 3 * 8 * kernel,
        # values and indices
        "matrix": 16 * stored,
    }
    if solver == "multigrid":
        parts["solver"] = 8 * n_dofs * 8 + parts["matrix"] // 2  # CG vectors and coarse levels
    else:
        parts["solver"] = parts["matrix"]  # a factor holds at least the matrix' entries
    return parts


def check_memory(shape, *, filter_radius: float, element_size: float, solver: str = "auto",
                 source: str = "<problem>") -> None:
    """Raise ``ValueError`` (one line naming the key) when a run cannot fit in memory."""
    parts = estimate_memory(shape, filter_radius=filter_radius, element_size=element_size,
                            solver=solver)
    need = sum(parts.values())
    cap = memory_cap()
    if need <= cap:
        return
    key = "optimize.filter_radius" if parts["filter"] > need / 2 else "domain.shape"
    where = ("the --max-memory / BUTTRESS_MAX_MEMORY cap" if os.environ.get(ENV)
             else "this machine's memory")
    raise ValueError(f"{source}: {key}: the run needs at least {need / 2**30:.3g} GiB, more "
                     f"than {where} ({cap / 2**30:.3g} GiB); use a coarser grid or a smaller "
                     "filter radius")

