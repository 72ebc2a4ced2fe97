"""buttress: support-aware topology optimisation for laser powder-bed fusion.

Scripts and notebooks use two calls:

>>> import topopt
>>> problem = topopt.load_problem("examples/mbb-beam.toml")
>>> result = topopt.optimize(problem)
>>> result.converged, round(result.volume_fraction, 3)
(True, 0.5)
"""

__version__ = "0.1.0"

from topopt.driver import Result, optimize  # noqa: E402
from topopt.problem import Problem, ProblemError, load_problem  # noqa: E402

__all__ = ["Problem", "ProblemError", "Result", "__version__", "load_problem", "optimize"]
