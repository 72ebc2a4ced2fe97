"""Parameter studies: many optimisations of one problem, locally or on a Dask cluster.

A study file (TOML, read as data) names a base problem and the settings to vary::

    problem = "wall-bracket-2d.toml"        # relative to the study file (or an inline table)
    mode = "product"                         # or "zip" for paired lists of equal length
    [set]                                    # optional: applied to every case
    "optimize.max_iterations" = 80
    [vary]                                   # dotted problem keys -> lists of values
    "build.direction" = ["+y", "-y"]
    "optimize.volume_fraction" = [0.3, 0.4]

Each case is the base problem with its settings applied by
:func:`topopt.problem.with_settings`, which validates it again. Two kinds of mistakes are
told apart:

- mistakes in the study itself (unknown keys, a value list that is not a list, zip lists
  of different lengths, a base problem or ``[set]`` value that fails validation, or a
  study in which *no* case is valid - usually a misspelt key) raise :class:`StudyError`
  before anything runs; the command line reports one line and exits with code 2;
- a single case whose value is invalid (``volume_fraction = 1.5`` in a list of good
  values) becomes a ``failed`` row naming the key and the value, and the other cases run.

Every case goes to ``OUT/cases/<case-id>/``, a results folder as written by
``buttress optimize``. The case id is a readable prefix made of the varied values plus a
hash of the case's complete problem table, so the same problem always lands in the same
folder. A case whose results folder is complete and readable is not run again:
rerunning a study after a crash finishes only the missing cases, and adding values to a
study reuses the cases already done. Cases that failed, and finished cases whose files
are damaged, are run again on the next run.

``OUT/table.csv`` has one row per case in study order: ``case``, one column per varied
key, ``status`` (``ok`` / ``failed``), ``error``, ``compliance``, ``volume_fraction``,
``unsupported_elements`` (from the case summary, where the printability filter ran),
``iterations``, ``converged``, ``elapsed_s``, and the print-preparation figures
``support_volume``, ``build_time_h`` and ``assessed_direction`` (blank when nothing
solid was designed). ``OUT/study.png`` plots compliance against each
varied setting and compliance against support volume with the non-dominated cases
ringed.
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
import os
import re
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from itertools import product
from pathlib import Path
from typing import Any

from topopt.problem import (
    Problem,
    ProblemError,
    describe_value,
    load_problem,
    problem_from_dict,
    read_toml,
    with_settings,
)

STUDY_KEYS = ("mode", "name", "problem", "set", "vary")
MODES = ("product", "zip")
MAX_CASES = 10_000

#: Columns of ``table.csv`` after ``case`` and the varied keys.
RESULT_COLUMNS = (
    "status", "error", "compliance", "volume_fraction", "unsupported_elements", "iterations",
    "converged", "elapsed_s", "support_volume", "build_time_h", "assessed_direction",
)


class StudyError(ValueError):
    """A study file that cannot be run; the message is one line."""


@dataclass(frozen=True, eq=False)
class Case:
    """One case of a study: its varied settings and the validated problem (or the error)."""

    index: int
    case_id: str
    settings: dict
    problem: Problem | None
    error: str = ""


@dataclass(frozen=True, eq=False)
class Study:
    """A validated study: the varied keys, in file order, and every case."""

    name: str
    source: str
    keys: tuple[str, ...]
    mode: str
    cases: tuple[Case, ...]


# ---------------------------------------------------------------------------- reading


def load_study(study: str | Path | Mapping | Study) -> Study:
    """Read and validate a study file (or an already parsed study table).

    Parameters
    ----------
    study : str, Path, mapping or Study
        A TOML study file, its parsed table (a ``problem`` path is then relative to the
        current folder, and ``problem`` may also be an inline problem table), or a
        :class:`Study`, returned as is.

    Returns
    -------
    Study

    Raises
    ------
    StudyError
        For mistakes in the study itself (see the module notes).
    ProblemError
        If the base problem is invalid.

    Examples
    --------
    >>> st = load_study({
    ...     "problem": {
    ...         "domain": {"shape": [8, 4], "element_size": 1.0},
    ...         "material": {"youngs_modulus": 1.0, "poisson_ratio": 0.3},
    ...         "restraints": [{"where": {"x": [0.0, 0.0]}, "fix": ["x", "y"]}],
    ...         "loads": [{"where": {"x": [8.0, 8.0], "y": [0.0, 0.0]}, "force": [0.0, -1.0]}],
    ...         "optimize": {"volume_fraction": 0.5},
    ...     },
    ...     "vary": {"optimize.volume_fraction": [0.3, 1.5]},
    ... })
    >>> [c.settings["optimize.volume_fraction"] for c in st.cases]
    [0.3, 1.5]
    >>> st.cases[1].error.split(":")[0]
    'optimize.volume_fraction = 1.5'
    """
    if isinstance(study, Study):
        return study
    if isinstance(study, Mapping):
        return _study_from_dict(study, source="<study>", base_dir=Path.cwd())
    if not isinstance(study, (str, Path)):
        raise TypeError(f"study: expected a file path or a table, got {type(study).__name__}")
    path = Path(study)
    data = read_toml(path, what="a TOML study file", error=StudyError)
    return _study_from_dict(data, source=str(path), base_dir=path.parent)


def _study_from_dict(data: Mapping, *, source: str, base_dir: Path) -> Study:
    def fail(key: str, message: str) -> StudyError:
        return StudyError(f"{source}: {key}: {message}")

    for key in data:
        if key not in STUDY_KEYS:
            raise fail(key, f"unknown key; expected one of {', '.join(STUDY_KEYS)}")
    name = data.get("name", Path(source).stem)
    if not isinstance(name, str):
        raise fail("name", f"expected a string, got {describe_value(name)}")
    mode = data.get("mode", "product")
    if mode not in MODES:
        choices = ", ".join(repr(m) for m in MODES)
        raise fail("mode", f"expected one of {choices}, got {describe_value(mode)}")

    raw_problem = data.get("problem")
    if isinstance(raw_problem, str):
        base = load_problem(base_dir / raw_problem)
    elif isinstance(raw_problem, Mapping):
        base = problem_from_dict(raw_problem, source=f"{source}: problem")
    elif raw_problem is None:
        raise fail("problem", "missing; expected the path of a problem file")
    else:
        raise fail("problem", f"expected the path of a problem file, got {describe_value(raw_problem)}")

    fixed = data.get("set", {})
    if not isinstance(fixed, Mapping):
        raise fail("set", f"expected a table of dotted problem keys, got {describe_value(fixed)}")
    fixed = _flatten(fixed, leaf=lambda v: not isinstance(v, Mapping))
    if fixed:
        try:
            base = with_settings(base, fixed)
        except ProblemError as exc:
            raise fail("set", _strip_source(str(exc), base.path)) from None

    vary_raw = data.get("vary")
    if vary_raw is None:
        raise fail("vary", "missing; expected a [vary] table of dotted keys and lists of values")
    if not isinstance(vary_raw, Mapping):
        raise fail("vary", f"expected a table, got {describe_value(vary_raw)}")
    vary = _flatten(vary_raw, leaf=lambda v: not isinstance(v, Mapping))
    return _build_study(base, vary, fixed=fixed, mode=mode, name=name, source=source)


def study_of(problem: Problem, vary: Mapping[str, list], *, fixed: Mapping | None = None,
             name: str | None = None, mode: str = "product") -> Study:
    """A study of an already loaded problem: ``vary`` maps dotted keys to lists of values.

    The same checks as a study file's ``[vary]`` table apply, and ``fixed`` (dotted keys
    to values) is applied to every case as a study file's ``[set]`` table is; the cases
    keep the problem's own source path (used in messages and for defaults such as its
    name).

    Examples
    --------
    >>> from topopt.problem import load_problem
    >>> st = study_of(load_problem("examples/mbb-beam.toml"), {"build.direction": ["none", "+y"]})
    >>> [(c.settings["build.direction"], c.problem.build.direction) for c in st.cases]
    [('none', 'none'), ('+y', '+y')]
    >>> st = study_of(load_problem("examples/mbb-beam.toml"), {"build.direction": ["+x"]},
    ...               fixed={"optimize.volume_fraction": 0.3})
    >>> st.cases[0].problem.optimize.volume_fraction
    0.3
    """
    if mode not in MODES:
        raise StudyError(f"{problem.path}: mode: expected one of {', '.join(MODES)}, got {mode!r}")
    fixed = dict(fixed or {})
    base = with_settings(problem, fixed) if fixed else problem
    return _build_study(base, dict(vary), fixed=fixed, mode=mode,
                        name=problem.name if name is None else name, source=problem.path)


def _build_study(base: Problem, vary: dict, *, fixed: Mapping, mode: str, name: str,
                 source: str) -> Study:
    def fail(key: str, message: str) -> StudyError:
        return StudyError(f"{source}: {key}: {message}")

    if not vary:
        raise fail("vary", "empty; expected at least one dotted key with a list of values")
    for key, values in vary.items():
        if not isinstance(values, list):
            raise fail(f"vary.{key}", f"expected a list of values, got {describe_value(values)}")
        if not values:
            raise fail(f"vary.{key}", "expected at least one value, got an empty list")
        if mode == "product":  # paired (zip) lists may repeat a value
            seen = []
            for v in values:
                # 2 and 2.0 are one number (and one case); true is not 1
                if any(v == s and isinstance(v, bool) == isinstance(s, bool) for s in seen):
                    raise fail(f"vary.{key}", f"the value {_display(v)} appears twice")
                seen.append(v)
        if key in fixed:
            raise fail(f"vary.{key}", "is also given in [set]; give it in one place")
    keys = tuple(vary)
    if mode == "zip":
        lengths = {len(v) for v in vary.values()}
        if len(lengths) > 1:
            sizes = ", ".join(f"{k}: {len(v)}" for k, v in vary.items())
            raise fail("vary", f"mode = \"zip\" needs lists of equal length, got {sizes}")
        combos = list(zip(*vary.values(), strict=True))
    else:
        n = math.prod(len(v) for v in vary.values())
        if n > MAX_CASES:
            raise fail("vary", f"{n} cases; expected at most {MAX_CASES}")
        combos = list(product(*vary.values()))

    cases = []
    for index, combo in enumerate(combos):
        settings = dict(zip(keys, combo, strict=True))
        data_i = _apply(base.source, settings)
        cid = case_id(data_i, settings)
        try:
            problem = with_settings(base, settings)
            error = ""
        except ProblemError as exc:
            problem = None
            error = f"{_settings_text(settings)}: {_strip_source(str(exc), base.path)}"
        cases.append(Case(index, cid, settings, problem, error))
    if all(c.problem is None for c in cases):
        raise fail("vary", f"no case is valid; the first: {cases[0].error}")
    ids = [c.case_id for c in cases]
    if len(set(ids)) != len(ids):  # e.g. 1 and 1.0 in one list give the same problem
        raise fail("vary", "two cases give the same problem; remove the repeated value")
    return Study(name=name, source=source, keys=keys, mode=mode, cases=tuple(cases))


def _flatten(table: Mapping, *, leaf, prefix: str = "") -> dict:
    """Nested tables -> dotted keys (``[vary] build.direction = [...]`` parses nested)."""
    out: dict[str, Any] = {}
    for key, value in table.items():
        name = f"{prefix}.{key}" if prefix else str(key)
        if leaf(value):
            out[name] = value
        else:
            out.update(_flatten(value, leaf=leaf, prefix=name))
    return out


def _apply(source: Mapping, settings: Mapping) -> dict:
    """Apply dotted settings to a copy of a problem table (as with_settings does)."""
    data = copy.deepcopy(dict(source))
    for dotted, value in settings.items():
        table = data
        parts = dotted.split(".")
        for part in parts[:-1]:
            nxt = table.setdefault(part, {})
            if not isinstance(nxt, dict):
                break  # with_settings reports this; the hash only needs to be stable
            table = nxt
        else:
            table[parts[-1]] = value
    return data


def case_id(problem_table: Mapping, settings: Mapping) -> str:
    """Stable id of a case: readable prefix from the varied values + hash of the problem.

    The hash covers the whole problem table, so a changed base problem never reuses the
    results of the old one.

    Examples
    --------
    >>> case_id({"build": {"direction": "+y"}}, {"build.direction": "+y"})[:3]
    'py-'
    """
    text = json.dumps(_same_numbers(problem_table), sort_keys=True, default=repr,
                      separators=(",", ":"))
    digest = hashlib.sha256(text.encode("utf-8")).hexdigest()[:10]
    parts = [_slug(v) for v in settings.values()]
    prefix = "_".join(p for p in parts if p)[:48].strip("_.")
    return f"{prefix}-{digest}" if prefix else digest


def _same_numbers(value: Any) -> Any:
    """Write whole floats as integers (2.0 -> 2), so values naming one number hash alike."""
    if isinstance(value, Mapping):
        return {k: _same_numbers(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_same_numbers(v) for v in value]
    if isinstance(value, float) and value.is_integer() and abs(value) < 2**53:
        return int(value)
    return value


def _slug(value: Any) -> str:
    value = _same_numbers(value)
    if isinstance(value, list):
        return "x".join(_slug(v) for v in value)
    text = str(value).lower() if isinstance(value, bool) else str(value)
    text = text.replace("+", "p").replace("-", "m")
    return re.sub(r"[^A-Za-z0-9.]", "", text)


def _settings_text(settings: Mapping) -> str:
    return ", ".join(f"{k} = {_display(v)}" for k, v in settings.items())


def _display(value: Any) -> str:
    if isinstance(value, str):
        return value
    return json.dumps(value, default=str)


def _strip_source(message: str, source: str) -> str:
    return message[len(source) + 2:] if message.startswith(source + ": ") else message


# ---------------------------------------------------------------------------- running


def run_case(problem_table: Mapping, *, source: str, single_thread: bool = True) -> dict:
    """Optimise one case; runs in a worker process (local pool or Dask worker).

    Takes the problem as plain data so it can travel to a remote worker, and never
    raises for a failed optimisation: it returns ``{"result": Result}`` (its metrics
    measured here, in the worker, by :func:`topopt.results.measure`) or
    ``{"error": "one line"}``.

    Examples
    --------
    >>> problem = with_settings(load_problem("examples/mbb-beam.toml"), {"optimize.max_iterations": 2})
    >>> run_case(problem.source, source=problem.path)["result"].iterations
    2
    >>> run_case({"domain": {}}, source="broken.toml")["error"].split(":")[:3]
    ['ProblemError', ' broken.toml', ' domain.shape']
    """
    import contextlib

    from topopt.driver import optimize
    from topopt.parallel import single_thread as one_thread
    from topopt.results import measure

    try:
        problem = problem_from_dict(problem_table, source=source)
        # Several cases run side by side: one BLAS / OpenMP thread each, or they fight
        # over the cores (the limit takes effect when created, so create it here).
        with one_thread() if single_thread else contextlib.nullcontext():
            return {"result": measure(optimize(problem), problem)}
    except Exception as exc:  # noqa: BLE001 - a failed case must not stop the study
        return {"error": _one_line(exc)}


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def _run_inline(cases: list[Case]) -> Iterator[tuple[Case, dict]]:
    for case in cases:
        yield case, run_case(case.problem.source, source=case.problem.path, single_thread=False)


def _run_pool(cases: list[Case], workers: int) -> Iterator[tuple[Case, dict]]:
    from topopt.parallel import process_map

    # an interrupted study ends its running cases at once; their folders have no
    # summary.json, so a rerun redoes them
    jobs = [(c, (c.problem.source,), {"source": c.problem.path, "single_thread": True}) for c in cases]
    for case, payload, error in process_map(run_case, jobs, workers=workers):
        if error is not None:  # e.g. a worker killed by the system
            payload = {"error": f"worker failed: {_one_line(error)}"}
        yield case, payload


def _private_security():
    """A throw-away TLS certificate shared only by this process and its own workers."""
    try:
        from distributed.security import Security

        return Security.temporary()
    except ImportError:
        raise ValueError("--dask needs the 'cryptography' package for a private cluster; "
                         "install it with pip install 'buttress[cluster]'") from None


def _run_dask(
    cases: list[Case], *, scheduler: str | None, workers: int
) -> Iterator[tuple[Case, dict]]:
    try:
        from distributed import Client, LocalCluster, as_completed
    except ImportError:
        raise ValueError("running on Dask needs dask[distributed]; install it with "
                         "pip install 'buttress[cluster]'") from None
    cluster = None
    try:
        if scheduler is None:
            # Loopback only, and mutual TLS with a certificate made for this run: other
            # processes on this machine cannot connect to the scheduler or the workers.
            from topopt.parallel import workers_skip_main_script

            security = _private_security()
            # the workers need topopt only, not the caller's script (see the helper)
            with workers_skip_main_script():
                cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                       host="127.0.0.1", dashboard_address=None,
                                       protocol="tls://", security=security)
            client = Client(cluster, security=security)
            # the workers are this process's children (their nannies run here): they end
            # with it however it ends. distributed watches a pipe from the parent too;
            # with that watch disabled the workers outlived a kill -9 and this ended them
            from topopt.parallel import die_with_parent

            client.run(die_with_parent, os.getpid())
        else:
            try:
                client = Client(scheduler, timeout=15)
            except OSError as exc:
                raise ValueError(f"--scheduler {scheduler}: cannot reach the scheduler "
                                 f"({_one_line(exc)})") from None
        try:
            futures = {}
            for c in cases:
                f = client.submit(run_case, c.problem.source, source=c.problem.path,
                                  single_thread=True, pure=False)
                futures[f] = c
            for future in as_completed(list(futures)):
                try:
                    payload = future.result()
                except Exception as exc:  # noqa: BLE001 - e.g. a worker lost twice
                    payload = {"error": f"worker failed: {_one_line(exc)}"}
                yield futures[future], payload
        finally:
            client.close()
    finally:
        if cluster is not None:
            cluster.close()


def run(
    study: str | Path | Mapping | Study,
    *,
    out_dir: str | Path,
    workers: int | None = None,
    scheduler: str | None = None,
    dask: bool = False,
    progress: bool = False,
) -> list[dict]:
    """Run every unfinished case of a study and write the study folder.

    Parameters
    ----------
    study : str, Path, mapping or Study
        See :func:`load_study`.
    out_dir : str or Path
        The study folder: ``cases/<case-id>/``, ``table.csv`` and ``study.png``.
    workers : int, optional
        Cases run at the same time (default: the number of cores, at most the number of
        cases). ``1`` runs the cases one after the other in this process, with all BLAS
        threads; otherwise each case gets one worker process with one BLAS thread.
    scheduler : str, optional
        Address of a running Dask scheduler (``tcp://host:8786``); the cases run there.
    dask : bool
        Start a local Dask cluster (loopback only) with ``workers`` workers.
    progress : bool
        Show a progress bar counting finished cases.

    Returns
    -------
    list of dict
        The rows of ``table.csv`` in study order (blank cells are ``None``).

    Examples
    --------
    >>> rows = run({"problem": "examples/mbb-beam.toml",
    ...             "set": {"optimize.max_iterations": 2},
    ...             "vary": {"optimize.volume_fraction": [0.4, 0.5]}},
    ...            out_dir="study-out", workers=1)
    >>> [(r["optimize.volume_fraction"], r["status"], r["iterations"]) for r in rows]
    [(0.4, 'ok', 2), (0.5, 'ok', 2)]
    """
    bad_workers = isinstance(workers, bool) or not isinstance(workers, int) or workers < 1
    if workers is not None and bad_workers:
        raise ValueError(f"workers: expected a whole number >= 1, got {workers!r}")
    if scheduler is not None and (not isinstance(scheduler, str) or "://" not in scheduler):
        raise ValueError(
            f"scheduler: expected an address such as tcp://host:8786, got {scheduler!r}")
    if scheduler is not None and dask:
        raise ValueError("give either a scheduler address or dask=True (a local cluster), not both")
    st = load_study(study)  # validate before touching the output folder
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise ValueError(f"{out}: exists and is not a folder")
    from topopt.results import check_writable, folder_lock

    check_writable(out)
    with folder_lock(out):  # a second sweep into the same folder is refused at once
        return _run_study(st, out, workers=workers, scheduler=scheduler, dask=dask,
                          progress=progress)


def _run_study(st: Study, out: Path, *, workers: int | None, scheduler: str | None,
               dask: bool, progress: bool) -> list[dict]:
    cases_dir = out / "cases"
    cases_dir.mkdir(parents=True, exist_ok=True)

    rows: dict[int, dict] = {}
    for case, folder, error, ran in run_cases(
        st.cases, lambda c: cases_dir / c.case_id, workers=workers, scheduler=scheduler,
        dask=dask, progress=progress,
    ):
        rows[case.index] = _failed_row(st, case, error) if error else case_row(st, case, folder)
        if ran:
            write_table(_ordered(rows), st.keys, out / "table.csv")

    ordered = _ordered(rows)
    write_table(ordered, st.keys, out / "table.csv")
    directions = {c.case_id: (c.problem.build.direction if c.problem else "") for c in st.cases}
    plot_study(ordered, st.keys, out / "study.png", title=st.name, directions=directions,
               mode=st.mode)
    return ordered


def run_cases(
    cases,
    folder_of,
    *,
    workers: int | None = None,
    scheduler: str | None = None,
    dask: bool = False,
    progress: bool = False,
    reuse: bool = True,
) -> Iterator[tuple[Case, Path, str, bool]]:
    """Run cases into their results folders: the one runner of studies and comparisons.

    Parameters
    ----------
    cases : sequence of Case
        The cases (from :func:`load_study` or :func:`study_of`).
    folder_of : callable
        ``folder_of(case) -> Path``: the case's results folder.
    workers, scheduler, dask, progress
        As for :func:`run`.
    reuse : bool
        Count a case whose folder holds a ``summary.json`` as done (resume) instead of
        running it again.

    Yields
    ------
    (case, folder, error, ran)
        For every case, in the order they are known or finish: ``error`` is ``""`` when
        the folder holds the case's results, else one line; ``ran`` says whether the case
        ran now (``False`` for invalid and reused cases). Each case's ``problem.toml`` is
        written before it runs, so any case can be rerun by hand.
    """
    from topopt.export import write_text
    from topopt.problem import to_toml
    from topopt.results import write_results

    cases = list(cases)
    pending: list[Case] = []
    for case in cases:
        folder = Path(folder_of(case))
        if case.problem is None:
            yield case, folder, case.error, False
        elif reuse and (folder / "summary.json").exists() and _finished(folder, case.problem):
            yield case, folder, "", False
        else:
            # missing, or finished but damaged (unreadable summary or arrays): run again;
            # the case's problem file first, so any case can be rerun by hand
            write_text(folder / "problem.toml", to_toml(case.problem.source))
            pending.append(case)

    n_workers = workers if workers is not None else (os.cpu_count() or 1)
    n_workers = max(1, min(n_workers, len(pending) or 1))
    if not pending:  # nothing to run: start no pool or cluster
        finished = iter(())
    elif scheduler is not None or dask:
        finished = _run_dask(pending, scheduler=scheduler, workers=n_workers)
    elif n_workers == 1:
        finished = _run_inline(pending)
    else:
        finished = _run_pool(pending, n_workers)

    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=len(cases), initial=len(cases) - len(pending), desc="cases",
                   unit="case", dynamic_ncols=True)
    try:
        for case, payload in finished:
            folder = Path(folder_of(case))
            error = ""
            if "result" in payload:
                try:
                    write_results(payload["result"], case.problem, folder)
                except Exception as exc:  # noqa: BLE001 - e.g. a mesh writer refusing a design
                    error = f"writing the results failed: {_one_line(exc)}"
            else:
                error = payload["error"]
            if bar is not None:
                bar.update(1)
            yield case, folder, error, True
    finally:
        if bar is not None:
            bar.close()
        close = getattr(finished, "close", None)
        if close is not None:
            close()


def _ordered(rows: dict[int, dict]) -> list[dict]:
    return [rows[i] for i in sorted(rows)]


# ---------------------------------------------------------------------------- table


def table_columns(keys: tuple[str, ...]) -> list[str]:
    """Columns of ``table.csv`` for a study varying ``keys``."""
    return ["case", *keys, *RESULT_COLUMNS]


def _blank_row(st: Study, case: Case) -> dict:
    row = {col: None for col in table_columns(st.keys)}
    row["case"] = case.case_id
    row.update(case.settings)
    return row


def _failed_row(st: Study, case: Case, error: str) -> dict:
    row = _blank_row(st, case)
    row["status"] = "failed"
    row["error"] = error
    return row


def _finished(folder: Path, problem: Problem) -> bool:
    """Whether a case folder holds a complete, readable result of ``problem``."""
    from topopt.results import check_finished

    try:
        check_finished(folder, problem)
    except (ValueError, OSError):
        return False
    return True


def read_summary(folder: str | Path) -> dict:
    """The ``summary.json`` of a results folder as a dict (see :mod:`topopt.results`).

    Raises
    ------
    OSError
        If the file cannot be read.
    ValueError
        If it is not JSON or not a JSON object.
    """
    from topopt.results import read_summary as _read

    return _read(Path(folder))


def read_density(folder: str | Path):
    """The physical density of a results folder (``result.npz``, headers checked).

    Raises
    ------
    OSError, KeyError, ValueError
        If the file is missing, has no ``density`` or is not a readable archive.
    """
    import numpy as np

    from topopt.results import read_arrays

    return np.asarray(read_arrays(Path(folder) / "result.npz", ["density"])["density"],
                      dtype=float)


def case_row(st: Study, case: Case, folder: Path) -> dict:
    """Read the table row of a finished case back from its results folder."""
    row = _blank_row(st, case)
    from topopt.results import read_summary

    try:
        summary = read_summary(folder)
    except (OSError, ValueError) as exc:
        row.update(status="failed", error=f"unreadable summary.json ({_one_line(exc)})")
        return row
    row["status"] = "ok"
    row["error"] = ""
    for key in ("compliance", "volume_fraction", "unsupported_elements", "iterations",
                "converged", "elapsed_s"):
        row[key] = summary.get(key)
    row.update(print_figures(case.problem, folder))
    return row


def print_figures(problem: Problem, folder: Path) -> dict:
    """Support volume and build time of a finished case, where the analysis exists.

    Uses :mod:`topopt.build` (print-preparation analysis); the figures stay blank when
    the results folder has no readable density or nothing would be printed. A case built
    without a build direction is assessed in the direction the analysis ranks best;
    ``assessed_direction`` says which.
    """
    from topopt.build import analyze_design

    blank = {"support_volume": None, "build_time_h": None, "assessed_direction": None}
    try:
        density = read_density(folder)
    except (OSError, KeyError, ValueError):
        return blank
    grid = problem.grid
    process = {k: getattr(problem.process, k) for k in problem.process.__dataclass_fields__}
    direction = problem.build.direction
    if not (density >= 0.5).any():
        return blank  # nothing would be printed
    try:
        reports, best, _ = analyze_design(
            density, element_size=grid.element_size,
            directions=None if direction == "none" else [direction],
            overhang_angle=problem.build.overhang_angle,
            thickness=grid.thickness if grid.dim == 2 else 1.0, process=process,
            mass_density=(None if problem.material.mass_density is None
                          else problem.material.mass_density * problem.units.kg_per_mass),
        )
    except (ValueError, TypeError) as exc:
        # Keep the optimisation result; say why the figures are missing.
        return {**blank, "error": f"print-preparation analysis failed: {_one_line(exc)}"}
    report = next(r for r in reports if r.direction == best)
    return {"support_volume": float(report.support_volume),
            "build_time_h": float(report.build_time_h), "assessed_direction": best}


def write_table(rows: list[dict], keys: tuple[str, ...], path: str | Path) -> None:
    """Write ``table.csv`` atomically; list values are written as JSON (``[60, 30]``)."""
    from topopt.export import write_csv

    cells = [{k: (json.dumps(v) if isinstance(v, list) else v) for k, v in r.items()} for r in rows]
    write_csv(path, cells, table_columns(keys))


# ---------------------------------------------------------------------------- plots


def non_dominated(costs) -> list[bool]:
    """Which points no other point beats in every cost (all costs minimised).

    Examples
    --------
    >>> non_dominated([(1.0, 3.0), (2.0, 2.0), (3.0, 3.0), (1.0, 3.0)])
    [True, True, False, True]
    """
    pts = [tuple(float(c) for c in p) for p in costs]
    flags = []
    for p in pts:
        beaten = any(all(q_i <= p_i for q_i, p_i in zip(q, p, strict=True)) and q != p for q in pts)
        flags.append(not beaten)
    return flags


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def plot_study(rows: list[dict], keys: tuple[str, ...], path: str | Path, *, title: str = "",
               directions: Mapping[str, str] | None = None, mode: str = "product") -> None:
    """Draw ``study.png``: compliance against each varied setting, and the trade-off.

    One panel per varied key (other than the build direction) with one line per build
    direction (and, in ``"product"`` mode, per combination of the other varied values:
    in ``"zip"`` mode they change together along the line); a last panel plots
    compliance against support volume and rings the non-dominated cases (support volume,
    compliance and volume fraction all count: a lighter design is not beaten by a
    stiffer, heavier one).
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from topopt.export import CAUTION, atomic_write

    directions = dict(directions or {})
    ok = [r for r in rows if r["status"] == "ok" and _is_number(r["compliance"])]
    n_failed = sum(r["status"] != "ok" for r in rows)
    x_keys = [k for k in keys if k != "build.direction"] or list(keys)
    n_panels = len(x_keys) + 1
    ncols = min(n_panels, 2)
    nrows = math.ceil(n_panels / ncols)
    fig, axes = plt.subplots(nrows, ncols, figsize=(6.2 * ncols, 4.4 * nrows), dpi=110,
                             squeeze=False)
    flat = axes.ravel()
    all_dirs = list(dict.fromkeys(directions.get(r["case"], "") for r in rows))
    colours = {d: plt.get_cmap("tab10")(i % 10) for i, d in enumerate(all_dirs)}
    for ax, key in zip(flat, x_keys, strict=False):
        others = [k for k in keys if k not in (key, "build.direction")] if mode == "product" else []
        _plot_against(ax, rows, ok, key, others, directions, colours)
    listing = _plot_tradeoff(flat[len(x_keys)], ok, keys, directions, colours)
    spare = list(flat[n_panels:])
    if listing and spare:  # the list of ringed cases gets the empty panel to itself
        ax = spare.pop(0)
        ax.axis("off")
        ax.text(0.0, 1.0, "ringed cases, numbered by support volume\n" + "\n".join(listing[:30]),
                fontsize=8, ha="left", va="top", transform=ax.transAxes)
    elif listing:
        flat[len(x_keys)].text(0.98, 0.02, "\n".join(listing[:13]), fontsize=6, ha="right",
                               va="bottom", transform=flat[len(x_keys)].transAxes,
                               bbox={"facecolor": "white", "alpha": 0.8, "edgecolor": "0.7"})
    for ax in spare:
        ax.set_visible(False)
    heading = title or "study"
    if n_failed:
        heading += f"  ({n_failed} failed case{'s' if n_failed > 1 else ''} not shown)"
    fig.suptitle(heading, fontsize=11)
    fig.text(0.01, 0.005, CAUTION, fontsize=5.5, color="0.35", wrap=True)
    fig.tight_layout(rect=(0, 0.03, 1, 0.96))
    atomic_write(path, lambda h: fig.savefig(h, format="png"))
    plt.close(fig)


def _plot_against(ax, rows, ok, key, others, directions, colours) -> None:
    values = [r[key] for r in rows]
    numeric = all(_is_number(v) for v in values)
    if numeric:
        position = {_display(v): float(v) for v in values}
    else:  # categories in study order
        position = {d: i for i, d in enumerate(dict.fromkeys(_display(v) for v in values))}
    groups: dict[tuple, list[dict]] = {}
    for r in ok:
        groups.setdefault((directions.get(r["case"], ""),
                           tuple(_display(r[k]) for k in others)), []).append(r)
    combos = list(dict.fromkeys(g[1] for g in groups))
    styles = ["-", "--", ":", "-."]
    markers = ["o", "s", "^", "D", "v", "P"]
    for (direction, combo), members in groups.items():
        members.sort(key=lambda r: position[_display(r[key])])
        xs = [position[_display(r[key])] for r in members]
        ys = [r["compliance"] for r in members]
        j = combos.index(combo)
        label = _direction_label(direction) + "".join(
            f", {k.split('.')[-1]}={v}" for k, v in zip(others, combo, strict=True))
        ax.plot(xs, ys, linestyle=styles[j % len(styles)], marker=markers[j % len(markers)],
                color=colours.get(direction), label=label, linewidth=1.3, markersize=4)
    if not numeric:
        ax.set_xticks(list(position.values()), list(position.keys()))
    ax.set_xlabel(key)
    ax.set_ylabel("compliance")
    ax.grid(alpha=0.3)
    if groups:
        ax.legend(fontsize=6.5, ncol=2 if len(groups) > 6 else 1)
    else:
        ax.text(0.5, 0.5, "no finished case", ha="center", va="center", transform=ax.transAxes)


def _direction_label(direction: str) -> str:
    return "free (no build direction)" if direction == "none" else f"build {direction}"


def _plot_tradeoff(ax, ok, keys, directions, colours) -> list[str]:
    """Draw the support-compliance panel; return the lines listing the ringed cases."""
    pts = [r for r in ok if _is_number(r.get("support_volume"))]
    ax.set_xlabel("support volume (length unit^3)")
    ax.set_ylabel("compliance")
    ax.set_title("stiffness against supports", fontsize=9)
    if not pts:
        ax.text(0.5, 0.5, "support volume not available\n(no solid design)", ha="center", va="center",
                transform=ax.transAxes, fontsize=9)
        return []
    xs = [r["support_volume"] for r in pts]
    ys = [r["compliance"] for r in pts]
    # Best designs weigh mass too: a case is ringed unless another has no more support,
    # no higher compliance and no more material (volume fraction) and is better in one.
    # (to 1e-3: the optimiser meets a volume fraction to about 1e-5, and a case at
    # 0.29997 must not escape being beaten by one at 0.30000)
    mass = [round(float(r["volume_fraction"]), 3) if _is_number(r.get("volume_fraction")) else 0.0
            for r in pts]
    # compliance to 6 significant digits: repeated runs of one design differ by 1e-7
    rounded = [float(f"{y:.6g}") for y in ys]
    front = non_dominated(list(zip(xs, rounded, mass, strict=True)))
    # the staircase joins the cases best in support and compliance alone (a subset)
    stairs = non_dominated(list(zip(xs, ys, strict=True)))
    for direction in dict.fromkeys(directions.get(r["case"], "") for r in pts):
        members = [r for r in pts if directions.get(r["case"], "") == direction]
        ax.scatter([r["support_volume"] for r in members], [r["compliance"] for r in members],
                   s=18, color=colours.get(direction), label=_direction_label(direction),
                   zorder=2)
    fx = [x for x, f in zip(xs, front, strict=True) if f]
    fy = [y for y, f in zip(ys, front, strict=True) if f]
    sx = [x for x, f in zip(xs, stairs, strict=True) if f]
    sy = [y for y, f in zip(ys, stairs, strict=True) if f]
    order = sorted(range(len(sx)), key=lambda i: sx[i])
    ax.plot([sx[i] for i in order], [sy[i] for i in order], color="black", linewidth=0.8,
            drawstyle="steps-post", zorder=1)
    ax.scatter(fx, fy, s=70, facecolors="none", edgecolors="black", linewidths=1.2,
               label="non-dominated in support, compliance, volume fraction", zorder=3)
    # Number the front (by support volume) and list what each case is, so close
    # points keep readable labels.
    listed = sorted((r for r, f in zip(pts, front, strict=True) if f),
                    key=lambda r: r["support_volume"])
    lines = [", ".join(k.split(".")[-1] for k in keys)]
    for n, r in enumerate(listed, start=1):
        ax.annotate(str(n), (r["support_volume"], r["compliance"]), fontsize=7,
                    xytext=(5, 5), textcoords="offset points")
        lines.append(f"{n}: " + ", ".join(_display(r[k]) for k in keys))
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="upper right")
    return lines
