"""Helpers shared by the tests: small problem files, a tiny study, and the refusal check.

:func:`refused` is the contract for bad input (DESIGN.md, "Problem file": "one clear
line naming the file, the key and what is expected; exit code 2"; issue 15: "no
traceback, the results folder byte-for-byte unchanged, in under 5 s, and without
allocating more than a small fixed amount"). Imported as ``helpers`` (``pythonpath`` in
``pyproject.toml``).
"""

from __future__ import annotations

import copy
import json
import time
import tracemalloc
from pathlib import Path


def small_problem(shape=(20, 10), *, element_size=1.0, max_iterations: int = 4,
                  name: str = "small plate (invented)") -> str:
    """A small problem file of our own: restrained at x = 0, a unit load at the far bottom edge.

    2D: the load at (L, 0) along -y; 3D: along the edge x = L, z = 0, along -z.
    ``element_size`` is written as given (``1`` stays an integer in the file).
    """
    length = float(shape[0] * element_size)
    down = "y" if len(shape) == 2 else "z"
    force = "[0.0, -1.0]" if len(shape) == 2 else "[0.0, 0.0, -1.0]"
    return f"""\
name = "{name}"

[domain]
shape = {list(shape)}
element_size = {element_size!r}

[material]
youngs_modulus = 1000.0
poisson_ratio = 0.3

[[restraints]]
where = {{ x = [0.0, 0.0] }}

[[loads]]
where = {{ x = [{length!r}, {length!r}], {down} = [0.0, 0.0] }}
force = {force}

[optimize]
volume_fraction = 0.4
max_iterations = {max_iterations}
"""


#: The 20 x 10 plate most command-line tests run (4 iterations, well under a second).
SMALL = small_problem()


def write_problem(folder: Path, text: str = SMALL, *, name: str = "small.toml") -> Path:
    """Write ``text`` as ``folder/name``; returns the path."""
    path = Path(folder) / name
    path.write_text(text)
    return path


def snapshot(folder: Path) -> dict:
    """Every file under ``folder`` and its siblings, with bytes and modification time."""
    folder = Path(folder)
    out = {}
    for p in sorted(folder.parent.rglob("*")):
        if p.is_file():
            out[str(p.relative_to(folder.parent))] = (p.read_bytes(), p.stat().st_mtime_ns)
    return out


def refused(capsys, argv: list[str], folder: Path, *needles: str, seconds: float = 5.0,
            max_bytes: int | None = None) -> str:
    """Run ``buttress argv``: exit 2, one line naming ``needles``, no traceback, ``folder`` unchanged.

    Also within ``seconds``; with ``max_bytes`` the allocations traced by
    :mod:`tracemalloc` (which numpy reports to) must stay below it. Returns the line.
    """
    from topopt.cli import main

    before = snapshot(folder)
    if max_bytes is not None:
        tracemalloc.start()
    t0 = time.perf_counter()
    try:
        code = main(argv)
        elapsed = time.perf_counter() - t0
        peak = tracemalloc.get_traced_memory()[1] if max_bytes is not None else 0
    finally:
        tracemalloc.stop()
    captured = capsys.readouterr()
    err = captured.err
    assert code == 2, err
    assert "Traceback" not in err and "Traceback" not in captured.out, err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    for needle in needles:
        assert needle in err, (needle, err)
    assert snapshot(folder) == before
    assert elapsed < seconds, elapsed
    if max_bytes is not None:
        assert peak < max_bytes, peak
    return lines[0]


#: A 24 x 12 cantilever of our own (unit modulus) for studies: each case well under a second.
TINY = {
    "name": "tiny cantilever (invented)",
    "domain": {"shape": [24, 12], "element_size": 1.0},
    "material": {"youngs_modulus": 1.0, "poisson_ratio": 0.3},
    "restraints": [{"where": {"x": [0.0, 0.0]}, "fix": ["x", "y"]}],
    "loads": [{"where": {"x": [24.0, 24.0], "y": [6.0, 6.0]}, "force": [0.0, -1.0]}],
    "optimize": {"volume_fraction": 0.4, "filter_radius": 1.5, "max_iterations": 15},
}


def write_study(folder: Path, vary: dict, *, iterations: int = 15,
                change_tolerance: float | None = None) -> Path:
    """Write ``tiny.toml`` (:data:`TINY`) and ``study.toml`` varying ``vary``; returns the study."""
    from topopt.problem import to_toml

    problem = copy.deepcopy(TINY)
    problem["optimize"]["max_iterations"] = iterations
    if change_tolerance is not None:
        problem["optimize"]["change_tolerance"] = change_tolerance
    (folder / "tiny.toml").write_text(to_toml(problem))
    lines = ['problem = "tiny.toml"', "[vary]"]
    lines += [f'"{k}" = {json.dumps(v)}' for k, v in vary.items()]
    path = folder / "study.toml"
    path.write_text("\n".join(lines) + "\n")
    return path
