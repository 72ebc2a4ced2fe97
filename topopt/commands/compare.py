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
    rows = compare(
        problem,
        directions=args.directions,
        out_dir=args.out,
        workers=args.workers,
        progress=not args.quiet,
        overwrite=args.overwrite,
        search=args.search,
        best=3 if args.best is None else args.best,
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
