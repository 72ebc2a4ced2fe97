"""Print-preparation analysis of a voxel design for one or more build directions.

Works on any design: a density array (thresholded at 0.5) or a boolean voxel array,
with a cubic element of edge ``element_size`` (2D designs are sections of out-of-plane
``thickness``). For each build direction it estimates what laser powder-bed fusion
would need: build height and layers, part volume and mass, the down-facing surface that
needs support, the support volume (standing on the plate or on the part), support that
could not be removed, powder trapped in closed cavities, build time and material cost.

The build direction is data: every array is turned so that the build axis is axis 0
with the plate at index 0, the work is done once, and the results are turned back.

The estimates are first-order and meant as a design aid; they must be confirmed with the
machine's own build preparation.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, fields, replace

import numpy as np

from topopt.problem import ProcessSettings

AXIS_NAMES = "xyz"

#: Default process values (mm, s, h, currency per kg), taken from the one source of
#: their names and defaults, :class:`topopt.problem.ProcessSettings` (see its notes).
PROCESS_DEFAULTS: dict[str, float] = asdict(ProcessSettings())

#: Fields of one direction's report, in the order written to inspect.json / inspect.csv.
REPORT_FIELDS = (
    "direction",
    "vector",
    "overhang_angle",
    "build_height",
    "layers",
    "part_volume",
    "part_mass",
    "down_facing_area",
    "overhang_area",
    "overhang_share",
    "support_volume",
    "support_on_plate_volume",
    "support_on_part_volume",
    "unremovable_support_volume",
    "trapped_powder_volume",
    "trapped_cavities",
    "build_time_h",
    "material_cost",
    "score",
    "rank",
    "flag",
)


@dataclass(frozen=True)
class BuildReport:
    """Print-preparation figures of one design for one build direction.

    Lengths, areas and volumes are in the design's length unit (in 2D an area is a
    length times the thickness and a volume an area times the thickness). Support
    volumes are material volumes: the supported column times the support fill.
    ``overhang_area`` is the down-facing area needing support, measured on the voxel
    faces, i.e. its footprint on the build plate. ``score`` is filled in by
    :func:`rank_directions` (lower is better; NaN until ranked), and so are ``rank``
    (1 = recommended; 0 until ranked) and ``flag`` (why a direction cannot be cleaned:
    ``"unremovable support"``, ``"trapped powder"`` or both; empty when it can).
    """

    direction: str
    overhang_angle: float
    build_height: float
    layers: int
    part_volume: float
    part_mass: float
    down_facing_area: float
    overhang_area: float
    overhang_share: float
    support_volume: float
    support_on_plate_volume: float
    support_on_part_volume: float
    unremovable_support_volume: float
    trapped_powder_volume: float
    trapped_cavities: int
    build_time_h: float
    material_cost: float
    score: float = float("nan")
    vector: tuple[float, ...] = ()
    rank: int = 0
    flag: str = ""

    def as_dict(self) -> dict:
        """Plain dict in :data:`REPORT_FIELDS` order (JSON-ready)."""
        data = asdict(self)
        data["vector"] = [float(v) for v in self.vector]
        return {name: data[name] for name in REPORT_FIELDS}


@dataclass(frozen=True)
class BuildMasks:
    """Voxel masks behind a :class:`BuildReport`, in the design's own orientation.

    ``down_facing``: solid voxels whose lower face (towards the plate) borders void,
    excluding faces on the plate; ``needs_support``: those of them that need support;
    ``support``: void voxels filled by support columns; ``support_on_plate``: the part
    of ``support`` in columns that reach the plate; ``accessible``: void a tool of the
    access width can reach from outside; ``trapped``: void not connected to the outside.
    """

    solid: np.ndarray
    down_facing: np.ndarray
    needs_support: np.ndarray
    support: np.ndarray
    support_on_plate: np.ndarray
    accessible: np.ndarray
    trapped: np.ndarray
    trapped_cavities: int
    #: tilted directions only (see :mod:`topopt.tilted`): column lengths in element
    #: edges of one element cross-section, and the part's extent along the direction
    support_length: float | None = None
    on_plate_length: float | None = None
    unremovable_length: float | None = None
    height: float | None = None


def axis_name(direction, ndim: int) -> str | None:
    """The axis name of a direction given as a name or vector, or None when tilted.

    Examples
    --------
    >>> axis_name([0.0, -2.0], 2), axis_name([1.0, 1.0], 2)
    ('-y', None)
    """
    from filters.direction import direction_label

    label = direction_label(direction, ndim)
    return label if label in all_directions(ndim) else None


def _open_void_masks(solid: np.ndarray, width: int, through_holes: bool):
    """Accessible and trapped void with every side of the domain open (tilted builds)."""
    pad = [(width + 1, 0)] + [(0, 0)] * (solid.ndim - 1)
    padded = np.pad(solid, pad, constant_values=False)
    crop = (slice(width + 1, None),) + (slice(None),) * (solid.ndim - 1)
    if through_holes and solid.ndim == 2:
        accessible = accessible_void(padded, width_voxels=width, from_anywhere=True)[crop]
        return accessible, np.zeros_like(solid), 0
    accessible = accessible_void(padded, width_voxels=width)[crop]
    trapped, count = trapped_void(padded)
    return accessible, trapped[crop], count


def parse_direction(direction: str, ndim: int) -> tuple[int, int]:
    """Axis index and sign (+1 or -1) of a build direction such as ``"+z"``.

    Examples
    --------
    >>> parse_direction("-y", 2)
    (1, -1)
    """
    if not isinstance(direction, str):
        raise TypeError(f"direction must be a string such as '+z', got {direction!r}")
    allowed = all_directions(ndim)
    if direction not in allowed:
        raise ValueError(f"direction must be one of {', '.join(allowed)}; got {direction!r}")
    return AXIS_NAMES.index(direction[1]), (1 if direction[0] == "+" else -1)


def all_directions(ndim: int) -> tuple[str, ...]:
    """All axis build directions for a 2D or 3D design.

    Examples
    --------
    >>> all_directions(2)
    ('+x', '-x', '+y', '-y')
    """
    if ndim not in (2, 3):
        raise ValueError(f"a design must be 2D or 3D, got {ndim} dimensions")
    return tuple(s + a for a in AXIS_NAMES[:ndim] for s in "+-")


def to_build_frame(array: np.ndarray, direction: str) -> np.ndarray:
    """View of ``array`` with the build axis first and the plate at index 0."""
    axis, sign = parse_direction(direction, array.ndim)
    moved = np.moveaxis(array, axis, 0)
    return moved[::-1] if sign < 0 else moved


def from_build_frame(array: np.ndarray, direction: str) -> np.ndarray:
    """Inverse of :func:`to_build_frame`."""
    axis, sign = parse_direction(direction, array.ndim)
    if sign < 0:
        array = array[::-1]
    return np.ascontiguousarray(np.moveaxis(array, 0, axis))


def solid_voxels(design: np.ndarray) -> np.ndarray:
    """Boolean voxels of a design: booleans as they are, densities at the 0.5 level.

    Examples
    --------
    >>> solid_voxels(np.array([[0.2, 0.6], [0.9, 0.5]])).tolist()
    [[False, True], [True, False]]
    """
    design = np.asarray(design)
    if design.ndim not in (2, 3):
        raise ValueError(f"design must be a 2D or 3D array, got shape {design.shape}")
    if design.dtype == bool:
        return design.copy()
    if not np.issubdtype(design.dtype, np.number):
        raise TypeError(f"design must hold numbers or booleans, got dtype {design.dtype}")
    if not np.all(np.isfinite(design)):
        raise ValueError("design holds NaN or infinite values")
    # the same reading as filters.printability: solid strictly above the 0.5 level
    return design > 0.5


def _check_angle(overhang_angle: float) -> float:
    from filters.printability import ANGLE_RANGE

    angle = float(overhang_angle)
    low, high = ANGLE_RANGE
    if not low <= angle <= high:
        raise ValueError(f"overhang_angle must be between {low:g} and {high:g} degrees, got {angle}")
    return angle


def first_occupied_layer(solid_b: np.ndarray) -> int:
    """Index of the lowest layer (build frame) holding solid; 0 for an empty design."""
    occupied = np.flatnonzero(solid_b.reshape(solid_b.shape[0], -1).any(axis=1))
    return int(occupied[0]) if occupied.size else 0


def _down_facing(solid_b: np.ndarray) -> np.ndarray:
    """Solid voxels (build frame) with void right below; faces on the plate excluded."""
    down = np.zeros_like(solid_b)
    down[1:] = solid_b[1:] & ~solid_b[:-1]
    return down


def _surface_tilt(solid_b: np.ndarray, *, smoothing: float) -> np.ndarray:
    """Angle in degrees between the local outward normal and straight down (build frame).

    The normal comes from the gradient of the Gaussian-smoothed voxels. The one-layer
    overhang rule alone sees only the layer below, so the staircase of a shallow slope
    (say 30 degrees, which rises one layer every 1.7 voxels) looks half supported; the
    smoothed normal sees the slope itself. Below the plate the bottom layer is repeated
    so that faces resting on the plate do not look like overhangs.
    """
    from scipy import ndimage

    modes = ["nearest"] + ["constant"] * (solid_b.ndim - 1)
    smooth = ndimage.gaussian_filter(solid_b.astype(float), smoothing, mode=modes)
    grads = np.gradient(smooth)
    vertical = grads[0]
    horizontal = np.sqrt(sum(g * g for g in grads[1:]))
    return np.degrees(np.arctan2(horizontal, vertical))


def _slope_held(
    solid_b: np.ndarray, down_b: np.ndarray, *, angle: float, layers: int
) -> np.ndarray:
    """Down-facing voxels whose staircase below stays within the overhang angle.

    A voxel in layer k passes when, for every j = 1 .. ``layers`` above the plate, layer
    k - j holds solid within a horizontal distance j / tan(angle) (in voxels). That is
    the slope of the surface under it measured over several layers: it accepts a 45
    degree staircase and the peak of a diamond-shaped hole (where smoothed normals point
    straight down), and rejects a 30 degree staircase, whose single steps alternate
    between 1 and 2 voxels.
    """
    from scipy import ndimage

    reach = 1.0 / math.tan(math.radians(angle))
    n_layers = solid_b.shape[0]
    distance = np.full(solid_b.shape, np.inf)
    for k in range(n_layers):
        if solid_b[k].any():
            distance[k] = ndimage.distance_transform_edt(~solid_b[k])
    held = down_b.copy()
    for j in range(1, int(layers) + 1):
        if j >= n_layers:
            break
        # layers k - j < 0 lie under the plate, which holds everything; the reach is
        # rounded up to whole voxels, as a staircase can only step by whole voxels (a
        # 63.43 degree wall steps one voxel every two layers: 1 voxel at j = 1)
        held[j:] &= distance[:-j] <= math.ceil(j * reach - 1e-9) + 1e-9
    return held


def _support_columns(needs_b: np.ndarray, solid_b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Void voxels between each face needing support and the part or plate below."""
    support = np.zeros_like(solid_b)
    for k in range(solid_b.shape[0] - 2, -1, -1):
        support[k] = (needs_b[k + 1] | support[k + 1]) & ~solid_b[k]
    # a column stands on the plate when no solid lies anywhere below it
    solid_below = np.zeros_like(solid_b)
    solid_below[1:] = np.logical_or.accumulate(solid_b[:-1], axis=0)
    return support, support & ~solid_below


def _outside_padding(void_b: np.ndarray, width: int, open_value: bool) -> np.ndarray:
    """Void padded by ``width`` voxels of open powder, except below the plate (closed)."""
    pad = [(0, width)] + [(width, width)] * (void_b.ndim - 1)
    padded = np.pad(void_b, pad, constant_values=open_value)
    return padded


def _connected_to_outside(void_padded: np.ndarray, width: int) -> np.ndarray:
    """Void voxels face-connected (4 in 2D, 6 in 3D) to the padding, padding removed."""
    from scipy import ndimage

    structure = ndimage.generate_binary_structure(void_padded.ndim, 1)
    labels, _ = ndimage.label(void_padded, structure=structure)
    border = np.ones(void_padded.shape, dtype=bool)
    inner = (slice(0, void_padded.shape[0] - width),) + (slice(width, -width),) * (
        void_padded.ndim - 1
    )
    border[inner] = False
    outside_labels = np.unique(labels[border & void_padded])
    outside_labels = outside_labels[outside_labels > 0]
    connected = np.isin(labels, outside_labels)
    return connected[inner]


def trapped_void(solid_b: np.ndarray) -> tuple[np.ndarray, int]:
    """Void regions (build frame) with no face-connected path to the outside.

    The build plate (below index 0 of axis 0) is closed; every other face of the domain
    opens to loose powder. Returns the mask and the number of cavities.
    """
    from scipy import ndimage

    outside = _connected_to_outside(_outside_padding(~solid_b, 1, True), 1)
    trapped = ~solid_b & ~outside
    structure = ndimage.generate_binary_structure(solid_b.ndim, 1)
    _, count = ndimage.label(trapped, structure=structure)
    return trapped, int(count)


def accessible_void(
    solid_b: np.ndarray, *, width_voxels: int, from_anywhere: bool = False
) -> np.ndarray:
    """Void (build frame) that a square/cube tool of ``width_voxels`` can reach from outside.

    Morphological opening of the void with a square (cube) of that side keeps the places
    the tool fits; of those, the ones face-connected to the outside are reachable. An
    opening narrower than the tool therefore blocks what lies behind it. With
    ``from_anywhere`` (a 2D plate whose holes open through its thickness) every place
    the tool fits is reachable.
    """
    from scipy import ndimage

    n = max(1, int(width_voxels))
    padded = _outside_padding(~solid_b, n, True)
    # below the plate is solid, so the tool cannot come from there
    opened = ndimage.binary_opening(padded, structure=np.ones((n,) * solid_b.ndim, dtype=bool))
    if from_anywhere:
        inner = (slice(0, solid_b.shape[0]),) + (slice(n, -n),) * (solid_b.ndim - 1)
        return opened[inner] & ~solid_b
    return _connected_to_outside(opened, n) & ~solid_b


def direction_masks(
    design: np.ndarray,
    *,
    direction: str,
    overhang_angle: float = 45.0,
    element_size: float = 1.0,
    tool_access: float = PROCESS_DEFAULTS["tool_access"],
    smoothing: float = 1.5,
    window: int = 6,
    through_holes: bool = True,
    open_void: tuple | None = None,
) -> BuildMasks:
    """Voxel masks of overhangs, supports, removable space and trapped powder.

    Parameters
    ----------
    design : ndarray
        Density (solid where >= 0.5) or boolean voxels, indexed (x, y[, z]).
    direction : str
        Build direction, ``"+x"`` ... ``"-z"``: layers stack that way, the plate lies on
        the opposite face of the domain.
    overhang_angle : float
        Smallest angle (degrees) between a down-facing surface and the plate that prints
        without support.
    element_size : float
        Voxel edge length.
    tool_access : float
        Narrowest opening (length unit) through which a support can be removed.
    smoothing : float
        Gaussian width (voxels) used to estimate surface normals.
    window : int
        Layers over which the slope under a face is measured (see Notes).
    through_holes : bool
        2D only. True (default): the design is a plate extruded to its thickness, so
        every hole is open on both faces; no powder is trapped, and a tool reaches any
        place of a hole wide enough for it. False: the design is a section of a closed
        part and a void closed in the plane is a closed cavity.

    Returns
    -------
    BuildMasks
        All masks in the design's own orientation and domain. The part is placed on the
        plate: empty layers between the plate side of the domain and the part's lowest
        point are left out of the analysis.

    Notes
    -----
    A down-facing face needs support when its voxel fails the one-layer overhang rule of
    :func:`filters.printability.supported_mask`, or when the surface there is shallower
    than ``overhang_angle`` both locally (the smoothed normal is tilted less than the
    angle from straight down, by more than half a degree) and over the ``window``
    layers below (some layer k - j holds no solid within j / tan(angle) voxels). The
    one-layer rule alone passes half the faces of a 30 degree slope, whose staircase
    steps alternate between one and two voxels; the normal alone flags the peak of a
    diamond-shaped hole. A design that passes the 45-degree one-layer rule everywhere
    also passes the window test, so it needs no support here either.

    Examples
    --------
    >>> shelf = np.zeros((6, 6), dtype=bool)
    >>> shelf[0, :] = True; shelf[:, 4] = True     # a wall at x = 0 and a shelf at y = 4
    >>> masks = direction_masks(shelf, direction="+y")
    >>> int(masks.needs_support.sum()), int(masks.support_on_plate.sum())
    (4, 16)
    """
    from filters.printability import enforced_overhang_angle, supported_mask

    solid = solid_voxels(design)
    _check_angle(overhang_angle)
    if float(element_size) <= 0:
        raise ValueError(f"element_size must be positive, got {element_size}")
    if float(tool_access) < 0:
        raise ValueError(f"tool_access must be >= 0, got {tool_access}")
    name = axis_name(direction, solid.ndim)
    if name is None:
        from topopt.tilted import tilted_masks

        width = max(1, math.ceil(float(tool_access) / float(element_size) - 1e-9))
        if open_void is None:
            open_void = _open_void_masks(solid, width, through_holes)
        accessible, trapped, count = open_void
        return BuildMasks(**tilted_masks(solid, direction, overhang_angle, accessible, trapped,
                                         count))
    direction = name
    # judge slopes by the angle the voxel rule enforces, as the optimiser's filter does
    angle = enforced_overhang_angle(overhang_angle, direction, solid.ndim)

    # the part is placed on the plate: empty layers under its lowest point are dropped
    full_b = to_build_frame(solid, direction)
    lowest = first_occupied_layer(full_b)
    solid_b = np.ascontiguousarray(full_b[lowest:])
    placed = from_build_frame(solid_b, direction)
    supported = np.asarray(supported_mask(placed, direction=direction, overhang_angle=angle))
    supported_b = to_build_frame(supported.astype(bool), direction)
    down_b = _down_facing(solid_b)
    tilt_b = _surface_tilt(solid_b, smoothing=smoothing)
    shallow_b = (tilt_b < angle - 0.5) & ~_slope_held(solid_b, down_b, angle=angle, layers=window)
    needs_b = down_b & (~supported_b | shallow_b)
    support_b, on_plate_b = _support_columns(needs_b, solid_b)
    width = math.ceil(float(tool_access) / float(element_size) - 1e-9)
    if through_holes and solid.ndim == 2:
        accessible_b = accessible_void(solid_b, width_voxels=max(width, 1), from_anywhere=True)
        trapped_b, count = np.zeros_like(solid_b), 0
    else:
        accessible_b = accessible_void(solid_b, width_voxels=max(width, 1))
        trapped_b, count = trapped_void(solid_b)

    def back(a: np.ndarray) -> np.ndarray:
        pad = [(lowest, 0)] + [(0, 0)] * (a.ndim - 1)
        return from_build_frame(np.pad(a, pad, constant_values=False), direction)

    return BuildMasks(
        solid=solid,
        down_facing=back(down_b),
        needs_support=back(needs_b),
        support=back(support_b),
        support_on_plate=back(on_plate_b),
        accessible=back(accessible_b),
        trapped=back(trapped_b),
        trapped_cavities=count,
    )


def build_time_hours(
    *,
    layers: int,
    part_volume: float,
    support_volume: float,
    recoat_time_s: float = PROCESS_DEFAULTS["recoat_time_s"],
    part_rate: float = PROCESS_DEFAULTS["part_rate"],
    support_rate: float = PROCESS_DEFAULTS["support_rate"],
    overhead_h: float = PROCESS_DEFAULTS["overhead_h"],
) -> float:
    """First-order build time: recoating + scanning part and support + fixed overhead.

    T = layers * recoat_time_s / 3600 + part_volume / part_rate
    + support_volume / support_rate + overhead_h (the form of Baumers et al.,
    Technological Forecasting and Social Change 102:193-201, 2016).

    Examples
    --------
    >>> build_time_hours(layers=360, part_volume=1000.0, support_volume=0.0,
    ...                  recoat_time_s=10.0, part_rate=1000.0, overhead_h=1.0)
    3.0
    """
    if part_rate <= 0 or support_rate <= 0:
        raise ValueError("part_rate and support_rate must be positive")
    return (
        layers * recoat_time_s / 3600.0
        + part_volume / part_rate
        + support_volume / support_rate
        + overhead_h
    )


def _process_values(process: Mapping[str, float] | None) -> dict[str, float]:
    values = dict(PROCESS_DEFAULTS)
    for key, value in (process or {}).items():
        if key not in PROCESS_DEFAULTS:
            raise ValueError(
                f"process: unknown key {key!r}; expected one of {', '.join(PROCESS_DEFAULTS)}"
            )
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise TypeError(f"process: {key} must be a number, got {value!r}")
        if not math.isfinite(value) or value < 0:
            raise ValueError(f"process: {key} must be a finite number >= 0, got {value!r}")
        values[key] = float(value)
    for key in ("layer_thickness", "part_rate", "support_rate"):
        if values[key] <= 0:
            raise ValueError(f"process: {key} must be positive, got {values[key]}")
    if values["support_fill"] > 1:
        raise ValueError(f"process: support_fill must lie in [0, 1], got {values['support_fill']}")
    return values


def report_from_masks(
    masks: BuildMasks,
    *,
    direction: str,
    overhang_angle: float,
    element_size: float,
    thickness: float = 1.0,
    process: Mapping[str, float] | None = None,
    mass_density: float | None = None,
) -> BuildReport:
    """Turn the masks of one direction into figures (see :class:`BuildReport`).

    ``mass_density`` is in kg per length unit cubed, the powder price per kg. Without
    ``mass_density`` the mass and the material cost are NaN (not estimated).
    """
    from filters.direction import direction_label, unit_vector

    values = _process_values(process)
    h = float(element_size)
    ndim = masks.solid.ndim
    depth = float(thickness) if ndim == 2 else h
    voxel = h * h * depth
    face = h * depth
    fill = values["support_fill"]
    vector = tuple(float(v) for v in unit_vector(direction, ndim))
    label = direction_label(direction, ndim)

    part_volume = float(masks.solid.sum()) * voxel
    if masks.support_length is None:
        solid_b = to_build_frame(masks.solid, label)
        occupied = np.flatnonzero(solid_b.reshape(solid_b.shape[0], -1).any(axis=1))
        height = (occupied[-1] - occupied[0] + 1) * h if occupied.size else 0.0
        support_volume = float(masks.support.sum()) * voxel * fill
        on_plate = float(masks.support_on_plate.sum()) * voxel * fill
        unremovable = float((masks.support & ~masks.accessible).sum()) * voxel * fill
    else:
        height = float(masks.height) * h
        support_volume = masks.support_length * voxel * fill
        on_plate = masks.on_plate_length * voxel * fill
        unremovable = masks.unremovable_length * voxel * fill
    layers = math.ceil(height / values["layer_thickness"] - 1e-9) if height > 0 else 0
    down_area = float(masks.down_facing.sum()) * face
    overhang_area = float(masks.needs_support.sum()) * face
    rho = float("nan") if mass_density is None else float(mass_density)
    return BuildReport(
        direction=label,
        vector=vector,
        overhang_angle=float(overhang_angle),
        build_height=float(height),
        layers=int(layers),
        part_volume=part_volume,
        part_mass=part_volume * rho,
        down_facing_area=down_area,
        overhang_area=overhang_area,
        overhang_share=overhang_area / down_area if down_area > 0 else 0.0,
        support_volume=support_volume,
        support_on_plate_volume=on_plate,
        support_on_part_volume=support_volume - on_plate,
        unremovable_support_volume=unremovable,
        trapped_powder_volume=float(masks.trapped.sum()) * voxel,
        trapped_cavities=int(masks.trapped_cavities),
        build_time_h=build_time_hours(
            layers=layers,
            part_volume=part_volume,
            support_volume=support_volume,
            recoat_time_s=values["recoat_time_s"],
            part_rate=values["part_rate"],
            support_rate=values["support_rate"],
            overhead_h=values["overhead_h"],
        ),
        material_cost=(part_volume + support_volume) * rho * values["powder_price"],
    )


def analyze_design(
    design: np.ndarray,
    *,
    element_size: float,
    directions: Sequence[str] | None = None,
    overhang_angle: float = 45.0,
    thickness: float = 1.0,
    process: Mapping[str, float] | None = None,
    mass_density: float | None = None,
    weights: Mapping[str, float] | None = None,
    keep_masks: bool = False,
    through_holes: bool = True,
    allow_unclean: bool = False,
) -> tuple[list[BuildReport], str, list[BuildMasks]]:
    """Analyse a design for several build directions and rank them.

    Parameters
    ----------
    design : ndarray
        Density or boolean voxels, indexed (x, y[, z]).
    element_size : float
        Voxel edge length.
    directions : sequence of str, optional
        Candidate build directions; all axis directions by default.
    overhang_angle : float
        Self-supporting angle from the plate, degrees.
    thickness : float
        Out-of-plane thickness of a 2D design.
    process : mapping, optional
        Process values overriding :data:`PROCESS_DEFAULTS`.
    mass_density : float, optional
        Mass of the solid per unit volume, in kg per length unit cubed (so masses are
        in kg and ``powder_price`` is per kg); without it mass and cost are NaN and the
        cost term drops out of the score.
    weights : mapping, optional
        Weights of ``time``, ``cost`` and ``support`` in the score (1 each by default).
    keep_masks : bool
        Return the voxel masks too (for pictures).
    through_holes : bool
        2D only: holes open through the thickness (default; see :func:`direction_masks`).
    allow_unclean : bool
        Rank by score alone, also directions with unremovable support or trapped
        powder (see :func:`rank_directions`).

    Returns
    -------
    reports : list of BuildReport
        One per direction, with ``score`` filled in.
    best : str
        Direction with the lowest score.
    masks : list of BuildMasks
        Empty unless ``keep_masks``.

    Examples
    --------
    >>> block = np.ones((4, 2), dtype=bool)
    >>> reports, best, _ = analyze_design(block, element_size=1.0, directions=["+x", "+y"])
    >>> best, reports[1].build_height
    ('+y', 2.0)
    """
    solid = solid_voxels(design)
    if not solid.any():
        raise ValueError("design has no solid voxel (no density >= 0.5)")
    if float(element_size) <= 0 or not math.isfinite(float(element_size)):
        raise ValueError(f"element_size must be a positive number, got {element_size}")
    if float(thickness) <= 0:
        raise ValueError(f"thickness must be positive, got {thickness}")
    if mass_density is not None and not (math.isfinite(mass_density) and mass_density > 0):
        raise ValueError(f"mass_density must be a positive number, got {mass_density}")
    values = _process_values(process)
    from filters.direction import direction_label

    chosen = list(directions) if directions else list(all_directions(solid.ndim))
    labels = [direction_label(d, solid.ndim) for d in chosen]
    if len(set(labels)) != len(labels):
        raise ValueError(f"directions repeat an entry: {labels}")
    reports, kept = [], []
    open_void = None
    if any(axis_name(d, solid.ndim) is None for d in chosen):
        # the same for every tilted direction (the domain is open on every side)
        width = max(1, math.ceil(values["tool_access"] / float(element_size) - 1e-9))
        open_void = _open_void_masks(solid, width, through_holes)
    for direction in chosen:
        masks = direction_masks(
            solid,
            direction=direction,
            overhang_angle=overhang_angle,
            element_size=element_size,
            tool_access=values["tool_access"],
            through_holes=through_holes,
            open_void=open_void,
        )
        reports.append(
            report_from_masks(
                masks,
                direction=direction,
                overhang_angle=overhang_angle,
                element_size=element_size,
                thickness=thickness,
                process=values,
                mass_density=mass_density,
            )
        )
        if keep_masks:
            kept.append(masks)
    ranked, best = rank_directions(reports, weights=weights, allow_unclean=allow_unclean)
    return ranked, best, kept


#: score term -> report field it is computed from
SCORE_TERMS = {"time": "build_time_h", "cost": "material_cost", "support": "support_volume"}


def rank_directions(
    reports: Sequence[BuildReport],
    *,
    weights: Mapping[str, float] | None = None,
    allow_unclean: bool = False,
) -> tuple[list[BuildReport], str]:
    """Score each direction by weighted, normalised time, cost and support; lower is better.

    Each term is divided by its largest value over the directions (so it lies in
    [0, 1]); the score is the weighted mean of the terms. A term that is NaN for some
    direction (the cost without a mass density) is left out. Ties go to the first
    direction.

    A direction that leaves support no tool can reach or powder that cannot drain is
    flagged and, unless ``allow_unclean``, ranked after every direction without such
    problems whatever its score: such a part may be impossible to finish. The returned
    reports keep their order; ``rank`` gives the recommendation order (1 = ``best``).

    Examples
    --------
    >>> a = BuildReport("+x", 45, 1, 1, 1, 1, 0, 0, 0, 0, 0, 0, 0, 0, 0, 2.0, 1.0)
    >>> b = replace(a, direction="+y", build_time_h=4.0)
    >>> ranked, best = rank_directions([a, b], weights={"time": 1, "cost": 0, "support": 0})
    >>> best, [r.score for r in ranked]
    ('+x', [0.5, 1.0])
    """
    if not reports:
        raise ValueError("rank_directions needs at least one report")
    w = {name: 1.0 for name in SCORE_TERMS}
    for key, value in (weights or {}).items():
        if key not in SCORE_TERMS:
            raise ValueError(f"weights: unknown term {key!r}; expected time, cost or support")
        if isinstance(value, bool) or not isinstance(value, (int, float)) or value < 0:
            raise ValueError(f"weights: {key} must be a number >= 0, got {value!r}")
        w[key] = float(value)
    if sum(w.values()) <= 0:
        raise ValueError("weights: at least one weight must be positive")
    scores = np.zeros(len(reports))
    total = 0.0
    for term, field_name in SCORE_TERMS.items():
        column = np.array([getattr(r, field_name) for r in reports], dtype=float)
        if not np.all(np.isfinite(column)):
            continue
        total += w[term]
        top = column.max()
        if top > 0:
            scores += w[term] * column / top
    scores = scores / total if total > 0 else scores
    flags = [cleaning_flag(r) for r in reports]
    unclean = np.array([bool(f) and not allow_unclean for f in flags])
    # unclean after clean, then by score, then in the given order (ties to the first)
    order = np.lexsort((np.arange(len(reports)), scores, unclean))
    rank = np.empty(len(reports), dtype=int)
    rank[order] = np.arange(1, len(reports) + 1)
    ranked = [replace(r, score=float(s), rank=int(k), flag=f)
              for r, s, k, f in zip(reports, scores, rank, flags, strict=True)]
    best = ranked[int(order[0])].direction
    return ranked, best


def cleaning_flag(report: BuildReport) -> str:
    """Why a direction's print cannot be cleaned ("" when it can).

    Examples
    --------
    >>> r = BuildReport("+z", 45, 1, 1, 1, 1, 0, 0, 0, 1.0, 0, 0, 0.5, 0, 0, 1.0, 1.0)
    >>> cleaning_flag(r)
    'unremovable support'
    """
    reasons = []
    if report.unremovable_support_volume > 0:
        reasons.append("unremovable support")
    if report.trapped_powder_volume > 0:
        reasons.append("trapped powder")
    return "; ".join(reasons)


def report_field_names() -> list[str]:
    """Names of the :class:`BuildReport` fields in output order."""
    names = {f.name for f in fields(BuildReport)}
    return [n for n in REPORT_FIELDS if n in names]
