"""Run a parameter study: one optimisation per combination of settings.

The study file names a problem file and, under [vary], dotted problem keys with lists
of values (all combinations, or mode = "zip" for paired lists). Each case is written to
OUT/cases/<case-id>/ as a results folder with its own problem.toml; OUT/table.csv has a
row per case and OUT/study.png the plots. Finished cases are skipped, so running the
same command again after a crash finishes only the missing ones. Cases run in local
worker processes (one BLAS thread each), or on Dask: --dask starts a local cluster
(loopback only), --scheduler sends the cases to a running one. Exit code 0 when every
case finished, 1 when some failed (see the error column), 2 for an unusable study file.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from topopt.commands import positive_int

HELP = "run a parameter study over problem settings (in parallel, resumable)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``buttress sweep``."""
    parser.add_argument("study", help="TOML study file")
    parser.add_argument("--out", required=True, help="study folder to write (or to resume)")
    parser.add_argument("--workers", type=positive_int, default=None,
                        help="cases run at the same time (default: number of cores)")
    parser.add_argument("--dask", action="store_true",
                        help="run on a local Dask cluster of --workers workers (loopback only)")
    parser.add_argument("--scheduler", default=None, metavar="ADDRESS",
                        help="run on a running Dask cluster, e.g. tcp://scheduler-host:8786")
    parser.add_argument("--quiet", action="store_true", help="no progress bar or summary lines")


def run(args: argparse.Namespace) -> int:
    """Run ``buttress sweep``."""
    from topopt import study

    if args.dask and args.scheduler:
        raise ValueError("give either --dask (a local cluster) or --scheduler ADDRESS, not both")
    plan = study.load_study(args.study)
    out = Path(args.out)
    done_before = sum(
        1 for c in plan.cases
        if c.problem is not None and (out / "cases" / c.case_id / "summary.json").exists()
    )
    rows = study.run(plan, out_dir=out, workers=args.workers, scheduler=args.scheduler,
                     dask=args.dask, progress=not args.quiet)
    failed = [r for r in rows if r["status"] != "ok"]
    if not args.quiet:
        print(f"{len(rows)} cases: {len(rows) - len(failed)} ok ({done_before} from an earlier "
              f"run), {len(failed)} failed")
        for r in failed:
            print(f"  failed {r['case']}: {r['error']}")
        print(f"table: {out}/table.csv, plots: {out}/study.png")
    return 1 if failed else 0
