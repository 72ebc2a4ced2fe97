"""Optimise one problem free and self-supporting for several build directions, side by side.

:func:`compare` is a study that varies ``build.direction``: the problem with the
printability filter off (``"none"``) and on for each requested build direction. The
cases run through the study runner (:func:`topopt.study.run_cases`), each into its own
results folder (``none``, ``plus-x``, ``minus-y`` ...), and are read back with the study's
results reader; then :func:`compare` writes ``comparison.csv`` (one row per run) and
``comparison.png`` (the designs with the build plate drawn on each, and a bar chart of
the compliance increase against the free design). Runs go to a pool of processes
limited to the core count, each with its BLAS held to one thread, so parallel runs do
not fight over the cores.
"""

from __future__ import annotations

import math
import os
import sys
import time
from collections.abc import Sequence
from pathlib import Path

import numpy as np

#: Columns of ``comparison.csv``. ``free_design_unsupported_elements`` is the number of
#: unsupported elements the free design would have if built along that row's direction;
#: ``unsupported_keep_in_elements`` counts those of ``unsupported_elements`` that lie in
#: keep-in regions (required by the user, printed with supports if nothing holds them).
COLUMNS = [
    "direction",
    "compliance",
    "compliance_increase_percent",
    "volume_fraction",
    "unsupported_elements",
    "unsupported_keep_in_elements",
    "overhang_area",
    "grey_level",
    "elapsed_s",
    "iterations",
    "converged",
    "free_design_unsupported_elements",
    "support_volume",
    "free_design_support_volume",
    "results",
]

_FOLDER = {"none": "none", "+": "plus-", "-": "minus-"}


def folder_name(direction) -> str:
    """Results-folder name of a run: ``none``, ``plus-x``, ``minus-z``, ``dir_0.707_0_0.707``.

    Examples
    --------
    >>> folder_name("-y"), folder_name("none"), folder_name((1.0, 0.0, 1.0))
    ('minus-y', 'none', 'dir_0.7071_0_0.7071')
    """
    if isinstance(direction, str):
        if direction == "none":
            return "none"
        return _FOLDER[direction[0]] + direction[1]
    from filters.direction import unit_vector

    v = unit_vector(list(direction), len(direction))
    return "dir_" + "_".join(f"{c:.4g}" if abs(c) >= 1e-12 else "0" for c in v)


def _label(direction) -> str:
    from filters.direction import direction_label

    if isinstance(direction, str):
        return direction
    return direction_label(list(direction), len(direction))


def _check_directions(directions, dim: int) -> list:
    """Axis names stay names; vectors become tuples (an axis as a vector: its name)."""
    from filters.direction import axis_directions, direction_label, unit_vector

    allowed = axis_directions(dim)
    if directions is None:
        return list(allowed)
    if isinstance(directions, str):
        from filters.direction import parse_directions

        directions = parse_directions(directions, dim)
    directions = list(directions)
    if not directions:
        raise ValueError("directions must name at least one build direction")
    out = []
    for d in directions:
        if isinstance(d, str) and d not in allowed:
            raise ValueError(
                f"directions: {d!r} is not a build direction of a {dim}D domain; "
                f"expected some of {','.join(allowed)} or vectors of {dim} numbers"
            )
        if not isinstance(d, str):
            unit_vector(list(d), dim)
            label = direction_label(list(d), dim)
            d = label if label in allowed else tuple(float(c) for c in d)
        out.append(d)
    labels = [_label(d) for d in out]
    if len(set(labels)) != len(labels):
        raise ValueError(f"directions: each direction may appear once, got {','.join(labels)}")
    return out


def _check_workers(workers, n_runs: int) -> int:
    cores = os.cpu_count() or 1
    if workers is None:
        return max(1, min(cores, n_runs))
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise ValueError(f"workers must be a positive integer, got {workers!r}")
    return max(1, min(workers, cores, n_runs))


def compare(
    problem,
    *,
    directions: Sequence[str] | str | None = None,
    out_dir: str | Path,
    workers: int | None = None,
    progress: bool = False,
    overwrite: bool = False,
) -> list[dict]:
    """Optimise ``problem`` free and for each build direction; write the comparison.

    Parameters
    ----------
    problem : Problem
        The problem; its own ``[build] direction`` is ignored, its overhang angle used.
    directions : sequence of str, str or callable, optional
        Build directions to run besides the free design (``"none"``), e.g.
        ``["+x", "-y"]`` or ``"+x,-y"``. Default: every axis direction of the domain.
        A callable is given the free design's results folder once that run is done and
        returns the directions (``buttress compare --search`` passes an orientation
        search of the free design this way).
    out_dir : str or Path
        Folder for ``comparison.csv``, ``comparison.png`` and one results folder per
        run (``none``, ``plus-x``, ``minus-y`` ...).
    workers : int, optional
        Runs at the same time; default and upper limit: the number of cores.
    progress : bool
        Print one line per finished run to standard error.
    overwrite : bool
        Replace a comparison already in ``out_dir`` (files that are not the comparison's
        are kept); otherwise a folder holding anything is an error.

    Returns
    -------
    list of dict
        One row per run with the keys of :data:`COLUMNS`, the free design first.

    Raises
    ------
    ValueError
        For unknown or repeated directions, a bad ``workers`` value, an ``out_dir``
        that cannot be written, is being written by another run (a lock beside it), or
        holds results or files of the user's own without ``overwrite`` (all before any
        run).

    Examples
    --------
    >>> from topopt.problem import load_problem, with_settings
    >>> beam = with_settings(load_problem("examples/mbb-beam.toml"), {"optimize.max_iterations": 5})
    >>> rows = compare(beam, directions="+y", out_dir="cmp", workers=1)
    >>> [(r["direction"], r["results"]) for r in rows]
    [('none', 'none'), ('+y', 'plus-y')]
    """
    from topopt.results import check_writable, folder_lock

    if callable(directions):
        runs = ["none"]  # the rest once the free design is known
        n_workers = _check_workers(workers, os.cpu_count() or 1)
    else:
        runs = ["none"] + _check_directions(directions, problem.grid.dim)
        n_workers = _check_workers(workers, len(runs))
    out = Path(out_dir)
    check_writable(out)  # before any run, not after the last
    with folder_lock(out):  # a second comparison into the same folder is refused at once
        check_output(out, runs, overwrite=overwrite)
        return _compare(problem, runs, out, n_workers=n_workers, progress=progress,
                        then=directions if callable(directions) else None)


def check_output(out: Path, runs: list, *, overwrite: bool) -> None:
    """Refuse an ``out`` holding anything (a comparison, or files of the user's own) unless ``overwrite``.

    Hidden entries (the lock, temporary folders) do not count. With ``overwrite`` the
    comparison's files and run folders are replaced; other files are left alone.
    """
    if overwrite or not out.is_dir():
        return
    names = sorted(p.name for p in out.iterdir() if not p.name.startswith("."))
    if not names:
        return
    taken = [out / "comparison.csv"] + [out / folder_name(d) / "summary.json" for d in runs]
    if any(p.exists() for p in taken):
        raise ValueError(f"{out}: holds results already; use --overwrite or another --out")
    raise ValueError(f"{out}: holds files that are not a finished comparison (e.g. {names[0]}); "
                     "use --overwrite to replace the comparison, or another --out")


def _compare(problem, runs: list, out: Path, *, n_workers: int, progress: bool,
             then=None) -> list[dict]:
    """Run the comparison into ``out`` (checked and locked by :func:`compare`)."""
    from topopt.export import write_csv
    from topopt.study import read_density

    shared = {}
    opt = problem.source.get("optimize", {})
    if "projection" not in opt and "min_member_size" not in opt:
        from topopt.problem import DEFAULT_BETA_EVERY, DEFAULT_BETA_MAX

        # the free design gets the projection continuation the self-supporting runs get
        # by default, so that every design of the comparison ends crisp and converged
        shared["optimize.projection"] = {"every": DEFAULT_BETA_EVERY,
                                         "beta_max": DEFAULT_BETA_MAX}
    if "method" not in opt:
        # and the same optimiser: OC on the free wall bracket ended in a two-iteration
        # cycle at the move limit (compliance constant to 1e-6) and never converged
        shared["optimize.method"] = "mma"
    out.mkdir(parents=True, exist_ok=True)
    summaries: dict[str, dict] = {}
    t0 = time.perf_counter()
    if then is None:
        _run_directions(problem, runs, shared, out, summaries, n_workers=n_workers,
                        progress=progress, t0=t0, total=len(runs))
    else:  # the free design first; the directions follow from it
        _run_directions(problem, ["none"], shared, out, summaries, n_workers=1,
                        progress=progress, t0=t0, total=1)
        found = _check_directions(list(then(out / "none")), problem.grid.dim)
        _run_directions(problem, found, shared, out, summaries,
                        n_workers=min(n_workers, len(found)), progress=progress, t0=t0,
                        total=1 + len(found))
        runs = ["none"] + found

    densities = {d: read_density(out / folder_name(d)) for d in runs}  # keys: run order
    rows = comparison_rows(runs, summaries, densities, problem)
    write_csv(out / "comparison.csv", rows, COLUMNS)
    plot_comparison(rows, densities, problem, out / "comparison.png")
    return rows


def _run_directions(problem, runs: list, shared: dict, out: Path, summaries: dict, *,
                    n_workers: int, progress: bool, t0: float, total: int) -> None:
    """Optimise ``problem`` along each of ``runs`` into ``out``; fill ``summaries``."""
    from topopt.problem import ProblemError
    from topopt.study import read_summary, run_cases, study_of

    # a study of build.direction (vectors as lists, as in a problem file), the shared
    # settings applied to every run as a study's [set]
    study = study_of(problem, {"build.direction": [d if isinstance(d, str) else list(d)
                                                   for d in runs]}, fixed=shared)
    run_of = {case.case_id: d for case, d in zip(study.cases, runs, strict=True)}
    invalid = next((c for c in study.cases if c.problem is None), None)
    if invalid is not None:
        raise ProblemError(f"{problem.path}: {invalid.error}")
    for case, folder, error, _ in run_cases(
        study.cases, lambda c: out / folder_name(run_of[c.case_id]), workers=n_workers,
        reuse=False,
    ):
        direction = run_of[case.case_id]
        if error:
            raise RuntimeError(f"compare: the run built along {_label(direction)} failed: {error}")
        summary = summaries[direction] = read_summary(folder)
        if progress:
            print(
                f"compare: {_label(direction):>4} done: compliance {summary['compliance']:.6g}, "
                f"{summary['iterations']} iterations, {summary['elapsed_s']:.1f} s "
                f"({len(summaries)}/{total}, {time.perf_counter() - t0:.0f} s so far)",
                file=sys.stderr,
                flush=True,
            )


def comparison_rows(runs, summaries: dict, densities: dict, problem) -> list[dict]:
    """Rows of ``comparison.csv`` from the runs' summaries (free design first)."""
    from filters.printability import unsupported_count
    from topopt.export import support_volume

    free = summaries["none"]["compliance"]
    angle = problem.build.overhang_angle
    offset = problem.build.plate_offset / problem.grid.element_size
    rows = []
    for d in runs:
        s = summaries[d]
        increase = 100.0 * (s["compliance"] - free) / free if free else math.nan
        rows.append(
            {
                "direction": _label(d),
                "compliance": s["compliance"],
                "compliance_increase_percent": 0.0 if d == "none" else increase,
                "volume_fraction": s["volume_fraction"],
                "unsupported_elements": s.get("unsupported_elements"),
                "unsupported_keep_in_elements": s.get("unsupported_keep_in_elements"),
                "overhang_area": s.get("overhang_area"),
                "grey_level": s["grey_level"],
                "elapsed_s": s["elapsed_s"],
                "iterations": s["iterations"],
                "converged": s["converged"],
                "free_design_unsupported_elements": None
                if d == "none"
                else unsupported_count(densities["none"], direction=d, overhang_angle=angle,
                                       plate_offset=offset),
                # supports by inspect's analysis, this design and the free one in this
                # direction: the support the constraint saves, measured
                "support_volume": s.get("support_volume"),
                "free_design_support_volume": None if d == "none"
                else support_volume(densities["none"], problem, d),
                "results": folder_name(d),
            }
        )
    return rows


def plot_comparison(rows: list[dict], densities: dict, problem, path: str | Path) -> None:
    """Draw the designs side by side, the build plate on each, and the compliance increase."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from topopt.export import CAUTION, atomic_write, draw_design_2d, draw_design_3d

    grid = problem.grid
    n = len(rows)
    cols = n if n <= 5 else math.ceil(n / 2)
    design_rows = math.ceil(n / cols)
    aspect = grid.shape[1] / grid.shape[0] if grid.dim == 2 else 0.9
    panel_w = 3.2
    panel_h = max(1.4, panel_w * aspect) + 0.6
    fig = plt.figure(figsize=(panel_w * cols, panel_h * design_rows + 2.8), dpi=110)
    spec = fig.add_gridspec(design_rows + 1, cols, height_ratios=[panel_h] * design_rows + [2.3])
    size = np.array(grid.shape) * grid.element_size
    for i, (row, d) in enumerate(zip(rows, densities, strict=True)):
        kind = {"projection": "3d"} if grid.dim == 3 else {}
        ax = fig.add_subplot(spec[i // cols, i % cols], **kind)
        if grid.dim == 2:
            draw_design_2d(ax, densities[d], grid.element_size)
            _draw_plate_2d(ax, d, size)
        else:
            draw_design_3d(ax, densities[d], grid.element_size)
            _draw_plate_3d(ax, d, size)
        d = row["direction"]  # the label: an axis name or a rounded vector
        if d == "none":
            title = f"free (no build direction)\ncompliance {row['compliance']:.4g}"
        else:
            title = (
                f"built along {d}: {row['compliance_increase_percent']:+.1f} %\n"
                f"unsupported {row['unsupported_elements']}"
                + (f" ({row['unsupported_keep_in_elements']} keep-in)"
                   if row["unsupported_keep_in_elements"] else "")
                + f" (free design: {row['free_design_unsupported_elements']})"
            )
        ax.set_title(title, fontsize=8)
        ax.tick_params(labelsize=6)
    bar_ax = fig.add_subplot(spec[design_rows, :])
    built = [r for r in rows if r["direction"] != "none"]
    labels = [r["direction"] for r in built]
    labels = [lab if len(lab) <= 8 else lab.replace(", ", ",\n") for lab in labels]
    values = [r["compliance_increase_percent"] for r in built]
    bars = bar_ax.bar(labels, values, color="#4a6fa5")
    bar_ax.bar_label(bars, fmt="%+.1f %%", fontsize=7)
    bar_ax.axhline(0.0, color="0.3", linewidth=0.8)
    bar_ax.set_ylabel("compliance increase\nvs free design (%)", fontsize=8)
    bar_ax.set_xlabel("build direction (self-supporting design)", fontsize=8)
    bar_ax.tick_params(labelsize=7)
    lo, hi = min(values + [0.0]), max(values + [0.0])
    pad = 0.15 * (hi - lo or 1.0)
    bar_ax.set_ylim(lo - pad, hi + pad)
    fig.suptitle(
        f"{problem.name}: free design and self-supporting designs "
        f"(overhang angle {problem.build.overhang_angle:g} deg; plate drawn in orange)",
        fontsize=9,
    )
    fig.text(0.01, 0.005, CAUTION, fontsize=5.5, color="0.35")
    fig.tight_layout(rect=(0, 0.02, 1, 0.97))
    atomic_write(path, lambda h: fig.savefig(h, format="png"))
    plt.close(fig)


def _draw_plate_2d(ax, direction, size) -> None:
    """Draw a thick orange bar along the side where the build plate lies.

    For a tilted direction: the plate's line through the corner and an arrow along the
    build direction.
    """
    if isinstance(direction, str) and direction == "none":
        return
    if not isinstance(direction, str):
        from filters.direction import unit_vector

        v = unit_vector(list(direction), 2)
        w, h = size
        corner = np.array([0.0 if v[0] >= 0 else w, 0.0 if v[1] >= 0 else h])
        tangent = np.array([-v[1], v[0]]) * 0.35 * max(w, h)
        ax.plot(*np.column_stack([corner - tangent, corner + tangent]), color="#d9822b", lw=4,
                clip_on=False)
        ax.annotate("", xy=corner + v * 0.3 * max(w, h), xytext=corner,
                    arrowprops={"arrowstyle": "->", "color": "#d9822b", "lw": 2})
        return
    axis = "xy".index(direction[1])
    at_low = direction[0] == "+"
    w, h = size
    thick = 0.04 * max(w, h)
    if axis == 1:
        y0 = -thick if at_low else h
        ax.add_patch(_plate_rectangle((0, y0), w, thick))
        ax.set_ylim(-thick * 1.2, h + thick * 1.2)
    else:
        x0 = -thick if at_low else w
        ax.add_patch(_plate_rectangle((x0, 0), thick, h))
        ax.set_xlim(-thick * 1.2, w + thick * 1.2)


def _plate_rectangle(xy, width, height):
    """Make an orange filled rectangle patch (the build plate)."""
    from matplotlib.patches import Rectangle

    return Rectangle(xy, width, height, color="#d9822b", clip_on=False)


def _draw_plate_3d(ax, direction, size) -> None:
    """Draw a translucent orange square on the plate face of the box.

    For a tilted direction: an arrow along it from the domain's lowest corner.
    """
    if isinstance(direction, str) and direction == "none":
        return
    if not isinstance(direction, str):
        from filters.direction import unit_vector

        v = unit_vector(list(direction), 3)
        corner = np.where(v >= 0, 0.0, np.asarray(size, dtype=float))
        tip = corner + v * 0.4 * float(max(size))
        ax.plot(*np.column_stack([corner, tip]), color="#d9822b", lw=3)
        return
    from mpl_toolkits.mplot3d.art3d import Poly3DCollection

    axis = "xyz".index(direction[1])
    level = 0.0 if direction[0] == "+" else size[axis]
    others = [a for a in range(3) if a != axis]
    corners = []
    for u, v in ((0, 0), (1, 0), (1, 1), (0, 1)):
        p = [0.0, 0.0, 0.0]
        p[axis] = level
        p[others[0]] = u * size[others[0]]
        p[others[1]] = v * size[others[1]]
        corners.append(p)
    # a faint fill with a strong edge: a plate on a face turned to the viewer (+y in the
    # default view) hid the design behind it at alpha 0.45
    ax.add_collection3d(Poly3DCollection([corners], facecolors=(0.85, 0.51, 0.17, 0.15),
                                         edgecolors=(0.85, 0.51, 0.17, 1.0), linewidths=2.0))
