"""Time the printability filter (forward + backward) against one linear solve.

For each grid size the script assembles the stiffness matrix of a cantilever-like
setup (left face fixed, random densities in [0.01, 1]), times one solve with the
sparse direct solver (CHOLMOD where installed, SuperLU otherwise) and times
forward + backward of the printability filter along an axis at 45 degrees and along
tilted directions at several angles (the cone stencil grows with shallower angles and
with directions off the axes). Times are the minimum of several repeats (the machine is shared);
the solve is timed including the numeric factorisation, as the optimiser pays it every
iteration. Writes benchmarks/printability.md (or the --out path).

Run:  .venv/bin/python benchmarks/printability.py [--quick] [--out FILE]
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from filters.printability import printability_filter  # noqa: E402
from topopt.assembly import Assembler  # noqa: E402
from topopt.elements import element_stiffness  # noqa: E402
from topopt.grid import Grid  # noqa: E402
from topopt.problem import BuildSettings  # noqa: E402
from topopt.solvers import cholmod_available, make_solver  # noqa: E402

SIZES = [(120, 60), (240, 120), (480, 240), (30, 15, 15), (40, 20, 20), (48, 24, 24)]
QUICK = [(120, 60), (240, 120), (30, 15, 15)]
#: (label, direction 2D, direction 3D, angle): the filter cases timed at every size
CASES = (
    ("axis 45", "+y", "+z", 45.0),
    ("tilted 45", [1.0, 2.0], [0.0, 1.0, 1.0], 45.0),
    ("tilted 35", [1.0, 2.0], [1.0, 1.0, 1.0], 35.0),
    ("tilted 55", [-1.0, 3.0], [0.3, 0.5, 0.8], 55.0),
    ("axis 30", "+y", "+z", 30.0),
)


def best_time(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def measure(shape: tuple[int, ...], rng: np.random.Generator) -> dict:
    grid = Grid(shape, 1.0)
    ke = element_stiffness(grid.dim, youngs_modulus=1.0, poisson_ratio=0.3, element_size=1.0)
    fixed_nodes = np.flatnonzero(grid.node_coordinates()[:, 0] == 0.0)
    fixed = (fixed_nodes[:, None] * grid.dim + np.arange(grid.dim)).ravel()
    free = np.setdiff1d(np.arange(grid.n_dofs), fixed)
    asm = Assembler(grid, ke, free)
    density = rng.uniform(0.01, 1.0, shape)
    K = asm.assemble(1e-9 + density.ravel() ** 3)
    F = rng.standard_normal((free.size, 1))
    # a sparse direct solver, as the target is "10 % of one direct solve"
    solver = make_solver("cholmod" if cholmod_available() else "scipy", grid=grid, free_dofs=free)
    solver.solve(K, F)  # symbolic analysis once, as in the optimiser
    repeats_solve = 3 if grid.n_dofs > 200_000 else 5
    t_solve = best_time(lambda: solver.solve(K, F), repeats_solve)
    row = {
        "shape": "x".join(map(str, shape)),
        "dofs": free.size,
        "solver": solver.name,
        "solve_ms": 1e3 * t_solve,
    }
    dy = rng.standard_normal(shape)
    for label, d2, d3, angle in CASES:
        # the smooth-maximum exponent the optimiser uses (build.smooth_max_power)
        f = printability_filter(shape, direction=d2 if len(shape) == 2 else d3,
                                overhang_angle=angle, p=BuildSettings().smooth_max_power)
        f.forward(density)
        f.backward(dy)  # compile / warm up

        def both(f=f):
            f.forward(density)
            f.backward(dy)

        row[label] = 1e3 * best_time(both, 10)
        row[label + " struts"] = f.support_size
    return row


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small sizes only")
    parser.add_argument("--out", default=str(Path(__file__).with_suffix(".md")))
    args = parser.parse_args(argv)
    rng = np.random.default_rng(0)
    rows = []
    load_before = os.getloadavg()
    for shape in QUICK if args.quick else SIZES:
        row = measure(shape, rng)
        rows.append(row)
        print(row, flush=True)
    load_after = os.getloadavg()
    labels = [c[0] for c in CASES]
    head = ("| grid | free dofs | solver | one solve (ms) | "
            + " | ".join(f"{lab} (ms, % of solve, struts)" for lab in labels) + " |")
    lines = [
        "# Printability filter against one linear solve",
        "",
        f"Measured {dt.datetime.now(dt.UTC):%Y-%m-%d %H:%M} UTC on {platform.machine()}, "
        f"Python {platform.python_version()}, {os.cpu_count()} cores shared with "
        "other work; minimum of repeated runs. Load average (1 min) "
        f"{load_before[0]:.1f} at the start, {load_after[0]:.1f} at the end. "
        "Written by `benchmarks/printability.py`. "
        "Directions: 2D axis +y, tilted [1, 2] and [-1, 3]; 3D axis +z, tilted [0, 1, 1], "
        "[1, 1, 1] and [0.3, 0.5, 0.8] (see CASES in the script).",
        "",
        head,
        "|" + "---|" * (4 + len(labels)),
    ]
    for r in rows:
        cells = [f"{r[lab]:.2f}, {100.0 * r[lab] / r['solve_ms']:.2g} %, {r[lab + ' struts']}"
                 for lab in labels]
        lines.append(f"| {r['shape']} | {r['dofs']} | {r['solver']} | {r['solve_ms']:.1f} | "
                     + " | ".join(cells) + " |")
    Path(args.out).write_text("\n".join(lines) + "\n")
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
