"""Write a mesh or picture of a results folder's design.

stl: the closed surface at the 0.5 level (marching cubes in 3D, optionally smoothed with
--smooth Taubin passes that keep the part inside its design domain and leave the faces on
the domain boundary and at the restraints in place; in 2D the 0.5 contour extruded to the
thickness); vtu: one cell per element with its density; png: the picture. Lengths are in
the problem's unit. An existing file is replaced only with --overwrite.
"""

from __future__ import annotations

import argparse
from pathlib import Path

HELP = "write design.stl, design.vtu or design.png from a results folder"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``buttress export``."""
    parser.add_argument("result", help="results folder (with result.npz and problem.toml)")
    parser.add_argument("--format", required=True, choices=("stl", "vtu", "png"),
                        help="what to write")
    parser.add_argument("--smooth", type=int, default=0, metavar="N",
                        help="Taubin smoothing passes for stl (volume kept; default 0)")
    parser.add_argument("--out", default=None,
                        help="file to write (default: RESULT/design.FORMAT)")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace the file if it exists")


def run(args: argparse.Namespace) -> int:
    """Run ``buttress export``."""
    import numpy as np

    from topopt.export import WRITERS
    from topopt.results import read_results
    from topopt.surface import write_design_stl

    folder = Path(args.result)
    if args.smooth < 0:
        raise ValueError(f"--smooth must be >= 0, got {args.smooth}")
    if args.smooth and args.format != "stl":
        raise ValueError("--smooth applies to --format stl only")
    loaded = read_results(folder, need_summary=False)
    problem, density = loaded.problem, loaded.density
    out = Path(args.out) if args.out else folder / f"design.{args.format}"
    if out.suffix.lower() != f".{args.format}":
        raise ValueError(f"{out}: the file name must end in .{args.format}")
    if out.exists() and not args.overwrite:
        raise ValueError(f"{out}: exists already; use --overwrite or another --out")
    if args.format == "stl":
        restrained = np.unique(np.concatenate([r.nodes for r in problem.restraints]))
        keep = problem.grid.node_coordinates()[restrained] if problem.grid.dim == 3 else None
        write_design_stl(out, density, element_size=problem.grid.element_size,
                         thickness=problem.grid.thickness, smoothing_iterations=args.smooth,
                         keep_points=keep)
    else:
        WRITERS[args.format](out, density, problem)
    print(f"wrote {out}")
    return 0
