"""Writers for the results folder: summary, arrays, history, picture, VTU.

Every file is written atomically (to a temporary name in the same folder, then
renamed), and :mod:`topopt.results` writes the whole folder into a temporary sibling
that is swapped in as one unit, so an interrupted run never leaves a half-written or
half-replaced result.
"""

from __future__ import annotations

import csv
import io
import json
import os
from collections.abc import Callable, Iterable
from pathlib import Path

import numpy as np

from topopt.files import atomic_write  # noqa: F401 - re-exported: writers import it from here

CAUTION = (
    "Results are a design aid: verify the final part with a full analysis and physical "
    "tests, and defer to applicable codes, standards and licensed engineering practice."
)


def write_text(path: str | Path, text: str) -> None:
    """Write UTF-8 text atomically."""
    atomic_write(path, lambda h: h.write(text.encode("utf-8")))


def write_json(path: str | Path, data: dict) -> None:
    """Write JSON atomically (NaN written as null)."""
    write_text(path, json.dumps(_jsonable(data), indent=2) + "\n")


def _jsonable(value):
    if isinstance(value, dict):
        return {k: _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, (np.floating, float)):
        return None if not np.isfinite(value) else float(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def write_csv(path: str | Path, rows: Iterable[dict], columns: list[str]) -> None:
    """Write rows (dicts) as CSV with the given columns, atomically.

    A missing value (None, or a NaN number: not estimated) is an empty cell.
    """
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=columns, extrasaction="ignore", lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: ("" if _missing(row.get(k)) else row.get(k)) for k in columns})
    write_text(path, buf.getvalue())


def _missing(value) -> bool:
    return value is None or (isinstance(value, (float, np.floating)) and not np.isfinite(value))


def write_npz(path: str | Path, **arrays: np.ndarray) -> None:
    """Write arrays to an uncompressed .npz atomically (no pickled objects)."""
    atomic_write(path, lambda h: np.savez(h, **{k: np.asarray(v) for k, v in arrays.items()}))


def structural_summary_of(density: np.ndarray, problem) -> dict:
    """Per load case displacements at the loads and von Mises stresses, and the mass.

    See :mod:`topopt.stress` for which stress is reported (solid-material stress of
    elements with density >= 0.5, at their centres).
    """
    from topopt.stress import structural_results, structural_summary

    return structural_summary(structural_results(problem, density))


def length_scale_summary(density: np.ndarray, problem) -> dict:
    """``min_member_size`` and ``min_gap_size`` of a physical density (0.5 level).

    Measured by the opening test of :func:`topopt.lengthscale.minimum_member_size`, with
    the design mirrored across the domain edges; null when a phase is absent.
    """
    from topopt.lengthscale import minimum_member_size

    sizes = minimum_member_size(density, element_size=problem.grid.element_size)
    return {"min_member_size": sizes["solid"], "min_gap_size": sizes["void"]}


def printability_summary(density: np.ndarray, problem, result=None) -> dict:
    """Printability and support figures of a physical density (0.5 level).

    ``unsupported_elements`` counts solid elements the exact printability rule does not
    hold; ``unsupported_keep_in_elements`` those of them in keep-in (passive solid)
    regions; ``unholdable_keep_in_elements`` the keep-in elements no design in the
    domain could hold up (reported by the run, see :func:`topopt.driver.unholdable_keep_in`).
    ``support_volume`` is the support volume the print-preparation analysis
    (:mod:`topopt.build`, as ``inspect``) finds for the design in its build direction.
    ``enforced_overhang_angle`` is the shallowest overhang the grid rule accepts around
    the build direction and ``steepest_overhang_angle`` the steepest it demands.
    All are null when there is no build direction.
    """
    keys = ("unsupported_elements", "unsupported_keep_in_elements", "unholdable_keep_in_elements",
            "overhang_area", "enforced_overhang_angle", "steepest_overhang_angle",
            "build_vector", "support_volume")
    b = problem.build
    if not b.active:
        return dict.fromkeys(keys)
    from filters.direction import unit_vector
    from filters.printability import overhang_area, support_stencil, supported_mask

    grid = problem.grid
    angle = b.overhang_angle
    offset = b.plate_offset / grid.element_size
    solid = np.asarray(density) > 0.5
    unsupported = solid & ~supported_mask(solid, direction=b.direction, overhang_angle=angle,
                                          plate_offset=offset)
    stencil = support_stencil(b.direction, angle, grid.dim)
    return {
        "unsupported_elements": int(unsupported.sum()),
        "unsupported_keep_in_elements": int((unsupported & problem.passive_solid).sum()),
        "unholdable_keep_in_elements": None if result is None
        else int(getattr(result, "unholdable_keep_in", 0)),
        "overhang_area": overhang_area(density, direction=b.direction, overhang_angle=angle,
                                       element_size=grid.element_size,
                                       thickness=grid.thickness if grid.dim == 2 else 1.0,
                                       plate_offset=offset),
        "enforced_overhang_angle": stencil.enforced_angle,
        "steepest_overhang_angle": stencil.steepest_angle,
        "build_vector": [float(v) for v in unit_vector(b.direction, grid.dim)],
        "support_volume": support_volume(density, problem, b.direction),
    }


def support_volume(density: np.ndarray, problem, direction) -> float | None:
    """Support volume ``inspect``'s analysis finds for a design built along ``direction``."""
    from topopt.build import analyze_design

    solid = np.asarray(density) > 0.5
    if not solid.any():
        return None
    grid = problem.grid
    process = {k: getattr(problem.process, k) for k in problem.process.__dataclass_fields__}
    reports, _, _ = analyze_design(
        solid, element_size=grid.element_size, directions=[direction],
        overhang_angle=problem.build.overhang_angle,
        thickness=grid.thickness if grid.dim == 2 else 1.0, process=process)
    return float(reports[0].support_volume)


def history_columns(history: Iterable[dict]) -> list[str]:
    """Column names of a history, in first-seen order."""
    columns: list[str] = []
    for row in history:
        for k in row:
            if k not in columns:
                columns.append(k)
    return columns


def write_png(path: str | Path, density: np.ndarray, problem) -> None:
    """Picture of the design: an image in 2D, a rendered 0.5 surface in 3D."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    grid = problem.grid
    unit = problem.units.length
    fig = plt.figure(figsize=(7, 4.6) if grid.dim == 2 else (10, 4.8), dpi=120)
    if grid.dim == 2:
        ax = fig.add_subplot(111)
        image = draw_design_2d(ax, density, grid.element_size, length_unit=unit)
        fig.colorbar(image, ax=ax, shrink=0.8, label="physical density (-)")
    else:
        from topopt.render import draw_print_3d, legend_handles

        build = problem.build
        keep_out = problem.passive_void if problem.passive_void.any() else None
        # from above and from below: faces needing support face down
        for k, view in enumerate(("iso", "below")):
            ax = fig.add_subplot(1, 2, k + 1, projection="3d")
            draw_print_3d(ax, density, element_size=grid.element_size,
                          direction=build.direction, overhang_angle=build.overhang_angle,
                          plate_offset=build.plate_offset, keep_out=keep_out,
                          length_unit=unit, view=view)
            ax.set_title("from above" if view == "iso" else "from below", fontsize=8, y=1.06)
        fig.legend(handles=legend_handles(direction=build.direction,
                                          keep_out=keep_out is not None),
                   loc="upper right", fontsize=7)
    name = problem.name if len(problem.name) <= 80 else problem.name[:77] + "..."
    fig.suptitle(f"{name}  (build direction {_direction_text(problem.build.direction)}"
                 f" points up)" if problem.build.active
                 else f"{name}  (free: no build direction)", fontsize=9)
    fig.text(0.01, 0.01, CAUTION, fontsize=5.5, wrap=True, color="0.35")
    atomic_write(path, lambda h: fig.savefig(h, format="png"))
    plt.close(fig)


def _direction_text(direction) -> str:
    if isinstance(direction, str):
        return direction
    return "[" + ", ".join(f"{v:g}" for v in direction) + "]"


def draw_design_2d(ax, density: np.ndarray, element_size: float, *, length_unit: str = ""):
    """Draw a 2D density field (x to the right, y up) in length units; returns the image."""
    nx, ny = density.shape
    image = ax.imshow(density.T, origin="lower", cmap="gray_r", vmin=0.0, vmax=1.0,
                      extent=(0, nx * element_size, 0, ny * element_size),
                      interpolation="nearest")
    ax.set_aspect("equal")
    suffix = f" ({length_unit})" if length_unit else ""
    ax.set_xlabel("x" + suffix)
    ax.set_ylabel("y" + suffix)
    return image


def draw_design_3d(ax, density: np.ndarray, element_size: float) -> None:
    """Draw the 0.5 surface of a 3D density field with simple shading (no build direction).

    :func:`topopt.render.draw_print_3d` draws the print: plate, lighting, support faces.
    """
    from mpl_toolkits.mplot3d.art3d import Poly3DCollection
    from skimage import measure

    padded = np.pad(density, 1, mode="constant")
    if padded.max() <= 0.5:
        ax.text2D(0.3, 0.5, "no solid at the 0.5 level", transform=ax.transAxes)
        return
    verts, faces, normals, _ = measure.marching_cubes(padded, 0.5, spacing=(element_size,) * 3)
    verts -= element_size * 0.5  # padding and element centres
    light = np.array([0.3, -0.5, 0.8]) / np.linalg.norm([0.3, -0.5, 0.8])
    face_normals = normals[faces].mean(axis=1)
    face_normals /= np.linalg.norm(face_normals, axis=1, keepdims=True) + 1e-12
    shade = 0.35 + 0.65 * np.clip(-face_normals @ light, 0, 1)
    colors = np.column_stack([shade * 0.55, shade * 0.65, shade * 0.8, np.ones_like(shade)])
    mesh = Poly3DCollection(verts[faces], facecolors=colors, linewidths=0)
    ax.add_collection3d(mesh)
    size = np.array(density.shape) * element_size
    ax.set_xlim(0, size[0])
    ax.set_ylim(0, size[1])
    ax.set_zlim(0, size[2])
    ax.set_box_aspect(size)
    ax.set_xlabel("x")
    ax.set_ylabel("y")
    ax.set_zlabel("z")


def write_vtu(path: str | Path, density: np.ndarray, problem) -> None:
    """VTK unstructured grid with one quad / hexahedron per element and its density."""
    import meshio

    grid = problem.grid
    points = grid.node_coordinates()
    if grid.dim == 2:
        points = np.column_stack([points, np.zeros(len(points))])
    cell_type = "quad" if grid.dim == 2 else "hexahedron"
    cell_data = {"density": [np.asarray(density, dtype=float).ravel()]}
    point_data = {}
    if np.any(np.asarray(density) >= 0.5):
        from topopt.stress import structural_results

        # per load case: von Mises stress of solid elements (NaN elsewhere), displacement
        for case in structural_results(problem, np.asarray(density, dtype=float)).cases:
            label = _field_label(case.name)
            cell_data[f"von_mises_{label}"] = [case.von_mises.ravel()]
            disp = case.displacement
            if grid.dim == 2:
                disp = np.column_stack([disp, np.zeros(len(disp))])
            point_data[f"displacement_{label}"] = disp
    mesh = meshio.Mesh(points, [(cell_type, grid.element_nodes)], cell_data=cell_data,
                       point_data=point_data)
    # meshio picks the format from the suffix, so write to a .vtu temporary name.
    tmp = Path(path).with_name(f".{Path(path).stem}.partial.vtu")
    meshio.write(tmp, mesh, file_format="vtu")
    os.replace(tmp, path)


def _field_label(case: str) -> str:
    """A load-case name as a VTU field-name suffix (letters, digits, '_' and '-')."""
    return "".join(ch if ch.isalnum() or ch in "_-" else "_" for ch in case) or "case"


def write_stl(path: str | Path, density: np.ndarray, problem) -> None:
    """Closed surface at the 0.5 level as binary STL, for 3D runs only.

    2D runs and designs with no element above 0.5 get no file (``buttress export
    --format stl`` writes the extruded 2D contour on request).
    """
    from topopt.surface import write_design_stl

    if problem.grid.dim != 3 or not np.any(np.asarray(density) > 0.5):
        return
    write_design_stl(path, density, element_size=problem.grid.element_size)


#: Picture and mesh writers by file suffix; more register here.
WRITERS: dict[str, Callable] = {"png": write_png, "vtu": write_vtu, "stl": write_stl}
