"""Printable surfaces: marching cubes, Taubin smoothing, 2D extrusion, STL and a voxeliser.

Meshes are plain arrays: ``vertices`` (n, 3) floats in the design's length unit and
``faces`` (m, 3) vertex indices, counter-clockwise seen from outside (outward normals).
Coordinates follow the grid convention: element ``[i, j, k]`` spans
``[i*h, (i+1)*h] x [j*h, (j+1)*h] x [k*h, (k+1)*h]``.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np

#: Largest number of triangles read from an STL file (a guard against hostile files).
MAX_STL_TRIANGLES = 20_000_000


# ---------------------------------------------------------------------------- helpers
def _check_mesh(vertices: np.ndarray, faces: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    vertices = np.asarray(vertices, dtype=float)
    faces = np.asarray(faces)
    if vertices.ndim != 2 or vertices.shape[1] != 3:
        raise ValueError(f"vertices must have shape (n, 3), got {vertices.shape}")
    if faces.ndim != 2 or faces.shape[1] != 3 or not np.issubdtype(faces.dtype, np.integer):
        raise ValueError(f"faces must be an integer array of shape (m, 3), got {faces.shape}")
    if faces.size and (faces.min() < 0 or faces.max() >= len(vertices)):
        raise ValueError("faces refer to vertices that do not exist")
    if not np.all(np.isfinite(vertices)):
        raise ValueError("vertices hold NaN or infinite coordinates")
    return vertices, faces.astype(np.int64)


def mesh_volume(vertices: np.ndarray, faces: np.ndarray) -> float:
    """Signed volume enclosed by a closed triangle mesh (positive for outward normals).

    Examples
    --------
    >>> v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
    >>> f = np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]])
    >>> round(mesh_volume(v, f), 6)
    0.166667
    """
    vertices, faces = _check_mesh(vertices, faces)
    a, b, c = (vertices[faces[:, i]] for i in range(3))
    return float(np.einsum("ij,ij->i", a, np.cross(b, c)).sum() / 6.0)


def mesh_area(vertices: np.ndarray, faces: np.ndarray) -> float:
    """Total area of a triangle mesh.

    Examples
    --------
    >>> v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0]], float)
    >>> mesh_area(v, np.array([[0, 1, 2]]))
    0.5
    """
    vertices, faces = _check_mesh(vertices, faces)
    a, b, c = (vertices[faces[:, i]] for i in range(3))
    return float(0.5 * np.linalg.norm(np.cross(b - a, c - a), axis=1).sum())


def _directed_edges(faces: np.ndarray) -> np.ndarray:
    return np.concatenate([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]])


def open_edges(faces: np.ndarray) -> int:
    """Count the undirected edges not shared by exactly two faces (0 for a closed mesh).

    Examples
    --------
    >>> open_edges(np.array([[0, 1, 2]]))
    3
    """
    faces = np.asarray(faces)
    edges = np.sort(_directed_edges(faces), axis=1)
    _, counts = np.unique(edges, axis=0, return_counts=True)
    return int(np.count_nonzero(counts != 2))


def is_closed(faces: np.ndarray) -> bool:
    """Tell whether every edge is shared by exactly two faces.

    Examples
    --------
    >>> is_closed(np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]]))
    True
    """
    return open_edges(faces) == 0


def is_consistently_oriented(faces: np.ndarray) -> bool:
    """Tell whether each directed edge appears once and its reverse once.

    That is the condition for neighbouring faces to agree on which side is outside.

    Examples
    --------
    >>> is_consistently_oriented(np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]]))
    True
    """
    faces = np.asarray(faces)
    directed = _directed_edges(faces)
    uniq, counts = np.unique(directed, axis=0, return_counts=True)
    if np.any(counts != 1):
        return False
    forward = {tuple(e) for e in uniq.tolist()}
    return all((b, a) in forward for a, b in forward)


# ----------------------------------------------------------------- marching cubes
def isosurface(
    density: np.ndarray,
    *,
    element_size: float,
    level: float = 0.5,
    smoothing_iterations: int = 0,
    keep_points: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Mesh the closed ``level`` surface of a 3D density by marching cubes.

    The density is sampled at element centres and padded with a layer of void, so the
    surface is closed where the part touches the domain boundary.

    Smoothing never moves the part out of its design domain: vertices on a domain face
    keep their coordinate across that face (they may slide within it), every vertex is
    kept inside the domain box, and vertices within one element size of a
    ``keep_points`` point (e.g. the restrained nodes) do not move at all.

    Parameters
    ----------
    density : ndarray, shape (nx, ny, nz)
        Element densities (or booleans).
    element_size : float
        Element edge length; vertices come out in that unit.
    level : float
        Iso-level, strictly between 0 and 1.
    smoothing_iterations : int
        Taubin smoothing passes (0 = none); see :func:`taubin_smooth`.
    keep_points : ndarray (k, 3), optional
        Points (e.g. restrained nodes) near which smoothing leaves the surface in place.

    Returns
    -------
    vertices : ndarray (n, 3)
    faces : ndarray (m, 3)
        Outward-oriented triangles.

    Examples
    --------
    >>> cube = np.zeros((4, 4, 4)); cube[1:3, 1:3, 1:3] = 1.0
    >>> v, f = isosurface(cube, element_size=1.0)
    >>> is_closed(f), mesh_volume(v, f) > 0
    (True, True)
    """
    from skimage import measure

    density = np.asarray(density, dtype=float)
    if density.ndim != 3:
        raise ValueError(f"density must be a 3D array, got shape {density.shape}")
    if not np.all(np.isfinite(density)):
        raise ValueError("density holds NaN or infinite values")
    h = float(element_size)
    if not h > 0:
        raise ValueError(f"element_size must be positive, got {element_size}")
    if not 0.0 < float(level) < 1.0:
        raise ValueError(f"level must lie strictly between 0 and 1, got {level}")
    if int(smoothing_iterations) < 0:
        raise ValueError(f"smoothing_iterations must be >= 0, got {smoothing_iterations}")
    if not np.any(density > level):
        raise ValueError(f"density never exceeds the level {level}: no surface to mesh")
    padded = np.pad(density, 1, constant_values=0.0)
    vertices, faces, _, _ = measure.marching_cubes(
        padded, level=float(level), spacing=(h, h, h), allow_degenerate=False
    )
    # padded sample i sits at the centre of element i - 1, i.e. at (i - 0.5) h
    vertices = vertices.astype(float) - 0.5 * h
    faces = faces.astype(np.int64)
    if mesh_volume(vertices, faces) < 0:
        faces = faces[:, [0, 2, 1]]
    if smoothing_iterations:
        size = np.array(density.shape, dtype=float) * h
        tol = 1e-9 * h
        # a coordinate on a domain face stays on it; marching cubes puts such vertices
        # exactly on the face (the crossing of a full element and the void padding)
        held = (np.abs(vertices) <= tol) | (np.abs(vertices - size) <= tol)
        if keep_points is not None and len(keep_points):
            from scipy.spatial import cKDTree

            points = np.asarray(keep_points, dtype=float).reshape(-1, 3)
            near = np.isfinite(cKDTree(points).query(vertices, distance_upper_bound=h * (1 + 1e-9))[0])
            held[near] = True
        vertices = taubin_smooth(vertices, faces, iterations=int(smoothing_iterations),
                                 held=held, bounds=(np.zeros(3), size))
    return vertices, faces


def taubin_smooth(
    vertices: np.ndarray,
    faces: np.ndarray,
    *,
    iterations: int = 10,
    lam: float = 0.5,
    mu: float = -0.53,
    keep_volume: bool = True,
    held: np.ndarray | None = None,
    bounds: tuple[np.ndarray, np.ndarray] | None = None,
) -> np.ndarray:
    """Taubin lambda/mu smoothing with the umbrella operator, volume kept.

    Each pass moves every vertex ``lam`` of the way to the mean of its neighbours, then
    ``mu`` (negative) of the way back, which removes the voxel staircase without the
    steady shrinking of plain Laplacian smoothing (Taubin, "A signal processing approach
    to fair surface design", SIGGRAPH 1995). What shrinkage is left is undone
    (``keep_volume``): by scaling about the centroid when nothing is held, otherwise by
    moving the free coordinates along the vertex normals by one common offset.

    ``held`` (bool, shape of ``vertices`` or (n,)) marks coordinates (or whole vertices)
    that never move; ``bounds`` = (low, high) keeps every vertex inside a box.

    Examples
    --------
    >>> cube = np.zeros((6, 6, 6)); cube[1:5, 1:5, 1:5] = 1.0
    >>> v, f = isosurface(cube, element_size=1.0)
    >>> vs = taubin_smooth(v, f, iterations=5)
    >>> round(mesh_volume(vs, f) / mesh_volume(v, f), 6)
    1.0
    """
    from scipy import sparse

    vertices, faces = _check_mesh(vertices, faces)
    if not mu < -lam < 0:
        raise ValueError(f"Taubin smoothing needs 0 < lam < -mu, got lam={lam}, mu={mu}")
    n = len(vertices)
    edges = _directed_edges(faces)
    adjacency = sparse.coo_matrix(
        (np.ones(len(edges)), (edges[:, 0], edges[:, 1])), shape=(n, n)
    ).tocsr()
    adjacency = ((adjacency + adjacency.T) > 0).astype(float)
    degree = np.asarray(adjacency.sum(axis=1)).ravel()
    degree[degree == 0] = 1.0
    mean_of_neighbours = sparse.diags(1.0 / degree) @ adjacency
    volume_before = mesh_volume(vertices, faces)
    free = np.ones_like(vertices, dtype=bool)
    if held is not None:
        held = np.asarray(held, dtype=bool)
        free &= ~(held[:, None] if held.ndim == 1 else held)

    def limit(points: np.ndarray) -> np.ndarray:
        points = np.where(free, points, vertices)
        return points if bounds is None else np.clip(points, bounds[0], bounds[1])

    out = vertices.copy()
    for _ in range(int(iterations)):
        out = limit(out + lam * (mean_of_neighbours @ out - out))
        out = limit(out + mu * (mean_of_neighbours @ out - out))
    if keep_volume and volume_before > 0:
        if free.all():
            volume_after = mesh_volume(out, faces)
            if volume_after > 0:
                centre = out.mean(axis=0)
                scaled = centre + (out - centre) * (volume_before / volume_after) ** (1.0 / 3.0)
                out = limit(scaled)
                if not np.array_equal(out, scaled):  # the box cut it: offset instead
                    out = _restore_volume(out, faces, volume_before, limit, free)
        else:
            out = _restore_volume(out, faces, volume_before, limit, free)
    return out


def _restore_volume(vertices, faces, target, limit, free, *, steps: int = 8) -> np.ndarray:
    """Offset the free coordinates along the vertex normals until the volume is ``target``.

    dV/dt = area swept by the free part of the surface, so each step is a Newton step
    t = (target - V) / A_free; clamping to the bounds may leave a small remainder.
    """
    out = vertices
    for _ in range(steps):
        gap = target - mesh_volume(out, faces)
        if abs(gap) <= 1e-12 * abs(target):
            break
        a, b, c = (out[faces[:, i]] for i in range(3))
        weighted = np.cross(b - a, c - a) / 2.0  # face normal times area
        normals = np.zeros_like(out)
        for i in range(3):
            np.add.at(normals, faces[:, i], weighted / 3.0)  # area-weighted vertex normal
        normals = np.where(free, normals, 0.0)
        swept = float(np.sum(np.linalg.norm(normals, axis=1)))
        if swept <= 0:
            break
        unit = np.divide(normals, np.linalg.norm(normals, axis=1, keepdims=True),
                         out=np.zeros_like(normals),
                         where=np.linalg.norm(normals, axis=1, keepdims=True) > 0)
        moved = limit(out + unit * (gap / swept))
        if np.allclose(moved, out, rtol=0, atol=0):
            break
        out = moved
    return out


# ------------------------------------------------------------------ 2D extrusion
def extrude_contour(
    density2d: np.ndarray,
    *,
    element_size: float,
    thickness: float,
    level: float = 0.5,
) -> tuple[np.ndarray, np.ndarray]:
    """Mesh the ``level`` contour of a 2D density, extruded to ``thickness``, as a closed solid.

    The cross-section is cut cell by cell with marching squares on the element-centre
    samples (padded with void so the contour closes); each cell's inside polygon gives
    the two caps at z = 0 and z = thickness and each contour segment one wall quad.
    A saddle cell is joined when the mean of its four corners exceeds the level.

    Examples
    --------
    >>> square = np.zeros((4, 4)); square[1:3, 1:3] = 1.0
    >>> v, f = extrude_contour(square, element_size=1.0, thickness=2.0)
    >>> is_closed(f), round(mesh_volume(v, f), 3)   # 2 x 2 square less 4 corner triangles
    (True, 7.0)
    """
    density = np.asarray(density2d, dtype=float)
    if density.ndim != 2:
        raise ValueError(f"density2d must be a 2D array, got shape {density.shape}")
    if not np.all(np.isfinite(density)):
        raise ValueError("density2d holds NaN or infinite values")
    h, t = float(element_size), float(thickness)
    if not h > 0 or not t > 0:
        raise ValueError(f"element_size and thickness must be positive, got {h}, {t}")
    if not 0.0 < float(level) < 1.0:
        raise ValueError(f"level must lie strictly between 0 and 1, got {level}")
    if not np.any(density > level):
        raise ValueError(f"density never exceeds the level {level}: no contour to extrude")
    values = np.pad(density, 1, constant_values=0.0)
    inside = values > level
    points: list[tuple[float, float]] = []
    index: dict[tuple, int] = {}

    def corner(i: int, j: int) -> int:
        key = ("c", i, j)
        if key not in index:
            index[key] = len(points)
            points.append(((i - 0.5) * h, (j - 0.5) * h))
        return index[key]

    def crossing(i: int, j: int, axis: int) -> int:
        # edge from sample (i, j) to the next sample along axis
        key = ("e", i, j, axis)
        if key not in index:
            i2, j2 = (i + 1, j) if axis == 0 else (i, j + 1)
            va, vb = values[i, j], values[i2, j2]
            s = (level - va) / (vb - va)
            xa, ya = (i - 0.5) * h, (j - 0.5) * h
            index[key] = len(points)
            points.append((xa + s * h * (axis == 0), ya + s * h * (axis == 1)))
        return index[key]

    polygons: list[list[tuple[bool, int]]] = []  # (is_crossing, vertex)
    active = inside[:-1, :-1] | inside[1:, :-1] | inside[1:, 1:] | inside[:-1, 1:]
    for i, j in zip(*np.nonzero(active), strict=True):
        i, j = int(i), int(j)
        cells = [(i, j), (i + 1, j), (i + 1, j + 1), (i, j + 1)]  # counter-clockwise
        edge_keys = [(i, j, 0), (i + 1, j, 1), (i, j + 1, 0), (i, j, 1)]
        flags = [bool(inside[c]) for c in cells]
        ring: list[tuple[bool, int]] = []
        for k in range(4):
            if flags[k]:
                ring.append((False, corner(*cells[k])))
            if flags[k] != flags[(k + 1) % 4]:
                ring.append((True, crossing(*edge_keys[k])))
        saddle = flags in ([True, False, True, False], [False, True, False, True])
        centre = float(np.mean([values[c] for c in cells]))
        if saddle and centre <= level:
            # split the hexagon into the two corner triangles around the inside corners
            start = 0 if not ring[0][0] else 1
            ring = ring[start:] + ring[:start]
            corner_at = [n for n, (is_x, _) in enumerate(ring) if not is_x]
            for n in corner_at:
                polygons.append([ring[n - 1], ring[n], ring[(n + 1) % len(ring)]])
        else:
            polygons.append(ring)

    xy = np.asarray(points, dtype=float)
    n2 = len(xy)
    vertices = np.vstack(
        [np.column_stack([xy, np.zeros(n2)]), np.column_stack([xy, np.full(n2, t)])]
    )
    tris: list[tuple[int, int, int]] = []
    for poly in polygons:
        ids = [v for _, v in poly]
        for k in range(1, len(ids) - 1):
            tris.append((ids[0] + n2, ids[k] + n2, ids[k + 1] + n2))  # top, normal +z
            tris.append((ids[0], ids[k + 1], ids[k]))  # bottom, normal -z
        for k in range(len(poly)):
            (a_x, a), (b_x, b) = poly[k], poly[(k + 1) % len(poly)]
            if a_x and b_x:
                # contour segment a -> b runs with the inside on its left: wall faces right
                tris.append((a, b, b + n2))
                tris.append((a, b + n2, a + n2))
    return vertices, np.asarray(tris, dtype=np.int64)


# ------------------------------------------------------------------------- STL
def _face_normals(vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    a, b, c = (vertices[faces[:, i]] for i in range(3))
    normal = np.cross(b - a, c - a)
    length = np.linalg.norm(normal, axis=1, keepdims=True)
    return np.divide(normal, length, out=np.zeros_like(normal), where=length > 0)


_STL_RECORD = np.dtype(
    [("normal", "<f4", (3,)), ("vertices", "<f4", (3, 3)), ("attribute", "<u2")]
)


def write_stl(path: str | os.PathLike, vertices: np.ndarray, faces: np.ndarray) -> Path:
    """Write a binary STL file (written to a temporary file, then renamed).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
    >>> f = np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]])
    >>> p = write_stl(pathlib.Path(tempfile.mkdtemp()) / "t.stl", v, f)
    >>> p.stat().st_size
    284
    """
    vertices, faces = _check_mesh(vertices, faces)
    path = Path(path)
    records = np.zeros(len(faces), dtype=_STL_RECORD)
    records["normal"] = _face_normals(vertices, faces)
    records["vertices"] = vertices[faces]
    header = b"buttress binary STL".ljust(80, b" ")
    from topopt.files import atomic_write

    def write(handle) -> None:
        handle.write(header)
        handle.write(np.uint32(len(faces)).tobytes())
        handle.write(records.tobytes())

    atomic_write(path, write)
    return path


def _parse_ascii_stl(text: str, name: str) -> np.ndarray:
    tokens = text.split()
    triangles: list[list[float]] = []
    pos = 0

    def expect(word: str) -> None:
        nonlocal pos
        if pos >= len(tokens) or tokens[pos].lower() != word:
            found = tokens[pos] if pos < len(tokens) else "end of file"
            raise ValueError(f"{name}: ASCII STL: expected '{word}', found '{found[:40]}'")
        pos += 1

    def number() -> float:
        nonlocal pos
        if pos >= len(tokens):
            raise ValueError(f"{name}: ASCII STL: a number is missing at the end of the file")
        try:
            value = float(tokens[pos])
        except ValueError:
            raise ValueError(
                f"{name}: ASCII STL: expected a number, found '{tokens[pos][:40]}'"
            ) from None
        if not np.isfinite(value):
            raise ValueError(f"{name}: ASCII STL: coordinates must be finite numbers")
        pos += 1
        return value

    while pos < len(tokens):
        expect("solid")
        while pos < len(tokens) and tokens[pos].lower() not in ("facet", "endsolid"):
            pos += 1  # the solid's name
        while pos < len(tokens) and tokens[pos].lower() == "facet":
            pos += 1
            expect("normal")
            for _ in range(3):
                number()
            expect("outer")
            expect("loop")
            triangle = []
            for _ in range(3):
                expect("vertex")
                triangle.extend(number() for _ in range(3))
            expect("endloop")
            expect("endfacet")
            triangles.append(triangle)
            if len(triangles) > MAX_STL_TRIANGLES:
                raise ValueError(f"{name}: more than {MAX_STL_TRIANGLES} triangles")
        expect("endsolid")
        # an optional name after endsolid, up to the next solid if any
        while pos < len(tokens) and tokens[pos].lower() != "solid":
            pos += 1
    return np.asarray(triangles, dtype=float).reshape(-1, 3, 3)


def read_stl(path: str | os.PathLike) -> tuple[np.ndarray, np.ndarray]:
    """Read a binary or ASCII STL file into shared vertices and faces.

    The file is parsed as data; anything malformed raises ``ValueError`` naming the
    file. Identical corner coordinates are merged into one vertex.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
    >>> f = np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]])
    >>> p = write_stl(pathlib.Path(tempfile.mkdtemp()) / "t.stl", v, f)
    >>> v2, f2 = read_stl(p)
    >>> len(v2), len(f2), is_closed(f2)
    (4, 4, True)
    """
    path = Path(path)
    name = str(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise ValueError(f"{name}: cannot read the STL file ({exc.strerror})") from None
    triangles = None
    if len(data) >= 84:
        count = int(np.frombuffer(data, dtype="<u4", count=1, offset=80)[0])
        if len(data) == 84 + 50 * count:
            if count > MAX_STL_TRIANGLES:
                raise ValueError(f"{name}: more than {MAX_STL_TRIANGLES} triangles")
            records = np.frombuffer(data, dtype=_STL_RECORD, count=count, offset=84)
            triangles = records["vertices"].astype(float)
    if triangles is None:
        head = data[:512].lstrip().lower()
        if not head.startswith(b"solid"):
            raise ValueError(
                f"{name}: not an STL file (neither a binary STL of consistent size "
                "nor ASCII text starting with 'solid')"
            )
        try:
            text = data.decode("ascii")
        except UnicodeDecodeError:
            raise ValueError(f"{name}: ASCII STL holds non-ASCII bytes") from None
        triangles = _parse_ascii_stl(text, name)
    if len(triangles) == 0:
        raise ValueError(f"{name}: the STL file holds no triangles")
    if not np.all(np.isfinite(triangles)):
        raise ValueError(f"{name}: the STL file holds NaN or infinite coordinates")
    vertices, inverse = np.unique(triangles.reshape(-1, 3), axis=0, return_inverse=True)
    faces = inverse.reshape(-1, 3).astype(np.int64)
    keep = (faces[:, 0] != faces[:, 1]) & (faces[:, 1] != faces[:, 2]) & (
        faces[:, 0] != faces[:, 2]
    )
    return vertices, faces[keep]


# ------------------------------------------------------------------- voxeliser
def voxelize(
    vertices: np.ndarray,
    faces: np.ndarray,
    *,
    element_size: float,
    origin: np.ndarray | None = None,
    shape: tuple[int, int, int] | None = None,
    max_voxels: int = 200_000_000,
) -> np.ndarray:
    """Voxels whose centre lies inside a closed triangle mesh, by ray parity.

    A ray runs along +z through each column of voxel centres; the centres below an
    odd number of crossings are inside. Rays are shifted by a tiny irrational offset
    so that they do not run exactly through mesh edges or vertices laid on the grid.

    Parameters
    ----------
    vertices, faces : ndarray
        A closed triangle mesh (orientation does not matter).
    element_size : float
        Voxel edge length.
    origin : array of 3 floats, optional
        Corner of voxel (0, 0, 0); the mesh's lowest corner by default.
    shape : tuple of 3 ints, optional
        Number of voxels; enough to cover the mesh by default.
    max_voxels : int
        Refuse grids larger than this (a guard against a tiny element size).

    Returns
    -------
    ndarray of bool, indexed (x, y, z)

    Examples
    --------
    >>> v = np.array([[0, 0, 0], [2, 0, 0], [0, 2, 0], [0, 0, 2]], float)
    >>> f = np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]])
    >>> int(voxelize(v, f, element_size=0.5).sum())   # centres with x + y + z < 2
    10
    """
    vertices, faces = _check_mesh(vertices, faces)
    h = float(element_size)
    if not h > 0 or not np.isfinite(h):
        raise ValueError(f"element_size must be a positive number, got {element_size}")
    if len(faces) == 0:
        raise ValueError("the mesh has no faces")
    low = vertices.min(axis=0) if origin is None else np.asarray(origin, dtype=float)
    if shape is None:
        with np.errstate(over="ignore"):
            cells = (vertices.max(axis=0) - low) / h
        if not np.all(np.isfinite(cells)) or cells.max() > max_voxels:
            raise ValueError(f"element_size {h} gives more than the limit of {max_voxels} "
                             "voxels for the extent of the surface")
        shape = tuple(int(max(1, np.ceil(e - 1e-9))) for e in cells)
    shape = tuple(int(s) for s in shape)
    if len(shape) != 3 or min(shape) < 1:
        raise ValueError(f"shape must be three positive integers, got {shape}")
    if math.prod(shape) > max_voxels:  # Python integers: no wrap-round
        raise ValueError(
            f"element_size {h} gives {shape} voxels, more than the limit of {max_voxels}"
        )
    nx, ny, nz = shape
    # grid coordinates of the vertices, rays shifted off any rational grid position
    g = (vertices - low) / h - 0.5
    g[:, 0] -= 1e-6 * np.sqrt(2.0)
    g[:, 1] -= 1e-6 * np.sqrt(3.0)
    tri = g[faces]  # (m, 3 corners, 3)
    ax, ay = tri[:, :, 0], tri[:, :, 1]
    i0 = np.clip(np.ceil(ax.min(axis=1)), 0, nx).astype(np.int64)
    i1 = np.clip(np.floor(ax.max(axis=1)), -1, nx - 1).astype(np.int64)
    j0 = np.clip(np.ceil(ay.min(axis=1)), 0, ny).astype(np.int64)
    j1 = np.clip(np.floor(ay.max(axis=1)), -1, ny - 1).astype(np.int64)
    ni = np.maximum(i1 - i0 + 1, 0)
    nj = np.maximum(j1 - j0 + 1, 0)
    counts = ni * nj
    crossings = np.zeros((nx, ny, nz + 1), dtype=np.int32)
    chunk_start = 0
    cumulative = np.cumsum(counts)
    # process triangles in chunks of about a few million candidate rays
    while chunk_start < len(faces):
        base = cumulative[chunk_start - 1] if chunk_start else 0
        chunk_end = int(np.searchsorted(cumulative, base + 4_000_000, side="right"))
        chunk_end = max(chunk_end, chunk_start + 1)
        sel = np.arange(chunk_start, min(chunk_end, len(faces)))
        chunk_start = int(sel[-1]) + 1
        c = counts[sel]
        if c.sum() == 0:
            continue
        owner = np.repeat(sel, c)
        local = np.arange(c.sum()) - np.repeat(np.cumsum(c) - c, c)
        ii = i0[owner] + local // nj[owner]
        jj = j0[owner] + local % nj[owner]
        t = tri[owner]
        x0, y0 = t[:, 0, 0], t[:, 0, 1]
        e1x, e1y = t[:, 1, 0] - x0, t[:, 1, 1] - y0
        e2x, e2y = t[:, 2, 0] - x0, t[:, 2, 1] - y0
        det = e1x * e2y - e1y * e2x
        px, py = ii - x0, jj - y0
        # faces seen edge-on from the ray (det == 0) are never crossed
        safe = np.where(det != 0, det, 1.0)
        u = (px * e2y - py * e2x) / safe
        w = (e1x * py - e1y * px) / safe
        hit = (det != 0) & (u >= 0) & (w >= 0) & (u + w <= 1)
        t, u, w = t[hit], u[hit], w[hit]
        z = t[:, 0, 2] + u * (t[:, 1, 2] - t[:, 0, 2]) + w * (t[:, 2, 2] - t[:, 0, 2])
        # the crossing toggles every centre above it: centres k with k > z
        k = np.clip(np.floor(z) + 1, 0, nz).astype(np.int64)
        np.add.at(crossings, (ii[hit], jj[hit], k), 1)
    parity = np.cumsum(crossings, axis=2)[:, :, :nz] % 2
    return parity.astype(bool)


def write_design_stl(
    path: str | os.PathLike,
    density: np.ndarray,
    *,
    element_size: float,
    thickness: float = 1.0,
    smoothing_iterations: int = 0,
    keep_points: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Write the printable surface of a design as binary STL and return the mesh.

    A 3D density gives its closed 0.5 surface by :func:`isosurface` (with optional
    Taubin passes); a 2D density gives its 0.5 contour extruded to ``thickness`` by
    :func:`extrude_contour` (smoothing does not apply).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = np.zeros((3, 3)); d[1, 1] = 1.0
    >>> v, f = write_design_stl(pathlib.Path(tempfile.mkdtemp()) / "d.stl", d,
    ...                         element_size=1.0, thickness=2.0)
    >>> is_closed(f), round(mesh_volume(v, f), 3)   # a diamond of area 0.5, 2 thick
    (True, 1.0)
    """
    density = np.asarray(density, dtype=float)
    if density.ndim == 3:
        vertices, faces = isosurface(
            density, element_size=element_size, smoothing_iterations=smoothing_iterations,
            keep_points=keep_points,
        )
    elif density.ndim == 2:
        vertices, faces = extrude_contour(density, element_size=element_size, thickness=thickness)
    else:
        raise ValueError(f"density must be a 2D or 3D array, got shape {density.shape}")
    write_stl(path, vertices, faces)
    return vertices, faces
