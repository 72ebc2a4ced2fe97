"""Projection settings of a problem: thresholds, filter radius and beta schedule.

Three cases, decided by the problem file:

* no ``[optimize.projection]`` and no ``min_member_size``: no projection;
* ``[optimize.projection]`` alone: one projected design with threshold ``eta``;
* ``[optimize] min_member_size``: the robust formulation of Wang, Lazarov & Sigmund
  (SMO 43:767-784, 2011) with an eroded, a blueprint and a dilated design (thresholds
  0.5 + delta, 0.5, 0.5 - delta); the worst compliance of the three is minimised and
  the volume of the blueprint design is constrained. The filter radius follows from the
  wanted member size by :func:`filters.projection.length_scale_radius`.
"""

from __future__ import annotations

from filters.projection import BetaContinuation, length_scale_radius

#: Index of the blueprint (printed) design among the robust thresholds.
BLUEPRINT = 1


def is_robust(problem) -> bool:
    """Return True when the problem asks for a minimum member size."""
    return problem.optimize.min_member_size is not None


def projection_settings(problem):
    """Return the projection settings in force (defaults when only min_member_size is set)."""
    from topopt.problem import Projection

    settings = problem.optimize.projection
    if settings is None and is_robust(problem):
        settings = Projection()
    return settings


def thresholds(problem) -> tuple[float, ...]:
    """Projection thresholds: () without projection, (eta,) or (eroded, blueprint, dilated).

    Examples
    --------
    >>> from topopt.problem import load_problem
    >>> thresholds(load_problem("examples/mbb-beam.toml"))
    ()
    >>> thresholds(load_problem("examples/mbb-beam-crisp.toml"))  # min_member_size, delta 0.25
    (0.75, 0.5, 0.25)
    """
    settings = projection_settings(problem)
    if settings is None:
        return ()
    if is_robust(problem):
        delta = settings.robust_delta
        return (0.5 + delta, 0.5, 0.5 - delta)
    return (settings.eta,)


def filter_radius(problem) -> float:
    """Density-filter radius: from ``min_member_size`` when set, else ``filter_radius``.

    The member-size rule is derived for a straight member across the blueprint design
    (thresholds 0.5 + delta and 0.5); with symmetric thresholds the same radius gives the
    same smallest void gap.
    """
    if not is_robust(problem):
        return problem.optimize.filter_radius
    delta = projection_settings(problem).robust_delta
    return length_scale_radius(
        problem.optimize.min_member_size,
        eta_eroded=0.5 + delta,
        eta_blueprint=0.5,
        dim=problem.grid.dim,
    )


def beta_schedule(problem) -> BetaContinuation | None:
    """Return the beta continuation of the problem, or None without projection."""
    settings = projection_settings(problem)
    if settings is None:
        return None
    return BetaContinuation(
        beta_start=settings.beta_start, beta_max=settings.beta_max, every=settings.every,
        stagnation=settings.stall_change, extra_steps=GREY_EXTRA_STEPS,
    )


#: A design that converges at beta_max with a grey level above GREY_TARGET is not called
#: finished: beta is doubled again, at most GREY_EXTRA_STEPS times. Raising beta until the
#: design is discrete is common practice (Guest, Prevost & Belytschko 2004; the grey-level
#: measure is Sigmund's, SMO 33:401-424, 2007); the 2 % target is the issue's acceptance
#: level. Measured: thin struts at the critical angle stayed half grey at beta 32 and
#: left the regions they feed half printed.
GREY_TARGET = 0.02
GREY_EXTRA_STEPS = 2
