"""Time the printability filter (forward + backward) against one linear solve.

For each grid size the script assembles the stiffness matrix of a cantilever-like
setup (left face fixed, random densities in [0.01, 1]), times one solve with the
sparse direct solver (CHOLMOD where installed, SuperLU otherwise) and times
forward + backward of the printability filter for 45 degrees and for the other two
representable angles. Times are the minimum of several repeats (the machine is shared);
the solve is timed including the numeric factorisation, as the optimiser pays it every
iteration. Writes benchmarks/printability.md (or the --out path).

Run:  .venv/bin/python benchmarks/printability.py [--quick] [--out FILE]
"""

from __future__ import annotations

import argparse
import datetime as dt
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
from topopt.solvers import cholmod_available, make_solver  # noqa: E402

SIZES = [(120, 60), (240, 120), (480, 240), (30, 15, 15), (40, 20, 20), (48, 24, 24)]
QUICK = [(120, 60), (240, 120), (30, 15, 15)]
ANGLES = (45.0, 26.57, 63.43)


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
    for angle in ANGLES:
        f = printability_filter(shape, direction="+y", overhang_angle=angle)
        f.forward(density)
        f.backward(dy)  # compile / warm up

        def both(f=f):
            f.forward(density)
            f.backward(dy)

        row[f"filter_ms_{angle:g}"] = 1e3 * best_time(both, 20)
    return row


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small sizes only")
    parser.add_argument("--out", default=str(Path(__file__).with_suffix(".md")))
    args = parser.parse_args(argv)
    rng = np.random.default_rng(0)
    rows = []
    for shape in QUICK if args.quick else SIZES:
        row = measure(shape, rng)
        rows.append(row)
        print(row, flush=True)
    head = (
        "| grid | free dofs | solver | one solve (ms) | filter fwd+bwd 45 deg (ms) | % of solve "
        "| 26.57 deg (ms) | 63.43 deg (ms) |"
    )
    lines = [
        "# Printability filter against one linear solve",
        "",
        f"Measured {dt.datetime.now(dt.UTC):%Y-%m-%d %H:%M} UTC on {platform.machine()}, "
        f"Python {platform.python_version()}, {__import__('os').cpu_count()} cores shared with "
        "other work; minimum of repeated runs. Written by `benchmarks/printability.py`.",
        "",
        head,
        "|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        pct = 100.0 * r["filter_ms_45"] / r["solve_ms"]
        lines.append(
            f"| {r['shape']} | {r['dofs']} | {r['solver']} | {r['solve_ms']:.1f} | "
            f"{r['filter_ms_45']:.2f} | {pct:.2g} % | {r['filter_ms_26.57']:.2f} | "
            f"{r['filter_ms_63.43']:.2f} |"
        )
    Path(args.out).write_text("\n".join(lines) + "\n")
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
