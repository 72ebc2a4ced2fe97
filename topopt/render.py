"""A 3D picture that shows the print: shaded part on its build plate, support faces marked.

Drawn with matplotlib offscreen (the Agg canvas, no display needed) from the marching-
cubes surface at the 0.5 level. The view is turned so that the build direction points
up and the plate lies at height 0; the part is lit by a light above and in front of the
viewer (Lambert diffuse term plus a little ambient and specular light, common practice in
shading), so holes and bores read by their shading. Faces whose downward slope is
shallower than the overhang angle (measured from the plate) are coloured as needing
support, faces on the plate excepted; keep-out regions are drawn as translucent shells.

The support marking follows the smooth surface's slope, so a 45-degree voxel staircase
that the layer rule accepts is drawn as self-supporting (a margin of 2 degrees is
allowed); ``buttress inspect`` gives the voxel-exact figures.
"""

from __future__ import annotations

import math

import numpy as np

PART_COLOUR = np.array([0.62, 0.68, 0.78])
SUPPORT_COLOUR = np.array([0.93, 0.42, 0.12])
KEEP_OUT_COLOUR = (0.85, 0.15, 0.15, 0.12)
PLATE_COLOUR = (0.45, 0.45, 0.45, 0.35)
#: camera (elevation, azimuth) in degrees of the named views; "below" looks up at the part
VIEWS = {"iso": (24.0, -58.0), "side": (4.0, -90.0), "below": (-38.0, -58.0)}
_MARGIN_DEG = 2.0


def build_frame(direction, ndim: int = 3) -> np.ndarray:
    """Rotation (rows e1, e2, e3) that turns the build direction into +z.

    For an axis direction the rows are signed axes, so the picture's axes keep their
    names. ``"none"`` gives the identity (z up).

    Examples
    --------
    >>> build_frame("+y").round(6).tolist()
    [[1.0, 0.0, 0.0], [0.0, 0.0, -1.0], [0.0, 1.0, 0.0]]
    """
    from filters.direction import unit_vector

    if isinstance(direction, str) and direction == "none":
        return np.eye(3)
    d = np.asarray(unit_vector(direction, ndim), dtype=float)
    # the original axis least aligned with d gives the first horizontal axis
    helper = np.eye(3)[int(np.argmin(np.abs(d)))]
    e1 = helper - (helper @ d) * d
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(d, e1)
    return np.array([e1, e2, d])


def axis_label(row: np.ndarray, unit: str) -> str:
    """Name of a rotated axis: the original axis when it is one (``-z``), else a vector."""
    suffix = f" ({unit})" if unit else ""
    k = int(np.argmax(np.abs(row)))
    if abs(abs(row[k]) - 1.0) < 1e-9:
        return f"{'-' if row[k] < 0 else ''}{'xyz'[k]}{suffix}"
    return "[" + ", ".join(f"{v:.2f}" for v in row) + "]" + suffix


def support_faces(normals: np.ndarray, *, overhang_angle: float) -> np.ndarray:
    """Which faces (unit outward normals, build frame) face down more steeply than allowed.

    A down-facing face at angle theta from the plate has -n_z = cos(theta); it needs
    support when theta < overhang angle (minus a 2-degree margin).

    Examples
    --------
    >>> support_faces(np.array([[0, 0, -1.0], [0, 0.8, -0.6], [0, 1.0, 0]]), overhang_angle=45)
    array([ True, False, False])
    """
    limit = math.cos(math.radians(max(float(overhang_angle) - _MARGIN_DEG, 0.0)))
    return -np.asarray(normals)[:, 2] > limit


def _shade(normals: np.ndarray, base: np.ndarray, light: np.ndarray, view: np.ndarray) -> np.ndarray:
    diffuse = np.clip(normals @ light, 0.0, 1.0)  # key light
    fill = np.clip(normals @ view, 0.0, 1.0)  # a weaker light at the camera
    half = light + view
    half /= np.linalg.norm(half)
    specular = np.clip(normals @ half, 0.0, 1.0) ** 24
    level = 0.22 + 0.5 * diffuse + 0.35 * fill
    colour = base[None, :] * level[:, None] + 0.2 * specular[:, None]
    return np.column_stack([np.clip(colour, 0.0, 1.0), np.ones(len(normals))])


def _camera(elev: float, azim: float) -> np.ndarray:
    e, a = math.radians(elev), math.radians(azim)
    return np.array([math.cos(e) * math.cos(a), math.cos(e) * math.sin(a), math.sin(e)])


def draw_print_3d(
    ax,
    density: np.ndarray,
    *,
    element_size: float,
    direction="none",
    overhang_angle: float = 45.0,
    plate_offset: float = 0.0,
    keep_out: np.ndarray | None = None,
    length_unit: str = "",
    view: str = "iso",
) -> dict:
    """Draw the 0.5 surface of a 3D density as it would print, on a 3D matplotlib axes.

    Parameters
    ----------
    ax : mpl_toolkits.mplot3d.Axes3D
        Target axes.
    density : ndarray (nx, ny, nz)
        Physical density.
    element_size : float
        Voxel edge.
    direction : str or sequence of float
        Build direction (``"none"``: no plate, no support marking, z up).
    overhang_angle : float
        Self-supporting angle from the plate, degrees.
    plate_offset : float
        Plate raised along the direction from the domain's lowest corner (length unit).
    keep_out : ndarray of bool, optional
        Keep-out (passive void) elements, drawn as translucent shells.
    length_unit : str
        Unit for the axis labels.
    view : str
        ``"iso"``, ``"side"`` or ``"below"``.

    Returns
    -------
    dict
        ``faces``, ``support_faces`` (counts) and ``support_area`` (length unit^2) drawn.
    """
    from mpl_toolkits.mplot3d.art3d import Poly3DCollection

    from topopt.surface import isosurface

    if view not in VIEWS:
        raise ValueError(f"view must be one of {sorted(VIEWS)}, got {view!r}")
    density = np.asarray(density, dtype=float)
    h = float(element_size)
    size = np.array(density.shape, dtype=float) * h
    has_direction = not (isinstance(direction, str) and direction == "none")
    R = build_frame(direction)
    corners = np.array([[i, j, k] for i in (0, 1) for j in (0, 1) for k in (0, 1)]) * size
    turned_corners = corners @ R.T
    floor = turned_corners[:, 2].min() + (float(plate_offset) if has_direction else 0.0)
    shift = np.array([0.0, 0.0, floor])
    low, high = turned_corners.min(axis=0) - shift, turned_corners.max(axis=0) - shift
    elev, azim = VIEWS[view]
    camera = _camera(elev, azim)
    # key light above, to the left of and behind the viewer (so tops, fronts and sides
    # differ in brightness); seen from below, the light comes from below
    light = 0.6 * camera + np.array([-0.45, 0.25, 0.0]) + np.array([0.0, 0.0, math.copysign(0.9, elev)])
    light /= np.linalg.norm(light)
    info = {"faces": 0, "support_faces": 0, "support_area": 0.0}
    ax.computed_zorder = False

    if has_direction:  # the plate, a little larger than the domain's footprint
        pad = 0.08 * (high[:2] - low[:2]).max()
        x0, y0 = low[:2] - pad
        x1, y1 = high[:2] + pad
        plate = [[(x0, y0, 0.0), (x1, y0, 0.0), (x1, y1, 0.0), (x0, y1, 0.0)]]
        # seen from below the plate would hide the part: draw its outline only
        face = (0, 0, 0, 0) if view == "below" else PLATE_COLOUR
        ax.add_collection3d(Poly3DCollection(plate, facecolors=[face], edgecolors="0.3",
                                             linewidths=0.8, zorder=1))
    if np.any(density > 0.5):
        verts, faces = isosurface(density, element_size=h)
        verts = verts @ R.T - shift
        tri = verts[faces]
        normals = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
        area = np.linalg.norm(normals, axis=1)
        normals = normals / np.maximum(area, 1e-300)[:, None]
        colours = _shade(normals, PART_COLOUR, light, camera)
        if has_direction:
            needs = support_faces(normals, overhang_angle=overhang_angle)
            # faces within the lowest half element stand on the plate (the voxel analysis
            # counts the first layer as resting on it)
            needs &= tri[:, :, 2].max(axis=1) > 0.5 * h
            colours[needs] = _shade(normals[needs], SUPPORT_COLOUR, light, camera)
            info["support_faces"] = int(needs.sum())
            info["support_area"] = float(area[needs].sum() / 2.0)
        info["faces"] = len(faces)
        # edges in the face colour hide the seams between triangles
        ax.add_collection3d(Poly3DCollection(tri, facecolors=colours, edgecolors=colours,
                                             linewidths=0.25, zorder=2))
    else:
        ax.text2D(0.3, 0.5, "no solid at the 0.5 level", transform=ax.transAxes)
    if keep_out is not None and np.any(keep_out):
        kv, kf = isosurface(np.asarray(keep_out, dtype=float), element_size=h)
        kv = kv @ R.T - shift
        ax.add_collection3d(Poly3DCollection(kv[kf], facecolors=[KEEP_OUT_COLOUR],
                                             edgecolors="none", zorder=3))
    extent = high - low
    ax.set_xlim(low[0], high[0])
    ax.set_ylim(low[1], high[1])
    ax.set_zlim(low[2], high[2])
    ax.set_box_aspect(np.maximum(extent, 1e-9 * extent.max()))
    ax.view_init(elev=elev, azim=azim)
    ax.set_xlabel(axis_label(R[0], length_unit), fontsize=7)
    ax.set_ylabel(axis_label(R[1], length_unit), fontsize=7)
    up = "build height" if has_direction else axis_label(R[2], "")
    ax.set_zlabel(f"{up} ({length_unit})" if length_unit else up, fontsize=7)
    ax.tick_params(labelsize=6)
    return info


def legend_handles(*, direction, keep_out: bool) -> list:
    """Legend patches for :func:`draw_print_3d`."""
    from matplotlib.patches import Patch

    handles = [Patch(color=PART_COLOUR, label="part")]
    if not (isinstance(direction, str) and direction == "none"):
        handles += [Patch(color=SUPPORT_COLOUR, label="needs support"),
                    Patch(facecolor=PLATE_COLOUR, edgecolor="0.3", label="build plate")]
    if keep_out:
        handles.append(Patch(facecolor=KEEP_OUT_COLOUR[:3] + (0.3,), label="keep-out"))
    return handles


def write_print_views(
    path,
    density: np.ndarray,
    *,
    directions,
    element_size: float,
    overhang_angle: float = 45.0,
    length_unit: str = "",
    titles=None,
    caution: str = "",
) -> None:
    """A picture of a 3D design printed in each of ``directions``: from the side and from below.

    One row per direction (at most four), the build direction up, the plate drawn and
    the faces needing support coloured (see :func:`draw_print_3d`).
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from topopt.files import atomic_write

    directions = list(directions)[:4]
    titles = list(titles) if titles is not None else [str(d) for d in directions]
    fig = plt.figure(figsize=(10.0, 4.4 * len(directions) + 0.6), dpi=110)
    for row, direction in enumerate(directions):
        for col, view in enumerate(("side", "below")):
            ax = fig.add_subplot(len(directions), 2, 2 * row + col + 1, projection="3d")
            info = draw_print_3d(ax, density, element_size=element_size, direction=direction,
                                 overhang_angle=overhang_angle, length_unit=length_unit,
                                 view=view)
            where = "from the side" if view == "side" else "from below"
            ax.set_title(f"{titles[row]}: {where}", fontsize=8, y=1.06)
            if view == "below":
                area_unit = f"{length_unit}²" if length_unit else "(length unit)²"
                ax.text2D(0.0, -0.02, f"faces needing support: {info['support_area']:.3g} "
                          f"{area_unit}", transform=ax.transAxes, fontsize=7)
    fig.legend(handles=legend_handles(direction="+z", keep_out=False), loc="upper right",
               fontsize=7)
    if caution:
        fig.text(0.01, 0.005, caution, fontsize=5.5, color="0.35", wrap=True)
    fig.subplots_adjust(left=0.02, right=0.86, bottom=0.04, top=0.95, wspace=0.25, hspace=0.3)
    atomic_write(path, lambda h: fig.savefig(h, format="png"))
    plt.close(fig)
