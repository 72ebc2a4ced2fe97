"""Surfaces: marching cubes, smoothing, extrusion, STL and the voxeliser."""

import math

import numpy as np
import pytest

from topopt.surface import (
    extrude_contour,
    is_closed,
    is_consistently_oriented,
    isosurface,
    mesh_area,
    mesh_volume,
    open_edges,
    read_stl,
    taubin_smooth,
    voxelize,
    write_stl,
)


def sphere_density(n, *, radius_cells, sharp=False):
    """Density of a sphere centred in an n^3 grid (h = 1), with a one-cell linear ramp
    at the surface like a filtered design (or 0/1 when ``sharp``)."""
    x = np.arange(n) + 0.5
    X, Y, Z = np.meshgrid(x, x, x, indexing="ij")
    d = np.sqrt((X - n / 2) ** 2 + (Y - n / 2) ** 2 + (Z - n / 2) ** 2)
    if sharp:
        return (d < radius_cells).astype(float), d
    return np.clip(0.5 + (radius_cells - d), 0.0, 1.0), d


@pytest.mark.parametrize("sharp", [False, True])
def test_sphere_mesh_volume_closed_and_oriented(sharp):
    # Geometry: 4/3 pi r^3 at 40 elements across, within 1 %; a closed surface has every
    # edge on two faces (common practice), outward orientation gives a positive volume.
    density, _ = sphere_density(44, radius_cells=20.0, sharp=sharp)
    v, f = isosurface(density, element_size=0.5)
    exact = 4.0 / 3.0 * math.pi * (20.0 * 0.5) ** 3
    assert mesh_volume(v, f) == pytest.approx(exact, rel=0.01)
    assert is_closed(f) and is_consistently_oriented(f)
    # coordinates follow the grid: the centre of the sphere is at 22 elements
    assert v.mean(axis=0) == pytest.approx([11.0, 11.0, 11.0], abs=0.05)


def test_part_touching_the_domain_boundary_is_closed():
    # The padding closes the surface where the part fills the domain; a full block of
    # 3 x 4 x 5 elements gives a box surface (marching cubes cuts the 12 edges and
    # 8 corners at the element-centre samples, so the volume is a little less).
    v, f = isosurface(np.ones((3, 4, 5)), element_size=2.0)
    assert is_closed(f) and is_consistently_oriented(f)
    assert np.allclose(v.min(axis=0), 0.0) and np.allclose(v.max(axis=0), [6.0, 8.0, 10.0])
    assert 0.9 * 480 < mesh_volume(v, f) < 480


def test_random_designs_give_closed_oriented_surfaces():
    rng = np.random.default_rng(1)
    density = rng.random((9, 8, 7))
    v, f = isosurface(density, element_size=1.0)
    assert open_edges(f) == 0 and is_consistently_oriented(f)
    assert mesh_volume(v, f) > 0


def test_taubin_smoothing_removes_staircase_without_shrinking():
    # Taubin, "A signal processing approach to fair surface design", SIGGRAPH 1995:
    # lambda/mu passes smooth without the shrinkage of plain Laplacian smoothing; our
    # volume correction keeps the volume. The surface of a voxel sphere gets closer to
    # the true sphere.
    density, _ = sphere_density(24, radius_cells=9.0, sharp=True)
    v, f = isosurface(density, element_size=1.0)
    vs = taubin_smooth(v, f, iterations=10)
    centre = np.full(3, 12.0)
    rough = np.std(np.linalg.norm(v - centre, axis=1))
    smooth = np.std(np.linalg.norm(vs - centre, axis=1))
    assert smooth < 0.7 * rough
    assert mesh_volume(vs, f) == pytest.approx(mesh_volume(v, f), rel=1e-9)
    # smoothing through isosurface() gives the same mesh
    v2, f2 = isosurface(density, element_size=1.0, smoothing_iterations=10)
    assert np.allclose(v2, vs) and np.array_equal(f2, f)


def test_extruded_disk_and_ring():
    # Geometry: a disk of radius r extruded to t has volume pi r^2 t; a ring's hole is
    # a second closed wall.
    h, t = 0.5, 3.0
    x = (np.arange(60) + 0.5) * h
    X, Y = np.meshgrid(x, x, indexing="ij")
    d = np.hypot(X - 15.0, Y - 15.0)
    v, f = extrude_contour(np.clip(0.5 + (10.0 - d) / h, 0, 1), element_size=h, thickness=t)
    assert mesh_volume(v, f) == pytest.approx(math.pi * 100.0 * t, rel=0.01)
    assert is_closed(f) and is_consistently_oriented(f)
    assert v[:, 2].min() == 0.0 and v[:, 2].max() == t
    ring = np.clip(0.5 + (10.0 - d) / h, 0, 1) * np.clip(0.5 + (d - 5.0) / h, 0, 1)
    v, f = extrude_contour(ring, element_size=h, thickness=t)
    assert is_closed(f) and is_consistently_oriented(f)
    assert mesh_volume(v, f) == pytest.approx(math.pi * 75.0 * t, rel=0.02)


def test_extrusion_of_random_and_saddle_fields_is_closed():
    rng = np.random.default_rng(2)
    v, f = extrude_contour(rng.random((25, 20)), element_size=1.0, thickness=0.7)
    assert is_closed(f) and is_consistently_oriented(f) and mesh_volume(v, f) > 0
    checker = np.indices((6, 6)).sum(axis=0) % 2 == 0  # every inner cell is a saddle
    v, f = extrude_contour(checker.astype(float), element_size=1.0, thickness=1.0)
    assert is_closed(f) and is_consistently_oriented(f)


def test_stl_round_trip_binary_and_ascii(tmp_path):
    density, _ = sphere_density(12, radius_cells=4.0)
    v, f = isosurface(density, element_size=1.0)
    path = write_stl(tmp_path / "s.stl", v, f)
    v2, f2 = read_stl(path)
    assert len(f2) == len(f) and is_closed(f2) and is_consistently_oriented(f2)
    assert mesh_volume(v2, f2) == pytest.approx(mesh_volume(v, f), rel=1e-5)  # float32
    # the same mesh as ASCII text, written here by hand
    lines = ["solid test part"]
    for tri in v[f]:
        lines += ["  facet normal 0 0 0", "    outer loop"]
        lines += [f"      vertex {x:.17g} {y:.17g} {z:.17g}" for x, y, z in tri]
        lines += ["    endloop", "  endfacet"]
    lines.append("endsolid test part")
    (tmp_path / "a.stl").write_text("\n".join(lines))
    v3, f3 = read_stl(tmp_path / "a.stl")
    assert is_closed(f3) and mesh_volume(v3, f3) == pytest.approx(mesh_volume(v, f))


@pytest.mark.parametrize(
    "content, match",
    [
        (b"", "not an STL"),
        (b"\x00" * 80 + (5).to_bytes(4, "little") + b"\x00" * 60, "not an STL"),
        (b"solid x\n facet normal 0 0 0\n outer loop\n vertex 0 0\n", "number"),
        (b"solid x\n facet normal 0 0 0\n outer loop\n vertex 0 0 nan\n", "finite"),
        (b"solid x\n facet normal 0 0 0\n outer loop\n vertex 0 0 0\n endsolid", "vertex"),
        (b"solid x\nendsolid x\n", "no triangles"),
        (b"solid \xff\n", "non-ASCII"),
        (b"hello world", "not an STL"),
    ],
)
def test_bad_stl_files_raise_one_clear_error(tmp_path, content, match):
    path = tmp_path / "bad.stl"
    path.write_bytes(content)
    with pytest.raises(ValueError, match=match):
        read_stl(path)


def test_missing_stl_file(tmp_path):
    with pytest.raises(ValueError, match="cannot read"):
        read_stl(tmp_path / "none.stl")


def box_mesh(low, high):
    """12 outward triangles of an axis-aligned box."""
    (x0, y0, z0), (x1, y1, z1) = low, high
    v = np.array([[x, y, z] for z in (z0, z1) for y in (y0, y1) for x in (x0, x1)], float)
    f = np.array([[0, 2, 1], [1, 2, 3], [4, 5, 6], [5, 7, 6], [0, 1, 4], [1, 5, 4],
                  [2, 6, 3], [3, 6, 7], [0, 4, 2], [2, 4, 6], [1, 3, 5], [3, 7, 5]])
    return v, f


def icosphere(radius, centre, levels):
    t = (1 + 5**0.5) / 2
    v = [[-1, t, 0], [1, t, 0], [-1, -t, 0], [1, -t, 0], [0, -1, t], [0, 1, t],
         [0, -1, -t], [0, 1, -t], [t, 0, -1], [t, 0, 1], [-t, 0, -1], [-t, 0, 1]]
    f = [[0, 11, 5], [0, 5, 1], [0, 1, 7], [0, 7, 10], [0, 10, 11], [1, 5, 9], [5, 11, 4],
         [11, 10, 2], [10, 7, 6], [7, 1, 8], [3, 9, 4], [3, 4, 2], [3, 2, 6], [3, 6, 8],
         [3, 8, 9], [4, 9, 5], [2, 4, 11], [6, 2, 10], [8, 6, 7], [9, 8, 1]]
    v = [np.array(p, float) / np.linalg.norm(p) for p in v]
    for _ in range(levels):
        cache, new_f = {}, []

        def mid(a, b, v=v, cache=cache):
            key = (min(a, b), max(a, b))
            if key not in cache:
                p = v[a] + v[b]
                v.append(p / np.linalg.norm(p))
                cache[key] = len(v) - 1
            return cache[key]

        for a, b, c in f:
            ab, bc, ca = mid(a, b), mid(b, c), mid(c, a)
            new_f += [[a, ab, ca], [b, bc, ab], [c, ca, bc], [ab, bc, ca]]
        f = new_f
    return np.array(v) * radius + centre, np.array(f)


def test_voxeliser_matches_analytic_box_and_sphere(tmp_path):
    # Ray parity (common practice): the voxels of a box / sphere written to STL are the
    # voxels whose centre lies inside the analytic shape.
    h = 0.5
    v, f = box_mesh((1.0, 0.5, 2.0), (4.5, 3.0, 6.0))  # on voxel boundaries
    write_stl(tmp_path / "box.stl", v, f)
    vb, fb = read_stl(tmp_path / "box.stl")
    vox = voxelize(vb, fb, element_size=h, origin=np.zeros(3), shape=(12, 10, 14))
    expected = np.zeros((12, 10, 14), dtype=bool)
    expected[2:9, 1:6, 4:12] = True
    assert np.array_equal(vox, expected)
    # default origin and shape: the mesh's bounding box
    assert np.array_equal(voxelize(vb, fb, element_size=h), expected[2:9, 1:6, 4:12])

    radius, centre = 4.3, np.array([5.5, 5.5, 5.5])
    v, f = icosphere(radius, centre, 4)
    write_stl(tmp_path / "sphere.stl", v, f)
    vs, fs = read_stl(tmp_path / "sphere.stl")
    assert is_closed(fs)
    shape = (22, 22, 22)
    x = (np.arange(22) + 0.5) * h
    X, Y, Z = np.meshgrid(x, x, x, indexing="ij")
    d = np.sqrt((X - centre[0]) ** 2 + (Y - centre[1]) ** 2 + (Z - centre[2]) ** 2)
    # the inscribed polyhedron lies within sag of the sphere; no centre falls in that band
    edge = np.linalg.norm(v[f[:, 0]] - v[f[:, 1]], axis=1).max()
    sag = edge**2 / (2 * radius)
    assert not np.any((d > radius - sag) & (d < radius))
    vox = voxelize(vs, fs, element_size=h, origin=np.zeros(3), shape=shape)
    assert np.array_equal(vox, d < radius)


def test_voxeliser_inverts_marching_cubes():
    # Identity: at level 0.5 marching cubes separates the 0/1 samples, so the element
    # centres inside the surface are exactly the solid elements.
    rng = np.random.default_rng(3)
    solid = rng.random((10, 9, 8)) > 0.55
    v, f = isosurface(solid.astype(float), element_size=0.25)
    vox = voxelize(v, f, element_size=0.25, origin=np.zeros(3), shape=solid.shape)
    assert np.array_equal(vox, solid)


def test_mesh_helpers_on_a_unit_cube():
    v, f = box_mesh((0, 0, 0), (1, 2, 3))
    assert mesh_volume(v, f) == pytest.approx(6.0)
    assert mesh_area(v, f) == pytest.approx(22.0)
    assert is_closed(f) and is_consistently_oriented(f)
    assert not is_consistently_oriented(np.vstack([f[:-1], f[-1:, ::-1]]))
    assert open_edges(f[:-1]) == 3


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda: isosurface(np.ones((3, 3)), element_size=1.0), "3D"),
        (lambda: isosurface(np.zeros((3, 3, 3)), element_size=1.0), "no surface"),
        (lambda: isosurface(np.ones((3, 3, 3)), element_size=0.0), "element_size"),
        (lambda: isosurface(np.ones((3, 3, 3)), element_size=1.0, level=1.5), "level"),
        (lambda: extrude_contour(np.ones((3, 3, 3)), element_size=1, thickness=1), "2D"),
        (lambda: extrude_contour(np.ones((3, 3)), element_size=1, thickness=0), "thickness"),
        (lambda: voxelize(*box_mesh((0, 0, 0), (1, 1, 1)), element_size=1e-4), "limit"),
        (lambda: write_stl("x.stl", np.zeros((3, 2)), np.array([[0, 1, 2]])), "vertices"),
    ],
)
def test_bad_arguments(call, match):
    with pytest.raises(ValueError, match=match):
        call()
