"""Optimise a problem file and write a results folder.

The folder gets summary.json, result.npz, history.csv, problem.toml and pictures. A
checkpoint is saved every few iterations and on Ctrl-C or SIGTERM, so an interrupted
run continues with --resume.
"""

from __future__ import annotations

import argparse
import hashlib
import signal
import sys
from pathlib import Path

# numpy and the solver stack are imported inside the functions: building the command
# line's parser (`buttress --help`) must not load them.

HELP = "optimise a problem file into a results folder"
CHECKPOINT = "checkpoint.npz"


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


def save_checkpoint(path: Path, state: dict, digest: str) -> None:
    """Write the loop state as plain arrays (no pickled objects)."""
    import numpy as np

    from topopt.export import history_columns, write_npz

    history = state["history"]
    columns = history_columns(history)
    table = np.array([[row.get(c, np.nan) for c in columns] for row in history], dtype=float)
    extra = {k: np.asarray(v) for k, v in state.items() if k not in ("design", "history")}
    write_npz(path, design=state["design"], history=table.reshape(len(history), len(columns)),
              history_columns=np.array(columns, dtype=str), problem_digest=np.array(digest), **extra)


def load_checkpoint(path: Path, digest: str) -> dict:
    """Read a checkpoint written by :func:`save_checkpoint`; check it belongs to the problem."""
    import zipfile

    import numpy as np

    try:
        # Our own handle: np.load leaks the one it opens when the zip is damaged.
        with open(path, "rb") as handle, np.load(handle, allow_pickle=False) as data:
            saved = {k: data[k] for k in data.files}
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as exc:
        # A truncated or emptied file (e.g. a full disk) must not end in a traceback.
        raise ValueError(f"{path}: not a readable checkpoint ({exc or type(exc).__name__}); "
                         "start again with --overwrite") from None
    if str(saved.get("problem_digest")) != digest:
        raise ValueError(f"{path}: the checkpoint belongs to a different problem; "
                         "start again with --overwrite")
    if "history_columns" not in saved or "history" not in saved or "design" not in saved:
        raise ValueError(f"{path}: not a readable checkpoint (entries missing); "
                         "start again with --overwrite")
    columns = [str(c) for c in saved.pop("history_columns")]
    rows = saved.pop("history")
    state = {k: (v if v.ndim else v.item()) for k, v in saved.items() if k != "problem_digest"}
    state["history"] = [
        {c: (int(v) if c == "iteration" else float(v)) for c, v in zip(columns, row, strict=True)}
        for row in rows
    ]
    return state


def run(args: argparse.Namespace) -> int:
    """Run ``buttress optimize``."""
    from topopt.driver import optimize
    from topopt.export import write_results
    from topopt.problem import load_problem

    problem = load_problem(args.problem)  # validate before touching the results folder
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise ValueError(f"{out}: exists and is not a folder")
    digest = problem_digest(problem)
    checkpoint_path = out / CHECKPOINT
    resume = None
    if args.resume:
        if checkpoint_path.exists():
            resume = load_checkpoint(checkpoint_path, digest)
        elif (out / "summary.json").exists():
            print(f"{out}: the run has already finished; nothing to resume")
            return 0
        elif not args.quiet:
            print(f"{out}: no checkpoint found; starting from the beginning")
    elif (out / "summary.json").exists() and not args.overwrite:
        raise ValueError(f"{out}: holds results already; use --overwrite, --resume or another --out")
    elif checkpoint_path.exists() and not args.overwrite:
        raise ValueError(f"{out}: holds an interrupted run; use --resume, --overwrite or another --out")

    out.mkdir(parents=True, exist_ok=True)

    def checkpoint(state: dict) -> None:
        save_checkpoint(checkpoint_path, state, digest)

    previous = signal.getsignal(signal.SIGTERM)
    signal.signal(signal.SIGTERM, _raise_interrupt)
    try:
        result = optimize(problem, progress=not args.quiet, resume=resume, checkpoint=checkpoint,
                          solver=args.solver)
    except KeyboardInterrupt:
        print(f"buttress: interrupted; state saved, continue with: buttress optimize "
              f"{args.problem} --out {out} --resume", file=sys.stderr)
        return 130
    finally:
        signal.signal(signal.SIGTERM, previous)
    write_results(result, problem, out)
    checkpoint_path.unlink(missing_ok=True)
    if result.unholdable_keep_in:
        print(f"note: {result.unholdable_keep_in} keep-in elements cannot be held up by any "
              "design in this domain (kept-empty space or the domain edge below, no room for "
              "a slope); they need supports (summary.json: unholdable_keep_in_elements)")
    if not args.quiet:
        print(f"{result.message}; compliance {result.compliance:.6g}, volume fraction "
              f"{result.volume_fraction:.4f}, {result.iterations} iterations, {result.elapsed_s:.1f} s")
        print(f"results: {out}/summary.json, picture: {out}/design.png")
    return 0


def _raise_interrupt(signum, frame):
    raise KeyboardInterrupt
