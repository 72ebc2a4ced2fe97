"""Time the orientation search of ``buttress inspect --search`` on a 64 x 64 x 64 design.

The design is an invented low cone (base radius 0.4 n, sides 30 degrees from the base)
turned 35 degrees about the axis (1, 2, 3), so that its one support-free orientation
(base down) is not an axis. Measured, in the same run: the analysis of the six axis
directions (the baseline: what ``inspect`` did before the search), the spread
directions alone (N = 200 plus the axes and the flat-face directions), and the whole
search with its refinements; the direction found, its angle from the true upright,
its support against the best axis direction's. Writes benchmarks/orientation.md.

Run:  .venv/bin/python benchmarks/orientation.py [--n 64] [--count 200]
"""

from __future__ import annotations

import argparse
import datetime as dt
import math
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from topopt.build import analyze_design, rank_directions  # noqa: E402
from topopt.commands.inspect import (  # noqa: E402
    flat_face_directions,
    orientation_search,
    search_directions,
)


def turned_cone(n: int) -> tuple[np.ndarray, np.ndarray]:
    axis = np.array([1.0, 2.0, 3.0]) / math.sqrt(14.0)
    t = math.radians(35.0)
    k = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
    rot = np.eye(3) + math.sin(t) * k + (1 - math.cos(t)) * k @ k
    g = np.stack(np.meshgrid(*[np.arange(n) + 0.5] * 3, indexing="ij"), -1) - n / 2
    x, y, z = np.moveaxis(g @ rot, -1, 0)
    r0 = 0.4 * n
    h = r0 * math.tan(math.radians(30.0))
    z = z + h / 2
    part = (z >= 0) & (np.hypot(x, y) <= r0 * (1 - z / h))
    return part, rot @ np.array([0.0, 0.0, 1.0])


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=64)
    parser.add_argument("--count", type=int, default=200)
    parser.add_argument("--out", default=str(Path(__file__).with_suffix(".md")))
    args = parser.parse_args(argv)
    part, upright = turned_cone(args.n)
    settings = {"element_size": 1.0, "overhang_angle": 45.0, "thickness": 1.0,
                "process": None, "mass_density": None, "weights": None, "keep_masks": False,
                "through_holes": False}
    analyze_design(part, directions=["+z", [0.0, 1.0, 1.0]], **settings)  # compile

    t0 = time.perf_counter()
    axes, _, _ = analyze_design(part, **settings)
    t_axes = time.perf_counter() - t0

    spread = search_directions(args.count, 3)
    spread += flat_face_directions(part, spread)
    t0 = time.perf_counter()
    analyze_design(part, directions=spread, **settings)
    t_spread = time.perf_counter() - t0

    t0 = time.perf_counter()
    directions, reports = orientation_search(part, args.count, settings)
    t_search = time.perf_counter() - t0
    ranked, best = rank_directions(reports)
    top = next(r for r in ranked if r.direction == best)
    angle = math.degrees(math.acos(min(1.0, float(np.dot(top.vector, upright)))))
    best_axis = min(axes, key=lambda r: r.support_volume)

    lines = [
        "# Orientation search (`inspect --search`)",
        "",
        f"Measured {dt.datetime.now(dt.UTC):%Y-%m-%d %H:%M} UTC on {platform.machine()}, "
        f"Python {platform.python_version()}, {os.cpu_count()} cores shared with other work. "
        "Written by `benchmarks/orientation.py`.",
        "",
        f"Design: invented low cone turned 35 degrees about (1, 2, 3), {args.n}^3 voxels, "
        f"{int(part.sum())} solid; overhang angle 45 degrees.",
        "",
        "| what | directions | time (s) | per direction (ms) | ratio to the axis analysis per direction |",
        "|---|---|---|---|---|",
        f"| six axis directions (baseline) | 6 | {t_axes:.2f} | {1e3 * t_axes / 6:.0f} | 1.0 |",
        f"| spread directions + axes + flat faces | {len(spread)} | {t_spread:.2f} | "
        f"{1e3 * t_spread / len(spread):.0f} | {t_spread / len(spread) / (t_axes / 6):.2f} |",
        f"| whole search with refinements | {len(directions)} | {t_search:.2f} | "
        f"{1e3 * t_search / len(directions):.0f} | "
        f"{t_search / len(directions) / (t_axes / 6):.2f} |",
        "",
        f"Best direction found: {top.direction}, {angle:.2f} degrees from the upright; "
        f"support volume {top.support_volume:.3g} against {best_axis.support_volume:.3g} for "
        f"the best axis direction ({best_axis.direction}).",
        "",
        "Target (issue): 200 directions of a 64^3 design in under 60 s on 2 cores.",
    ]
    Path(args.out).write_text("\n".join(lines) + "\n")
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
