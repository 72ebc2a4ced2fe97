"""buttress: support-aware topology optimisation for laser powder-bed fusion.

Scripts and notebooks use two calls:

>>> import topopt
>>> problem = topopt.load_problem("examples/mbb-beam.toml")
>>> result = topopt.optimize(problem)
>>> result.converged, round(result.volume_fraction, 3)
(True, 0.5)

``import topopt`` is cheap: the public names below are loaded on first use, so the
command line answers ``--help`` without loading the solver stack (numpy, SciPy, numba).
"""

from topopt.version import __version__

#: Public name -> the module that defines it (imported on first access).
_PUBLIC = {
    "Problem": "topopt.problem",
    "ProblemError": "topopt.problem",
    "load_problem": "topopt.problem",
    "Result": "topopt.driver",
    "optimize": "topopt.driver",
}

__all__ = ["Problem", "ProblemError", "Result", "__version__", "load_problem", "optimize"]


def __getattr__(name: str):
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'topopt' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module), name)
    globals()[name] = value  # later lookups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
