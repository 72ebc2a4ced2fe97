"""The results folder: written as one unit, read back with one-line errors.

Writing
-------
:func:`write_results` writes every file into a temporary sibling folder
(``.NAME.new-XXXX`` next to ``NAME``) and then swaps it in with one rename, so a folder
is always either the complete old one or the complete new one, whenever the process
is killed. On Linux the swap is one atomic exchange of the two folders
(``renameat2(RENAME_EXCHANGE)``); elsewhere the old folder is first renamed to
``.NAME.old-PID`` and put back by :func:`folder_lock` if the process dies between the
two renames. Files in the old folder that buttress does not write (a user's notes)
are copied into the new one.

:func:`folder_lock` takes an exclusive lock (``.NAME.lock`` beside the folder), so a
second run into the same folder is refused at once; :func:`prepare_output` checks,
before any work, that the location is writable and that nothing of the user's own
would be replaced without ``overwrite``.

Reading
-------
Arrays are read as plain numbers by :func:`topopt.arrays.read_arrays` (re-exported
here), every header checked before its data. :func:`read_results` reads a whole folder; :func:`save_checkpoint` and
:func:`load_checkpoint` the loop state, validated entry by entry.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import json
import os
import shutil
import tempfile
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from topopt.arrays import ResultsError, exception_text, read_arrays

SUMMARY = "summary.json"
CHECKPOINT = "checkpoint.npz"
#: Every file name buttress writes into a results folder.
OWN_FILES = frozenset({SUMMARY, "result.npz", "history.csv", "problem.toml", "design.png",
                       "design.vtu", "design.stl", CHECKPOINT})


# ---------------------------------------------------------------------------- checks


def folder_state(folder: str | Path) -> str:
    """``"missing"``, ``"empty"``, ``"finished"``, ``"interrupted"`` or ``"other"``.

    ``finished`` has a ``summary.json``; ``interrupted`` a checkpoint and no summary;
    ``other`` holds something else (files of the user's own, or a half-made folder).
    """
    folder = Path(folder)
    if not folder.exists():
        return "missing"
    if not folder.is_dir():
        return "other"
    names = {p.name for p in folder.iterdir()}
    if not names:
        return "empty"
    if SUMMARY in names:
        return "finished"
    if CHECKPOINT in names:
        return "interrupted"
    return "other"


def check_writable(out: str | Path) -> None:
    """Raise :class:`ResultsError` unless ``out`` (and its temporary sibling) can be written.

    Creates the parent folder if missing; probes by creating and removing a temporary
    folder beside ``out`` and, when ``out`` exists, a temporary file in it.
    """
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise ResultsError(f"{out}: exists and is not a folder")
    parent = out.absolute().parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
        os.rmdir(tempfile.mkdtemp(dir=parent, prefix=f".{out.name}.probe-"))
        if out.is_dir():
            fd, name = tempfile.mkstemp(dir=out, prefix=".probe-")
            os.close(fd)
            os.unlink(name)
    except OSError as exc:
        raise ResultsError(f"{out}: cannot write the results here "
                           f"({exc.strerror or type(exc).__name__})") from None


def prepare_output(out: str | Path, *, overwrite: bool = False, resume: bool = False,
                   what: str = "--out") -> str:
    """Check ``out`` before any work; returns its :func:`folder_state`.

    Refused (:class:`ResultsError`): a file in the way, a location that cannot be
    written, finished results without ``overwrite`` or ``resume``, an interrupted run
    without ``resume`` or ``overwrite``, and a folder holding anything else (the user's
    own files) without ``overwrite``.
    """
    out = Path(out)
    check_writable(out)
    state = folder_state(out)
    if state == "finished" and not (overwrite or resume):
        raise ResultsError(f"{out}: holds results already; use --overwrite, --resume or "
                           f"another {what}")
    if state == "interrupted" and not (overwrite or resume):
        raise ResultsError(f"{out}: holds an interrupted run; use --resume, --overwrite or "
                           f"another {what}")
    if state == "other" and not overwrite:
        first = sorted(p.name for p in out.iterdir())[0]
        raise ResultsError(f"{out}: holds files that are not buttress results (e.g. {first}); "
                           f"use --overwrite to replace the folder, or another {what}")
    return state


# ---------------------------------------------------------------------------- lock


@contextlib.contextmanager
def folder_lock(out: str | Path) -> Iterator[None]:
    """Hold an exclusive lock on the folder ``out`` (refused at once if taken).

    The lock is ``.NAME.lock`` beside the folder (an advisory ``flock``, released when
    the process ends, however it ends). Leftovers of a killed writer are tidied while
    the lock is held.
    """
    import fcntl

    out = Path(out)
    path = out.absolute().parent / f".{out.name}.lock"
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ResultsError(f"{out}: cannot write the results here ({exc.strerror})") from None
    fd = -1
    for _ in range(10):
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o666)
        except OSError as exc:
            raise ResultsError(f"{out}: cannot write the results here ({exc.strerror})") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            os.close(fd)
            if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                raise ResultsError(f"{out}: another buttress run is writing this folder; wait "
                                   "for it to finish or use another --out") from None
            raise
        # the previous holder removes the file when done: lock the file now at the path
        try:
            if os.stat(path).st_ino == os.fstat(fd).st_ino:
                break
        except FileNotFoundError:
            pass
        os.close(fd)
        fd = -1
    if fd < 0:
        raise ResultsError(f"{out}: could not take the folder lock {path.name}")
    try:
        _tidy(out)
        yield
    finally:
        with contextlib.suppress(OSError):
            os.unlink(path)
        os.close(fd)


def _tidy(out: Path) -> None:
    """Put back a folder left half-swapped by a killed writer; remove temporary folders."""
    parent = out.absolute().parent
    if not parent.is_dir():
        return
    olds = sorted(parent.glob(f".{out.name}.old-*"))
    if not out.exists() and olds:
        os.rename(olds[0], out)  # the old folder is complete: it was renamed whole
        olds = olds[1:]
    for leftover in [*olds, *parent.glob(f".{out.name}.new-*")]:
        shutil.rmtree(leftover, ignore_errors=True)


# ---------------------------------------------------------------------------- writing


def _exchange(a: Path, b: Path) -> bool:
    """Swap two paths atomically (Linux ``renameat2``); False where not available."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        renameat2 = libc.renameat2
    except (OSError, AttributeError):
        return False
    at_fdcwd, rename_exchange = -100, 2
    res = renameat2(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange)
    if res == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.EINVAL, errno.ENOSYS, errno.ENOTSUP, errno.EOPNOTSUPP):
        return False
    raise OSError(err, os.strerror(err), str(b))


def swap_in(new: Path, out: Path) -> None:
    """Make the complete folder ``new`` appear at ``out`` in one step; remove the old one."""
    new, out = Path(new), Path(out)
    if not out.exists():
        os.rename(new, out)
        return
    if _exchange(new, out):
        shutil.rmtree(new, ignore_errors=True)  # ``new`` now holds the old folder
        return
    old = out.absolute().parent / f".{out.name}.old-{os.getpid()}"
    os.rename(out, old)
    os.rename(new, out)
    shutil.rmtree(old, ignore_errors=True)


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def new_folder(out: str | Path) -> Iterator[Path]:
    """A temporary sibling of ``out`` to fill; swapped in when the block ends normally.

    Files of the old folder that buttress does not write are copied in first. If the
    block raises (or an interrupt is pending), the temporary folder is removed and
    ``out`` is left as it was.
    """
    from topopt import interrupt

    out = Path(out)
    parent = out.absolute().parent
    parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(dir=parent, prefix=f".{out.name}.new-"))
    try:
        os.chmod(tmp, 0o777 & ~_umask())  # mkdtemp makes it private
        yield tmp
        if out.is_dir():
            for entry in out.iterdir():
                if entry.name in OWN_FILES or entry.name.startswith(".") or (tmp / entry.name).exists():
                    continue
                if entry.is_dir() and not entry.is_symlink():
                    shutil.copytree(entry, tmp / entry.name, symlinks=True)
                else:
                    shutil.copy2(entry, tmp / entry.name, follow_symlinks=False)
        interrupt.check()  # a Ctrl-C while writing keeps the old folder
        swap_in(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def write_results(result, problem, out_dir: str | Path, *,
                  formats: Iterable[str] | None = None) -> Path:
    """Write the results folder of a run as one unit.

    Parameters
    ----------
    result : Result
        From :func:`topopt.optimize`.
    problem : Problem
        The problem that was solved; a copy is written as ``problem.toml``.
    out_dir : str or Path
        The folder; whatever was there is replaced in one step (files that buttress
        does not write are kept). Callers check with :func:`prepare_output` first.
    formats : iterable of str, optional
        Pictures and meshes to write; default all that apply (``png``, ``vtu``, ``stl``).
    """
    from topopt.export import WRITERS, history_columns, write_csv, write_json, write_npz, write_text
    from topopt.problem import to_toml

    out = Path(out_dir)
    summary = summary_dict(result, problem)
    with new_folder(out) as tmp:
        write_text(tmp / "problem.toml", to_toml(problem.source))
        write_npz(tmp / "result.npz", density=result.density, design=result.design)
        write_csv(tmp / "history.csv", result.history, history_columns(result.history))
        formats = set(formats) if formats is not None else set(WRITERS)
        for name, writer in WRITERS.items():
            if name in formats:
                writer(tmp / f"design.{name}", result.density, problem)
        write_json(tmp / SUMMARY, summary)
    return out


def summary_dict(result, problem) -> dict:
    """The ``summary.json`` contents: the result's own figures plus the problem's labels.

    The figures are the result's :class:`~topopt.driver.Metrics`, measured here only if
    nobody has measured them yet (see :func:`measure`).
    """
    from topopt.export import CAUTION
    from topopt.version import __version__

    metrics = measure(result, problem).metrics
    summary = {
        "name": problem.name,
        "compliance": result.compliance,
        "volume_fraction": result.volume_fraction,
        "iterations": result.iterations,
        "converged": result.converged,
        "message": result.message,
        "build_direction": problem.build.direction,
        "overhang_angle": problem.build.overhang_angle,
        "grey_level": result.grey_level,
        "elapsed_s": result.elapsed_s,
        "solver": result.solver,
        "shape": list(problem.grid.shape),
        "element_size": problem.grid.element_size,
        "units": problem.units.name,
        "version": __version__,
        "caution": CAUTION,
    }
    summary.update(metrics.as_dict())
    return summary


def measure(result, problem):
    """``result`` with its :class:`~topopt.driver.Metrics` filled in (the one place they are measured).

    Print-preparation, length-scale and structural figures of the physical density. A
    result that carries its figures already is returned as it is, so measuring twice
    costs nothing; studies measure in the worker that ran the case.

    Examples
    --------
    >>> from topopt.driver import optimize
    >>> from topopt.problem import load_problem, with_settings
    >>> beam = with_settings(load_problem("examples/mbb-beam.toml"), {"optimize.max_iterations": 2})
    >>> result = measure(optimize(beam), beam)
    >>> result.metrics.unsupported_elements is None  # no build direction
    True
    >>> measure(result, beam) is result
    True
    """
    import dataclasses

    from topopt.driver import Metrics
    from topopt.export import length_scale_summary, printability_summary, structural_summary_of

    if result.metrics is not None:
        return result
    figures = {**printability_summary(result.density, problem, result),
               **length_scale_summary(result.density, problem),
               **structural_summary_of(result.density, problem)}
    if figures["build_vector"] is not None:
        figures["build_vector"] = tuple(figures["build_vector"])
    figures["load_cases"] = tuple(figures["load_cases"])
    return dataclasses.replace(result, metrics=Metrics(**figures))


# ---------------------------------------------------------------------------- reading


def read_summary(folder: str | Path) -> dict:
    """``summary.json`` of a results folder as a dict (one-line errors)."""
    path = Path(folder) / SUMMARY
    try:
        summary = json.loads(path.read_bytes().decode("utf-8"))
    except FileNotFoundError:
        raise ResultsError(f"{path}: file not found (the run has not finished)") from None
    except (OSError, ValueError, RecursionError) as exc:
        raise ResultsError(f"{path}: not readable JSON ({exception_text(exc)})") from None
    if not isinstance(summary, dict):
        raise ResultsError(f"{path}: expected a JSON object")
    return summary


@dataclass(frozen=True, eq=False)
class ResultsFolder:
    """A results folder read back: its problem, arrays and summary."""

    path: Path
    problem: object
    density: np.ndarray = field(repr=False)
    design: np.ndarray | None = field(repr=False)
    summary: dict | None = field(repr=False)


def read_results(folder: str | Path, *, problem=None, need_summary: bool = True) -> ResultsFolder:
    """Read a results folder; every failure is a :class:`ResultsError` naming the file.

    Parameters
    ----------
    folder : str or Path
        The results folder.
    problem : Problem, optional
        Use this problem instead of the folder's ``problem.toml``.
    need_summary : bool
        Require ``summary.json`` (a finished run).
    """
    from topopt.problem import load_problem

    folder = Path(folder)
    if not folder.is_dir():
        raise ResultsError(f"{folder}: not a results folder (no such folder)")
    if not (folder / "result.npz").is_file():
        raise ResultsError(f"{folder}: not a results folder (no result.npz)")
    if problem is None:
        if not (folder / "problem.toml").is_file():
            raise ResultsError(f"{folder}: the results folder has no problem.toml")
        problem = load_problem(folder / "problem.toml")
    summary = read_summary(folder) if need_summary else None
    density = read_arrays(folder / "result.npz", ["density"])["density"]
    if density.dtype.kind not in "biuf":
        raise ResultsError(f"{folder}/result.npz: the density holds {density.dtype} values, "
                           "not numbers")
    density = density.astype(float)
    shape = tuple(problem.grid.shape)
    if density.shape != shape:
        raise ResultsError(f"{folder}/result.npz: density shape {density.shape} does not match "
                           f"the problem grid {shape}")
    if not np.all(np.isfinite(density)):
        raise ResultsError(f"{folder}/result.npz: the density holds NaN or infinite values")
    design = None
    with contextlib.suppress(ResultsError):
        design = read_arrays(folder / "result.npz", ["design"])["design"]
    return ResultsFolder(path=folder, problem=problem, density=density, design=design,
                         summary=summary)


def check_finished(folder: str | Path, problem) -> None:
    """Raise :class:`ResultsError` unless ``folder`` holds a complete, readable result."""
    read_results(folder, problem=problem, need_summary=True)


# ---------------------------------------------------------------------------- checkpoints


def save_checkpoint(path: str | Path, state: dict, digest: str) -> None:
    """Write the loop state as plain arrays (no pickled objects)."""
    from topopt.export import history_columns, write_npz

    history = state["history"]
    columns = history_columns(history)
    table = np.array([[row.get(c, np.nan) for c in columns] for row in history], dtype=float)
    extra = {k: np.asarray(v) for k, v in state.items() if k not in ("design", "history")}
    write_npz(path, design=state["design"], history=table.reshape(len(history), len(columns)),
              history_columns=np.array(columns, dtype=str), problem_digest=np.array(digest),
              **extra)


def load_checkpoint(path: str | Path, digest: str, *, shape: tuple[int, ...] | None = None,
                    max_iterations: int | None = None) -> dict:
    """Read a checkpoint written by :func:`save_checkpoint`, validated entry by entry.

    Raises :class:`ResultsError` (one line naming the file and the entry) for a damaged
    file, a checkpoint of another problem, and any missing or malformed entry.
    """
    path = Path(path)
    hint = "start again with --overwrite"

    def bad(entry: str, message: str) -> ResultsError:
        return ResultsError(f"{path}: {entry}: {message}; {hint}")

    try:
        saved = read_arrays(path)
    except ResultsError as exc:
        raise ResultsError(f"{path}: not a readable checkpoint "
                           f"({str(exc).removeprefix(str(path) + ': ')}); {hint}") from None
    for entry in ("problem_digest", "design", "iteration", "history", "history_columns"):
        if entry not in saved:
            raise ResultsError(f"{path}: not a readable checkpoint (entry {entry!r} missing); "
                               f"{hint}")
    if saved["problem_digest"].ndim != 0 or str(saved["problem_digest"]) != digest:
        raise ResultsError(f"{path}: the checkpoint belongs to a different problem; {hint}")
    iteration = saved["iteration"]
    if iteration.ndim != 0 or iteration.dtype.kind not in "iu":
        raise bad("iteration", "expected a whole number")
    iteration = int(iteration)
    if iteration < 0 or (max_iterations is not None and iteration > max_iterations):
        raise bad("iteration", f"expected 0 ... {max_iterations}, got {iteration}")
    design = saved["design"]
    if design.dtype.kind != "f" or (shape is not None and design.shape != tuple(shape)):
        raise bad("design", f"expected floats of shape {shape}, got {design.dtype} "
                            f"{design.shape}")
    if not np.all(np.isfinite(design)) or design.min(initial=0.0) < 0 or design.max(initial=0.0) > 1:
        raise bad("design", "expected finite values in [0, 1]")
    columns = saved["history_columns"]
    if columns.ndim != 1 or columns.dtype.kind != "U":
        raise bad("history_columns", "expected a list of names")
    columns = [str(c) for c in columns]
    rows = saved["history"]
    if rows.ndim != 2 or rows.shape[1] != len(columns) or rows.dtype.kind != "f":
        raise bad("history", f"expected a table of {len(columns)} columns, got shape {rows.shape}")
    if rows.shape[0] > iteration or ("iteration" not in columns and rows.shape[0]):
        raise bad("history", f"{rows.shape[0]} rows do not fit iteration {iteration}")
    if "elapsed_s" in columns and rows.shape[0] and not np.all(np.isfinite(rows[:, columns.index("elapsed_s")])):
        raise bad("history", "elapsed_s holds non-finite values")
    state: dict = {}
    for key, value in saved.items():
        if key in ("problem_digest", "design", "iteration", "history", "history_columns"):
            continue
        if value.dtype.kind not in "biuf" or not np.all(np.isfinite(value)):
            raise bad(key, "expected finite numbers")
        state[key] = value if value.ndim else value.item()
    state["design"] = design
    state["iteration"] = iteration
    state["history"] = [
        {c: (int(v) if c == "iteration" else float(v)) for c, v in zip(columns, row, strict=True)}
        for row in rows
    ]
    return state


