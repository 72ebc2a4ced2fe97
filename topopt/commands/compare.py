"""Optimise a problem free and self-supporting for several build directions.

Runs the problem with the printability filter off ("none") and on for each build
direction (default: every axis direction of the domain), each into OUT/<run>/ as a
results folder (none, plus-x, minus-x, ...). OUT/comparison.csv has one row per run
(compliance, its increase over the free design in percent, volume fraction, unsupported
elements, overhang area, grey level, time) and OUT/comparison.png shows the designs
with the build plate drawn on each and a bar chart of the compliance increase. Runs go
in parallel up to the number of cores (one BLAS thread each). With --search N the
directions come from an orientation search of the free design (as inspect --search;
report in OUT/search/): the --best K best-ranked, at least 15 degrees apart.
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path

from topopt.commands import positive_int

HELP = "optimise free and self-supporting for several build directions and compare"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``buttress compare``."""
    parser.add_argument("problem", help="TOML problem file")
    parser.add_argument("--out", required=True, help="comparison folder to write")
    parser.add_argument(
        "--directions",
        default=None,
        metavar="LIST",
        help="comma-separated build directions: axis names or vectors of numbers separated "
        "by spaces, e.g. --directions '-x,+y,1 1' (default: all axis directions)",
    )
    parser.add_argument(
        "--search",
        type=positive_int,
        default=None,
        metavar="N",
        help="instead of --directions: optimise the free design, search N orientations of "
        "it (as inspect --search; report in OUT/search/) and optimise self-supporting designs "
        "for the best-ranked ones",
    )
    parser.add_argument(
        "--best",
        type=positive_int,
        default=None,
        metavar="K",
        help="with --search: how many of the best-ranked directions to optimise, at least "
        "15 degrees apart (default 3, at most 10)",
    )
    parser.add_argument(
        "--workers",
        type=positive_int,
        default=None,
        help="runs at the same time (default and upper limit: number of cores)",
    )
    parser.add_argument(
        "--overwrite", action="store_true", help="replace a comparison already in --out"
    )
    parser.add_argument("--quiet", action="store_true", help="no progress or summary lines")


def run(args: argparse.Namespace) -> int:
    """Run ``buttress compare``."""
    from topopt.compare import compare
    from topopt.problem import load_problem

    if args.best is not None and args.search is None:
        raise ValueError("--best needs --search")
    problem = load_problem(args.problem)
    # compare checks --out (writable, not locked by another run, nothing of the user's
    # own without --overwrite) before any run
    directions = args.directions
    if args.search is not None:
        if directions is not None:
            raise ValueError("--search and --directions exclude each other")
        if not 1 <= args.search <= 5000:
            raise ValueError(f"--search: expected 1 to 5000 directions, got {args.search}")
        best = 3 if args.best is None else args.best
        if not 1 <= best <= 10:
            raise ValueError(f"--best: expected 1 to 10 directions, got {best}")
        dim = problem.grid.dim

        def directions(free: Path) -> list:
            return searched_directions(free, Path(args.out) / "search", args.search, best,
                                       dim, quiet=args.quiet)
    rows = compare(
        problem,
        directions=directions,
        out_dir=args.out,
        workers=args.workers,
        progress=not args.quiet,
        overwrite=args.overwrite,
    )
    if not args.quiet:
        print(f"{'direction':>18} {'compliance':>12} {'increase %':>10} {'unsupported':>11}"
              f" {'of them keep-in':>15} {'support':>9} {'free design':>11}")
        for r in rows:
            unsupported, keep_in = (
                ("-", "-") if r["unsupported_elements"] is None
                else (r["unsupported_elements"], r["unsupported_keep_in_elements"])
            )
            support = "-" if r["support_volume"] is None else f"{r['support_volume']:.4g}"
            free = ("-" if r["free_design_support_volume"] is None
                    else f"{r['free_design_support_volume']:.4g}")
            print(
                f"{r['direction']:>18} {r['compliance']:>12.6g} "
                f"{r['compliance_increase_percent']:>+10.1f} {unsupported!s:>11} {keep_in!s:>15}"
                f" {support:>9} {free:>11}"
            )
        print("support: support volume by inspect's analysis in that direction, for the "
              "self-supporting design and for the free design")
        print(f"table: {args.out}/comparison.csv, picture: {args.out}/comparison.png")
    return 0


#: Smallest angle between two searched directions that ``compare --search`` optimises:
#: the refinement caps of the search put many near-copies of the best direction at the
#: top of the ranking, and designs a few degrees apart teach the user nothing new.
SEARCH_SEPARATION_DEG = 15.0

#: A searched direction this close to an axis is optimised along the axis. The
#: optimiser's plate passes through the domain's lowest corner, so a direction a few
#: degrees off an axis leaves the rest of that face floating above the plate: on the
#: wall bracket, [-0.026, 0.9997] (1.5 degrees off +y) gave a disconnected design
#: (compliance 1.6e7, 312 keep-in elements that no design could hold) where +y gives
#: 254, and [0.9997, -0.026] gave 1343 where +x gives 245 (measured).
AXIS_SNAP_DEG = 5.0


def searched_directions(free: Path, report: Path, count: int, best: int, ndim: int, *,
                        quiet: bool = False) -> list:
    """Search orientations of the free design and return the ``best`` best-ranked.

    Runs ``buttress inspect FREE --search COUNT --out REPORT`` (its report, table and
    picture stay in ``report``) and takes the best-ranked directions, skipping any within
    :data:`SEARCH_SEPARATION_DEG` of one already taken; a direction within
    :data:`AXIS_SNAP_DEG` of an axis is taken as the axis. Axis directions come back as
    names, others as tuples.
    """
    import contextlib
    import io
    import json

    import numpy as np

    from filters.direction import axis_directions, unit_vector
    from topopt.commands import inspect

    parser = argparse.ArgumentParser()
    inspect.add_arguments(parser)
    args = parser.parse_args([str(free), "--out", str(report), "--search", str(count),
                              "--overwrite"])
    sink = io.StringIO() if quiet else None
    with contextlib.redirect_stdout(sink) if sink is not None else contextlib.nullcontext():
        inspect.run(args)
    rows = json.loads((report / "inspect.json").read_text())["directions"]
    rows.sort(key=lambda r: r["rank"])
    picked: list[np.ndarray] = []
    out: list = []
    cos_sep = math.cos(math.radians(SEARCH_SEPARATION_DEG))
    cos_snap = math.cos(math.radians(AXIS_SNAP_DEG))
    axes = {name: np.asarray(unit_vector(name, ndim), dtype=float)
            for name in axis_directions(ndim)}
    for r in rows:
        v = np.asarray(r["vector"], dtype=float)
        axis = next((name for name, a in axes.items() if float(v @ a) >= cos_snap), None)
        if axis is not None:
            v = axes[axis]
        if any(float(v @ w) > cos_sep for w in picked):
            continue
        picked.append(v)
        out.append(axis if axis is not None else tuple(float(c) for c in v))
        if len(out) == best:
            break
    return out
