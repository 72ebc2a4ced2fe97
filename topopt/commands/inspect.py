"""Print-preparation report of a design for each candidate build direction.

DESIGN is a results folder (its result.npz and problem.toml), a .npy / .npz density
array, or a closed STL surface voxelised at --element-size. For every direction the
report gives build height and layers, part volume and mass, the down-facing area that
needs support, support volume on the plate and on the part, support that a tool could
not reach, trapped powder, build time and material cost, and ranks the directions.

Results are a design aid; the time and cost estimates are first-order and must be
confirmed with the machine's own build preparation.
"""

from __future__ import annotations

import argparse
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # numpy is imported inside the functions: building the command line's
    import numpy as np  # parser (`buttress --help`) must not load it

HELP = "check a design for overhangs, supports, trapped powder, build time and cost"
ESTIMATES_NOTE = ("Build time and cost are first-order estimates: confirm them, and the supports, "
                  "with the machine's own build preparation.")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``buttress inspect``."""
    parser.add_argument("design", help="results folder, .npy/.npz density array or closed .stl")
    parser.add_argument("--out", required=True, help="folder for inspect.json/.csv/.png")
    parser.add_argument("--problem", default=None,
                        help="problem file giving element size, thickness, build and process "
                             "values (default: the results folder's problem.toml)")
    parser.add_argument("--directions", default=None, metavar="LIST",
                        help="candidate build directions, comma-separated: axis names or "
                             "vectors of numbers separated by spaces, e.g. "
                             "--directions '-z,+z,0 1 1' (default: all axis directions, "
                             "and the problem file's build direction when it is tilted)")
    parser.add_argument("--search", type=int, default=None, metavar="N",
                        help="search orientations: N directions spread evenly over the sphere "
                             "(the circle in 2D) plus the axis directions, analysed and ranked")
    parser.add_argument("--element-size", type=float, default=None, metavar="H",
                        help="voxel size for an array without a problem file, or for "
                             "voxelising an STL")
    parser.add_argument("--thickness", type=float, default=None,
                        help="out-of-plane thickness of a 2D design (default: problem or 1)")
    parser.add_argument("--units", default=None, metavar="SYSTEM",
                        help="unit system of a design without a problem file: mm-N-MPa-tonne "
                             "(default) or m-N-Pa-kg; sets the process defaults' lengths")
    parser.add_argument("--overhang-angle", type=float, default=None, metavar="DEG",
                        help="self-supporting angle from the plate (default: problem or 45)")
    parser.add_argument("--weights", default="time=1,cost=1,support=1",
                        help="weights of the ranking, e.g. time=1,cost=0,support=2")
    holes = parser.add_mutually_exclusive_group()
    holes.add_argument("--through-holes", dest="closed_holes", action="store_false", default=False,
                       help="2D designs: a plate extruded to its thickness, holes open on both "
                            "faces, no trapped powder (the default)")
    holes.add_argument("--closed-holes", dest="closed_holes", action="store_true", default=False,
                       help="2D designs: a section of a closed part, so a void closed in the "
                            "plane traps powder")
    parser.add_argument("--allow-unclean", action="store_true",
                        help="rank by score alone: a direction with unremovable support or "
                             "trapped powder may then be named best (it is still flagged)")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace an inspect report already in --out")


@dataclass(frozen=True)
class LoadedDesign:
    """A design read from disk with the settings that go with it."""

    density: np.ndarray
    element_size: float
    thickness: float
    overhang_angle: float
    process: dict
    mass_density: float | None  # as in the problem file (its mass unit per length unit cubed)
    source: str
    units: str | None = None
    kg_per_mass: float = 1.0  # the problem's mass unit in kg
    build_direction: object = None  # the problem's build direction, when it sets one

    @property
    def mass_density_kg(self) -> float | None:
        """Mass density in kg per length unit cubed (masses in kg, powder price per kg)."""
        return None if self.mass_density is None else self.mass_density * self.kg_per_mass


def parse_weights(text: str) -> dict[str, float]:
    """Parse ``"time=1,cost=0.5,support=2"`` into a dict.

    Examples
    --------
    >>> parse_weights("time=2, support=0")
    {'time': 2.0, 'support': 0.0}
    """
    weights: dict[str, float] = {}
    for item in filter(None, (part.strip() for part in str(text).split(","))):
        key, sep, value = item.partition("=")
        key = key.strip()
        if not sep or key not in ("time", "cost", "support"):
            raise ValueError(
                f"--weights: expected items like time=1,cost=1,support=1, got {item!r}"
            )
        try:
            number = float(value)
        except ValueError:
            raise ValueError(f"--weights: {key} must be a number, got {value.strip()!r}") from None
        if not math.isfinite(number) or number < 0:
            raise ValueError(f"--weights: {key} must be a finite number >= 0, got {number}")
        weights[key] = number
    if not weights or sum(weights.values()) <= 0:
        raise ValueError("--weights: at least one weight must be positive")
    return weights


def refine_directions(vector, radius_deg: float, count: int, ndim: int) -> list:
    """``count`` unit vectors spread over the cap of ``radius_deg`` around ``vector``.

    Examples
    --------
    >>> v = refine_directions([0.0, 0.0, 1.0], 10.0, 20, 3)
    >>> len(v), bool(min(p[2] for p in v) >= math.cos(math.radians(10.0)) - 1e-12)
    (20, True)
    """
    import numpy as np

    from filters.direction import lateral_frame, unit_vector

    d = unit_vector(list(vector), ndim)
    r = math.radians(radius_deg)
    if ndim == 2:
        out = []
        for t in np.linspace(-r, r, count):
            c, s = math.cos(t), math.sin(t)
            out.append([c * d[0] - s * d[1], s * d[0] + c * d[1]])
        return out
    e1, e2 = lateral_frame(d)
    out = []
    for k in range(count):
        # equal-area spiral over the cap (golden angle around the axis)
        cos_t = 1.0 - (k + 0.5) / count * (1.0 - math.cos(r))
        sin_t = math.sqrt(max(0.0, 1.0 - cos_t * cos_t))
        phi = k * math.pi * (3.0 - math.sqrt(5.0))
        v = cos_t * d + sin_t * (math.cos(phi) * e1 + math.sin(phi) * e2)
        out.append([float(c) for c in v])
    return out


def flat_face_directions(density: np.ndarray, candidates: list, count: int = 3) -> list:
    """Build directions that lay the part's largest flat faces on the plate.

    Surface normals come from the gradient of the Gaussian-smoothed voxels (width one
    voxel). For each candidate direction ``v`` the surface whose outward normal lies
    within 10 degrees of ``-v`` is summed; the ``count`` largest such groups give the
    directions opposite their mean normal (re-centred within 5, 3 and 2 degrees). A flat
    face is the usual best seat on the plate (common practice), and such a minimum is too
    sharp for an even spread of directions to find: a face tilted by the spread's spacing
    already needs a wedge of support under it.
    """
    import numpy as np
    from scipy import ndimage

    from filters.direction import unit_vector

    solid = np.asarray(density) > 0.5
    ndim = solid.ndim
    smooth = ndimage.gaussian_filter(solid.astype(float), 1.0, mode="constant")
    grads = np.stack(np.gradient(smooth), axis=-1)
    weight = np.linalg.norm(grads, axis=-1)
    mask = weight > 0.05
    if not mask.any():
        return []
    normals = -grads[mask] / weight[mask][:, None]  # outward
    w = weight[mask]
    cos10 = math.cos(math.radians(10.0))
    scored = []
    for c in candidates:
        v = unit_vector(c, ndim)
        near = normals @ (-v) > cos10
        if near.any():
            scored.append((float(w[near].sum()), near))
    out = []
    for _, near in sorted(scored, key=lambda t: -t[0]):
        mean = (normals[near] * w[near][:, None]).sum(axis=0)
        # re-centre on the face: mean normal within narrower and narrower cones
        for width in (5.0, 3.0, 2.0):
            axis = mean / np.linalg.norm(mean)
            near = normals @ axis > math.cos(math.radians(width))
            if not near.any():
                break
            mean = (normals[near] * w[near][:, None]).sum(axis=0)
        v = -mean / np.linalg.norm(mean)
        if all(float(v @ np.asarray(o)) < math.cos(math.radians(3.0)) for o in out):
            out.append([float(c) for c in v])
        if len(out) >= count:
            break
    return out


def orientation_search(density: np.ndarray, count: int, settings: dict) -> tuple[list, list]:
    """Directions and reports of an orientation search.

    The axes, ``count`` directions spread evenly, the directions that seat the largest
    flat faces on the plate, then finer and finer caps around the best.
    """
    from filters.direction import direction_label
    from topopt.build import analyze_design

    ndim = density.ndim
    coarse = search_directions(count, ndim)
    coarse += flat_face_directions(density, coarse)
    print(f"searching {len(coarse)} build directions ...", flush=True)
    quick = {**settings, "keep_masks": False}
    reports, _, _ = analyze_design(density, directions=coarse, **quick)
    spacing = 360.0 / count if ndim == 2 else math.degrees(math.sqrt(4.0 * math.pi / count))
    seen = {direction_label(v, ndim) for v in coarse}
    out = list(coarse)
    # finer and finer caps: around the three best, then twice around the best
    for radius, best_of in ((spacing, 3), (spacing / 4.0, 1), (spacing / 16.0, 1)):
        fine: list = []
        # clean directions first (as the ranking does), then by score
        unclean = not settings.get("allow_unclean", False)
        for r in sorted(reports, key=lambda r: (unclean and bool(r.flag), r.score))[:best_of]:
            fine += refine_directions(list(r.vector), radius, 24 if ndim == 3 else 9, ndim)
        fresh = []
        for v in fine:
            label = direction_label(v, ndim)
            if label not in seen:
                seen.add(label)
                fresh.append(v)
        if fresh:
            more, _, _ = analyze_design(density, directions=fresh, **quick)
            reports += more
            out += fresh
    print(f"... and {len(out) - len(coarse)} more around the best", flush=True)
    return out, reports


def search_directions(count: int, ndim: int) -> list:
    """The axis directions and ``count`` unit vectors spread over the sphere (circle).

    Examples
    --------
    >>> len(search_directions(10, 3))
    16
    """
    from filters.direction import axis_directions, direction_label, spread_directions

    if not 1 <= count <= 5000:
        raise ValueError(f"--search: expected 1 to 5000 directions, got {count}")
    out: list = list(axis_directions(ndim))
    seen = set(out)
    for v in spread_directions(count, ndim):
        label = direction_label(v.tolist(), ndim)
        if label not in seen:
            seen.add(label)
            out.append([float(c) for c in v])
    return out


def _load_array(path: Path) -> np.ndarray:
    """The density array of a .npy / .npz file (headers checked before reading)."""
    import numpy as np

    from topopt.results import read_arrays

    arrays = read_arrays(path)
    if len(arrays) == 1:
        array = next(iter(arrays.values()))
    elif "density" in arrays:
        array = arrays["density"]
    else:
        raise ValueError(f"{path}: holds several arrays ({', '.join(arrays)}) and none "
                         "named 'density'")
    if array.ndim not in (2, 3):
        raise ValueError(f"{path}: the density must be a 2D or 3D array, got shape {array.shape}")
    if min(array.shape) < 2:
        raise ValueError(f"{path}: the density needs at least 2 elements along each axis, got "
                         f"shape {array.shape}")
    if array.dtype != bool and not np.issubdtype(array.dtype, np.number):
        raise ValueError(f"{path}: the density must hold numbers, got dtype {array.dtype}")
    if not np.all(np.isfinite(array)):
        raise ValueError(f"{path}: the density holds NaN or infinite values")
    return array


def load_design(args: argparse.Namespace) -> LoadedDesign:
    """Read DESIGN (and the problem file) as data; raise ValueError with one line."""
    from topopt.build import PROCESS_DEFAULTS
    from topopt.problem import load_problem
    from topopt.surface import open_edges, read_stl, voxelize

    path = Path(args.design)
    problem_path = Path(args.problem) if args.problem else None
    if path.is_dir():
        if not (path / "result.npz").is_file():
            raise ValueError(f"{path}: not a results folder (no result.npz)")
        density = _load_array(path / "result.npz")  # the density of a folder, or its one array
        if problem_path is None and (path / "problem.toml").is_file():
            problem_path = path / "problem.toml"
    elif not path.exists():
        raise ValueError(f"{path}: no such file or folder")
    elif path.suffix.lower() in (".npy", ".npz"):
        density = _load_array(path)
    elif path.suffix.lower() == ".stl":
        if args.element_size is None:
            raise ValueError("--element-size is needed to voxelise an STL surface")
        vertices, faces = read_stl(path)
        _check_voxel_count(path, vertices, _positive(args.element_size, "--element-size"))
        if open_edges(faces):
            raise ValueError(f"{path}: the surface is not closed ({open_edges(faces)} edges do "
                             "not belong to exactly two triangles)")
        density = voxelize(vertices, faces, element_size=_positive(args.element_size,
                                                                    "--element-size"))
        if not density.any():
            raise ValueError(f"{path}: no voxel centre lies inside the surface at element size "
                             f"{args.element_size}; use a smaller --element-size")
    else:
        raise ValueError(f"{path}: expected a results folder, a .npy/.npz array or an .stl file")

    _check_analysis_memory(density.size, f"{path}: a design of shape {density.shape}")
    problem = load_problem(problem_path) if problem_path is not None else None
    if problem is not None and path.suffix.lower() != ".stl":
        if tuple(problem.grid.shape) != tuple(density.shape):
            raise ValueError(f"{path}: density shape {density.shape} does not match the problem "
                             f"grid {tuple(problem.grid.shape)}")
    if args.element_size is not None:
        element_size = _positive(args.element_size, "--element-size")
    elif problem is not None:
        element_size = problem.grid.element_size
    else:
        raise ValueError("--element-size (or --problem) is needed to give the voxel size")
    if args.thickness is not None:
        thickness = _positive(args.thickness, "--thickness")
    else:
        thickness = problem.grid.thickness if problem is not None else 1.0
    if args.overhang_angle is not None:
        angle = float(args.overhang_angle)
    else:
        angle = problem.build.overhang_angle if problem is not None else 45.0
    from topopt.problem import UNIT_SYSTEMS, ProcessSettings

    units = getattr(args, "units", None)
    if units is not None and units not in UNIT_SYSTEMS:
        raise ValueError(f"--units: expected one of {', '.join(UNIT_SYSTEMS)}, got {units!r}")
    if problem is not None:
        if units is not None and units != problem.units.name:
            raise ValueError(f"--units {units} disagrees with the problem file's units "
                             f"{problem.units.name!r}; leave --units out")
        process = {k: float(getattr(problem.process, k)) for k in PROCESS_DEFAULTS}
        mass_density = problem.material.mass_density
        units = problem.units.name
    else:
        defaults = ProcessSettings.defaults_for(units) if units else ProcessSettings()
        process = {k: float(getattr(defaults, k)) for k in PROCESS_DEFAULTS}
        mass_density = None
    build_direction = None
    if problem is not None and problem.build.active and path.suffix.lower() != ".stl":
        build_direction = problem.build.direction
    return LoadedDesign(density=density, element_size=element_size, thickness=thickness,
                        overhang_angle=angle, process=process, mass_density=mass_density,
                        source=str(path), units=units,
                        kg_per_mass=1.0 if problem is None else problem.units.kg_per_mass,
                        build_direction=build_direction)


#: Bytes the print-preparation analysis holds per voxel, a lower estimate: measured as
#: 50 (two directions) and 78 (six directions) from the peak resident memory of
#: ``buttress inspect`` on a 120^3 minus a 60^3 cube design (Linux, numpy 2).
ANALYSIS_BYTES_PER_VOXEL = 48


def _check_analysis_memory(voxels: int, what: str) -> None:
    from topopt.memory import ENV, memory_cap

    need = voxels * ANALYSIS_BYTES_PER_VOXEL
    cap = memory_cap()
    if need > cap:
        where = "the --max-memory cap" if os.environ.get(ENV) else "this machine's memory"
        raise ValueError(f"{what} needs at least {need / 2**30:.3g} GiB to analyse, more than "
                         f"{where} ({cap / 2**30:.3g} GiB)")


def _check_voxel_count(path: Path, vertices: np.ndarray, element_size: float) -> None:
    """Refuse before voxelising when the grid would be too large (counted exactly)."""
    import numpy as np

    with np.errstate(over="ignore", invalid="ignore"):
        cells = (vertices.max(axis=0) - vertices.min(axis=0)) / element_size
    if not np.all(np.isfinite(cells)) or cells.max() > 1e12:
        raise ValueError(f"--element-size {element_size}: {path} spans "
                         f"{vertices.max(axis=0) - vertices.min(axis=0)}, too many voxels")
    count = math.prod(max(1, math.ceil(c - 1e-9)) for c in cells.tolist())
    _check_analysis_memory(count, f"--element-size {element_size}: voxelising {path} gives "
                                  f"{count} voxels, which")


def _positive(value: float, name: str) -> float:
    value = float(value)
    if not (math.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a positive number, got {value}")
    return value


def run(args: argparse.Namespace) -> int:
    """Run ``buttress inspect``."""
    from filters.direction import parse_directions
    from filters.printability import enforced_overhang_angle
    from topopt.build import REPORT_FIELDS, analyze_design
    from topopt.export import CAUTION  # the one caution text

    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise ValueError(f"{out}: exists and is not a folder")
    if (out / "inspect.json").exists() and not args.overwrite:
        raise ValueError(
            f"{out}: holds an inspect report already; use --overwrite or another --out"
        )
    weights = parse_weights(args.weights)
    design = load_design(args)
    directions = parse_directions(args.directions, design.density.ndim)
    if directions is None and args.search is None and design.build_direction is not None:
        from filters.direction import axis_directions, direction_label

        axes = list(axis_directions(design.density.ndim))
        if direction_label(design.build_direction, design.density.ndim) not in axes:
            # a design optimised for a tilted direction: analyse that one beside the axes
            directions = axes + [list(design.build_direction)]
    settings = {"element_size": design.element_size, "overhang_angle": design.overhang_angle,
                "thickness": design.thickness, "process": design.process,
                # masses in kg, the powder price per kg
                "mass_density": design.mass_density_kg, "weights": weights, "keep_masks": True,
                "through_holes": not args.closed_holes,
                "allow_unclean": bool(args.allow_unclean)}
    if args.search is not None:
        if directions is not None:
            raise ValueError("--search and --directions exclude each other")
        from topopt.build import rank_directions

        _, found = orientation_search(design.density, int(args.search), settings)
        reports, best = rank_directions(found, weights=weights,
                                        allow_unclean=bool(args.allow_unclean))
        # voxel masks (for the pictures) of the three best-ranked only
        order = sorted(range(len(reports)), key=lambda i: reports[i].rank)[:3]
        shown, _, shown_masks = analyze_design(
            design.density, directions=[list(reports[i].vector) for i in order], **settings)
        masks = [None] * len(reports)
        for i, m in zip(order, shown_masks, strict=True):
            masks[i] = m
    else:
        reports, best, masks = analyze_design(design.density, directions=directions, **settings)
    rows = [r.as_dict() for r in reports]
    report = {
        "directions": rows,
        "best": best,
        "process": {**design.process, "mass_density": design.mass_density,
                    "units": design.units, "mass_unit": "kg", "powder_price_per": "kg",
                    "overhang_angle": design.overhang_angle,
                    "enforced_overhang_angle": min(
                        enforced_overhang_angle(design.overhang_angle, r.vector,
                                                design.density.ndim) for r in reports)},
        "through_holes": (not args.closed_holes) and design.density.ndim == 2,
        "weights": weights,
        "allow_unclean": bool(args.allow_unclean),
        "design": {"source": design.source, "shape": list(design.density.shape),
                   "element_size": design.element_size,
                   "thickness": design.thickness if design.density.ndim == 2 else None},
        "caution": CAUTION,
    }
    # every figure is computed before anything is written
    from topopt.export import write_csv, write_json

    out.mkdir(parents=True, exist_ok=True)
    write_csv(out / "inspect.csv", rows, list(REPORT_FIELDS))
    write_inspect_png(out / "inspect.png", reports, masks, best=best,
                      element_size=design.element_size, length_unit=_length_unit(design))
    if design.density.ndim == 3:  # the print itself, shaded: best-ranked directions
        _write_print_views(out / "inspect-3d.png", design, reports)
    write_json(out / "inspect.json", report)  # last: its presence marks a finished report
    _print_table(reports if len(reports) <= 12 else _shortlist(reports, best), best,
                 design.mass_density is None)
    print(f"report: {out}/inspect.json, table: {out}/inspect.csv, picture: {out}/inspect.png"
          + (f", 3D views: {out}/inspect-3d.png" if design.density.ndim == 3 else ""))
    return 0


def _length_unit(design: LoadedDesign) -> str:
    """The design's length unit ("" when no unit system is known)."""
    from topopt.problem import UNIT_SYSTEMS

    return UNIT_SYSTEMS[design.units].length if design.units else ""


def _write_print_views(path: Path, design: LoadedDesign, reports) -> None:
    """inspect-3d.png: the three best-ranked directions seen from the side and from below."""
    from topopt.export import CAUTION  # the one caution text
    from topopt.render import write_print_views

    top = sorted(reports, key=lambda r: r.rank)[:3]
    unit = _length_unit(design)
    write_print_views(
        path, design.density, directions=[r.vector or r.direction for r in top],
        titles=[f"{r.rank}. {r.direction}" + (f" ({r.flag})" if r.flag else "") for r in top],
        element_size=design.element_size, overhang_angle=design.overhang_angle,
        length_unit=unit, caution=CAUTION)


def _shortlist(reports, best: str, count: int = 10) -> list:
    """The best-ranked reports (for a long orientation search), best first."""
    ordered = sorted(reports, key=lambda r: r.rank)
    return ordered[:count]


def _cell(value: float, width: int) -> str:
    """A number for the printed table, blank when it is not estimated (NaN)."""
    return " " * width if not math.isfinite(value) else f"{value:{width}.4g}"


def _print_table(reports, best: str, no_mass: bool) -> None:
    from topopt.export import CAUTION  # the one caution text
    print(f"{'direction':>24} {'height':>8} {'layers':>6} {'overhang':>9} {'support':>9} "
          f"{'unremov.':>9} {'trapped':>9} {'time_h':>7} {'cost':>9} {'score':>6} {'rank':>4}")
    for r in reports:
        print(f"{r.direction:>24} {r.build_height:8.4g} {r.layers:6d} {r.overhang_area:9.4g} "
              f"{r.support_volume:9.4g} {r.unremovable_support_volume:9.4g} "
              f"{r.trapped_powder_volume:9.4g} {r.build_time_h:7.3g} {_cell(r.material_cost, 9)} "
              f"{r.score:6.3f} {r.rank:4d}{'  (' + r.flag + ')' if r.flag else ''}")
    if no_mass:
        print("no mass density given ([material] mass_density): mass and cost not estimated")
    for r in reports:
        if r.trapped_cavities:
            print(f"warning: {r.direction}: {r.trapped_cavities} closed cavities trap "
                  f"{r.trapped_powder_volume:.4g} of powder")
        if r.unremovable_support_volume > 0:
            print(f"warning: {r.direction}: {r.unremovable_support_volume:.4g} of support "
                  "lies where a tool cannot reach it")
    print(f"best build direction: {best}")
    chosen = next(r for r in reports if r.direction == best)
    if chosen.flag:
        print(f"warning: no direction can be cleaned completely; {best} has {chosen.flag}"
              if not any(not r.flag for r in reports) else
              f"warning: {best} has {chosen.flag} and is named best only because "
              "--allow-unclean was given")
    elif any(r.flag and r.score < chosen.score for r in reports):
        print("note: directions with a lower score are ranked after it because of unremovable "
              "support or trapped powder (--allow-unclean ranks by score alone)")
    print(ESTIMATES_NOTE)
    print(CAUTION)


# ----------------------------------------------------------------------- picture
_COLOURS = {
    "void": (1.0, 1.0, 1.0),
    "solid": (0.62, 0.64, 0.68),
    "support": (0.55, 0.75, 0.95),
    "unremovable": (0.95, 0.6, 0.2),
    "trapped": (0.6, 0.4, 0.8),
    "overhang": (0.85, 0.1, 0.1),
}


def _panel_image(masks, direction: str) -> np.ndarray:
    """RGB image in the build frame (rows = layers from the plate, columns = across)."""
    import numpy as np

    from topopt.build import first_occupied_layer, to_build_frame

    # the analysis places the part on the plate; so does the picture
    lowest = first_occupied_layer(to_build_frame(masks.solid, direction))

    def frame(a: np.ndarray) -> np.ndarray:
        b = to_build_frame(a, direction)[lowest:]
        # a 3D design is seen from the side: project along the last axis
        return b.any(axis=-1) if b.ndim == 3 else b

    solid = frame(masks.solid)
    support = frame(masks.support)
    unremovable = frame(masks.support & ~masks.accessible)
    trapped = frame(masks.trapped)
    overhang = frame(masks.needs_support)
    image = np.ones(solid.shape + (3,))
    for name, mask in (("trapped", trapped), ("support", support),
                       ("unremovable", unremovable), ("solid", solid),
                       ("overhang", overhang)):
        image[mask] = _COLOURS[name]
    if masks.solid.ndim == 3:
        # seen through: supports behind or in front of the part show as a tint
        behind = solid & support & ~overhang
        tint = np.where(unremovable[..., None], _COLOURS["unremovable"], _COLOURS["support"])
        image[behind] = 0.5 * np.asarray(_COLOURS["solid"]) + 0.5 * tint[behind]
    return image


def _tilted_panel_image(masks) -> np.ndarray:
    """RGB image of a tilted build in the design's own frame (3D: seen along z)."""
    import numpy as np


    def flat(a: np.ndarray) -> np.ndarray:
        b = a.any(axis=-1) if a.ndim == 3 else a
        return b.T  # rows = y, columns = x

    solid = flat(masks.solid)
    image = np.ones(solid.shape + (3,))
    for name, mask in (("trapped", flat(masks.trapped)), ("support", flat(masks.support)),
                       ("unremovable", flat(masks.support & ~masks.accessible)),
                       ("solid", solid), ("overhang", flat(masks.needs_support))):
        image[mask] = _COLOURS[name]
    return image


def _draw_panel(ax, r, m, element_size: float, best: str) -> None:
    from topopt.build import axis_name, parse_direction

    ndim = m.solid.ndim
    name = axis_name(list(r.vector), ndim)
    mark = "  [best]" if r.direction == best else ""
    if name is not None:
        image = _panel_image(m, name)
        axis, _ = parse_direction(name, ndim)
        across = [a for a in range(ndim) if a != axis][0]
        ax.imshow(image, origin="lower", interpolation="nearest",
                  extent=(0, image.shape[1] * element_size, 0, image.shape[0] * element_size))
        ax.axhline(0, color="k", lw=3)
        ax.set_xlabel("xyz"[across] + (" (seen from the side)" if ndim == 3 else ""), fontsize=7)
        ax.set_ylabel(f"build {name} (plate at the bottom)", fontsize=7)
    else:
        image = _tilted_panel_image(m)
        ax.imshow(image, origin="lower", interpolation="nearest",
                  extent=(0, image.shape[1] * element_size, 0, image.shape[0] * element_size))
        cx, cy = image.shape[1] * element_size / 2, image.shape[0] * element_size / 2
        length = 0.3 * min(cx, cy)
        ax.annotate("", xy=(cx + length * r.vector[0], cy + length * r.vector[1]), xytext=(cx, cy),
                    arrowprops={"arrowstyle": "->", "color": "k", "lw": 2})
        ax.set_xlabel("x" + (" (seen along z)" if ndim == 3 else ""), fontsize=7)
        ax.set_ylabel("y; arrow: build direction", fontsize=7)
    ax.tick_params(labelsize=6)
    ax.set_title(f"{r.direction}{mark}\nsupport {r.support_volume:.3g}, {r.build_time_h:.3g} h",
                 fontsize=8)


def _draw_map(ax, reports, best: str) -> None:
    """Every searched direction at a glance: support volume (colour), build time (size)."""
    import numpy as np

    ndim = len(reports[0].vector)
    v = np.array([r.vector for r in reports])
    support = np.array([r.support_volume for r in reports])
    time_h = np.array([r.build_time_h for r in reports])
    size = 15 + 60 * (time_h - time_h.min()) / max(np.ptp(time_h), 1e-12)
    if ndim == 3:
        azimuth = np.degrees(np.arctan2(v[:, 1], v[:, 0]))
        elevation = np.degrees(np.arcsin(np.clip(v[:, 2], -1, 1)))
        sc = ax.scatter(azimuth, elevation, c=support, s=size, cmap="viridis_r")
        ax.set_xlabel("azimuth of the build direction (deg, from +x towards +y)", fontsize=7)
        ax.set_ylabel("elevation (deg, +90 = +z)", fontsize=7)
        ax.set_xlim(-180, 180)
        ax.set_ylim(-90, 90)
        pick = [i for i, r in enumerate(reports) if r.direction == best]
        ax.scatter(azimuth[pick], elevation[pick], marker="*", s=250, facecolor="none",
                   edgecolor="red", linewidths=1.5)
    else:
        angle = np.degrees(np.arctan2(v[:, 1], v[:, 0]))
        sc = ax.scatter(angle, support, c=support, s=size, cmap="viridis_r")
        ax.set_xlabel("build direction angle (deg, from +x towards +y)", fontsize=7)
        ax.set_ylabel("support volume", fontsize=7)
        pick = [i for i, r in enumerate(reports) if r.direction == best]
        ax.scatter(angle[pick], support[pick], marker="*", s=250, facecolor="none",
                   edgecolor="red", linewidths=1.5)
    ax.figure.colorbar(sc, ax=ax, label="support volume", shrink=0.8)
    ax.set_title(f"{len(reports)} build directions: colour = support volume, "
                 "size = build time, star = best", fontsize=8)
    ax.tick_params(labelsize=6)


def write_inspect_png(path, reports, masks, *, best: str, element_size: float,
                      length_unit: str = "") -> None:
    """Panels per direction (build direction up, plate at the bottom) and bar charts.

    For an orientation search: a map of every direction beside the best ones' panels.
    """
    import matplotlib
    import numpy as np

    from topopt.export import CAUTION  # the one caution text

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.patches import Patch

    from topopt.export import atomic_write

    many = len(reports) > 9
    if many:
        order = sorted(range(len(reports)), key=lambda i: reports[i].rank)[:3]
        shown = [(reports[i], masks[i]) for i in order]
    else:
        shown = list(zip(reports, masks, strict=True))
    n = len(shown)
    cols = min(n, 3)
    rows = math.ceil(n / cols)
    fig = plt.figure(figsize=(3.6 * cols + (1.5 if many else 0), 3.1 * rows + 3.0), dpi=110)
    grid = fig.add_gridspec(rows + 1, cols, height_ratios=[3.0] * rows + [2.6])
    unit = f" [{length_unit}]" if length_unit else ""
    for k, (r, m) in enumerate(shown):
        ax = fig.add_subplot(grid[k // cols, k % cols])
        _draw_panel(ax, r, m, element_size, best)
        ax.set_xlabel(ax.get_xlabel() + unit, fontsize=7)  # axes in the length unit
        ax.set_ylabel(ax.get_ylabel() + unit, fontsize=7)
    legend = [Patch(color=_COLOURS[k], label=label) for k, label in (
        ("solid", "part"), ("overhang", "surface needing support"), ("support", "support"),
        ("unremovable", "support out of tool reach"), ("trapped", "trapped powder"))]
    fig.legend(handles=legend, loc="upper center", ncol=5, fontsize=7, frameon=False)
    if many:
        _draw_map(fig.add_subplot(grid[rows, :]), reports, best)
    else:
        names = [r.direction for r in reports]
        volume = f" ({length_unit}³)" if length_unit else ""
        bars = (("support volume" + volume, [r.support_volume for r in reports]),
                ("build time (h)", [r.build_time_h for r in reports]),
                ("material cost (currency)", [r.material_cost for r in reports]))
        sub = grid[rows, :].subgridspec(1, 3, wspace=0.35)
        for k, (label, values) in enumerate(bars):
            ax = fig.add_subplot(sub[0, k])
            values = [0.0 if not np.isfinite(v) else v for v in values]
            colours = ["tab:green" if d == best else "tab:gray" for d in names]
            ax.bar(names, values, color=colours)
            ax.set_title(label + (" (no mass density)" if k == 2 and not any(values) else ""),
                         fontsize=8)
            ax.tick_params(labelsize=6, labelrotation=30)
    fig.text(0.01, 0.005, CAUTION, fontsize=6, color="0.35")
    fig.tight_layout(rect=(0, 0.02, 1, 0.96))
    atomic_write(path, lambda h: fig.savefig(h, format="png"))
    plt.close(fig)
