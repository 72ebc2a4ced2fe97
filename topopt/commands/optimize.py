"""Optimise a problem file and write a results folder.

The folder gets summary.json, result.npz, history.csv, problem.toml and pictures, and
is swapped in as one unit when the run ends (a folder is never half old, half new). A
second run into the same folder is refused at once. A checkpoint is saved every few
iterations and on Ctrl-C or SIGTERM, so an interrupted run continues with --resume.
"""

from __future__ import annotations

import argparse
import hashlib
import sys
from pathlib import Path

# numpy and the solver stack are imported inside the functions: building the command
# line's parser (`buttress --help`) must not load them.

HELP = "optimise a problem file into a results folder"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``buttress optimize``."""
    parser.add_argument("problem", help="TOML problem file")
    parser.add_argument("--out", required=True, help="results folder to write")
    parser.add_argument("--resume", action="store_true",
                        help="continue an interrupted run from the folder's checkpoint")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace the results already in --out")
    parser.add_argument("--solver", default=None,
                        help="linear solver (auto, cholmod, scipy, ...); default from the problem file")
    parser.add_argument("--quiet", action="store_true", help="no progress bar or summary lines")


def problem_digest(problem) -> str:
    """A stable fingerprint of the problem settings (guards --resume against edits)."""
    from topopt.problem import to_toml

    return hashlib.sha256(to_toml(problem.source).encode()).hexdigest()[:16]


def run(args: argparse.Namespace) -> int:
    """Run ``buttress optimize``."""
    from topopt.driver import optimize
    from topopt.problem import load_problem
    from topopt.results import (
        CHECKPOINT,
        folder_lock,
        load_checkpoint,
        prepare_output,
        save_checkpoint,
        write_results,
    )

    problem = load_problem(args.problem)  # validate (and budget memory) before the folder
    if problem.optimize.start_from is not None and not args.resume:
        from topopt.arrays import read_start_design

        read_start_design(problem.optimize.start_from, problem.grid.shape)  # before the folder
    if args.solver is not None:
        from topopt.solvers import SOLVERS

        if args.solver not in set(SOLVERS) | {"auto"}:
            raise ValueError(f"--solver: expected one of {', '.join(sorted(SOLVERS))} or auto, "
                             f"got {args.solver!r}")
    out = Path(args.out)
    digest = problem_digest(problem)
    checkpoint_path = out / CHECKPOINT
    # a second run into the same folder is refused here, at once
    with folder_lock(out):
        state = prepare_output(out, overwrite=args.overwrite, resume=args.resume)
        resume = None
        if args.resume:
            if checkpoint_path.exists():
                resume = load_checkpoint(checkpoint_path, digest, shape=problem.grid.shape,
                                         max_iterations=problem.optimize.max_iterations)
            elif state == "finished":
                print(f"{out}: the run has already finished; nothing to resume")
                return 0
            elif not args.quiet:
                print(f"{out}: no checkpoint found; starting from the beginning")

        out.mkdir(parents=True, exist_ok=True)

        def checkpoint(loop_state: dict) -> None:
            save_checkpoint(checkpoint_path, loop_state, digest)

        try:
            result = optimize(problem, progress=not args.quiet, resume=resume,
                              checkpoint=checkpoint, solver=args.solver)
            # one unit: the new folder (without the checkpoint) replaces the old one
            write_results(result, problem, out)
        except KeyboardInterrupt:
            print(f"buttress: interrupted; state saved, continue with: buttress optimize "
                  f"{args.problem} --out {out} --resume", file=sys.stderr)
            return 130
    if result.unholdable_keep_in:
        print(f"note: {result.unholdable_keep_in} keep-in elements cannot be held up by any "
              "design in this domain (kept-empty space or the domain edge below, no room for "
              "a slope); they need supports (summary.json: unholdable_keep_in_elements)")
    if not args.quiet:
        print(f"{result.message}; compliance {result.compliance:.6g}, volume fraction "
              f"{result.volume_fraction:.4f}, {result.iterations} iterations, {result.elapsed_s:.1f} s")
        print(f"results: {out}/summary.json, picture: {out}/design.png")
    return 0
