"""Any build direction: independent checks of optimised designs, inspect on tilted parts,
the orientation search, keep-in regions held up by the design, and bad input."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from filters.direction import element_heights, plate_level, unit_vector
from filters.printability import support_stencil, supported_mask
from topopt.build import analyze_design
from topopt.cli import main
from topopt.driver import optimize
from topopt.problem import problem_from_dict

CANTILEVER_2D = {
    "name": "tilted cantilever (invented)",
    "domain": {"shape": [36, 24], "element_size": 1.0},
    "material": {"youngs_modulus": 1.0, "poisson_ratio": 0.3},
    "restraints": [{"where": {"x": [0.0, 0.0]}, "fix": ["x", "y"]}],
    "loads": [{"where": {"x": [36.0, 36.0], "y": [10.0, 14.0]}, "force": [0.0, -1.0]}],
    "optimize": {"volume_fraction": 0.4, "filter_radius": 1.5, "max_iterations": 400},
}


def held_check(solid: np.ndarray, direction, angle: float, reach: float) -> np.ndarray:
    """Independent plain check (not the filter's code): visit elements by height; an
    element is held when it rests on the plate, or a held solid element (or the plate:
    any place whose centre is not above it) lies within ``reach`` of it inside the cone
    of half-angle 90 - angle below it. Returns the solid elements that are not held."""
    d = unit_vector(direction, solid.ndim)
    heights = element_heights(solid.shape, d)
    plate = plate_level(solid.shape, d)
    half = 0.5 * float(np.abs(d).sum())
    cos_half = math.cos(math.radians(90.0 - angle))
    held = np.zeros_like(solid)
    r = int(math.ceil(reach))
    span = range(-r, r + 1)
    offsets = [np.array(o) for o in np.ndindex(*(len(span),) * solid.ndim)]
    offsets = [o - r for o in offsets]
    for flat in np.argsort(heights, axis=None, kind="stable"):
        p = np.array(np.unravel_index(flat, solid.shape))
        if not solid[tuple(p)]:
            continue
        if heights[tuple(p)] - half <= plate + 1e-9:
            held[tuple(p)] = True
            continue
        for o in offsets:
            q = p + o
            on_plate = float((q + 0.5) @ d) <= plate + 1e-9
            inside = not (np.any(q < 0) or np.any(q >= solid.shape))
            if not on_plate and not (inside and held[tuple(q)]):
                continue
            down = -o.astype(float)
            length = float(np.linalg.norm(down))
            if 0 < length <= reach and down @ d >= length * cos_half - 1e-9:
                held[tuple(p)] = True
                break
    return solid & ~held


def _reach(direction, angle, ndim):
    return float(np.linalg.norm(support_stencil(direction, angle, ndim).offsets, axis=1).max())


@pytest.fixture(scope="module")
def tilted_designs_2d():
    out = {}
    for direction, angle in (([1.0, 2.0], 45.0), ([1.0, 3.0], 55.0)):
        problem = problem_from_dict(
            {**CANTILEVER_2D, "build": {"direction": direction, "overhang_angle": angle}})
        out[(tuple(direction), angle)] = optimize(problem)
    free = optimize(problem_from_dict(CANTILEVER_2D))
    return out, free


def test_optimised_tilted_designs_are_held_by_an_independent_check_2d(tilted_designs_2d):
    # the cone support rule of the layer-wise AM filter (Langelaar, SMO 55:871-883,
    # 2017; cone regions: Gaynor & Guest, SMO 54:1157-1172, 2016), checked separately
    designs, free = tilted_designs_2d
    for (direction, angle), result in designs.items():
        solid = result.density > 0.5
        assert result.converged and result.grey_level < 0.02, (direction, result.message)
        reach = _reach(list(direction), angle, 2)
        assert not held_check(solid, list(direction), angle, reach).any(), (direction, angle)
        # the check can fail: the free design has unheld elements in this direction
        assert held_check(free.density > 0.5, list(direction), angle, reach).sum() > 0


def test_optimised_tilted_design_is_held_3d():
    problem = problem_from_dict({
        "name": "tilted 3D cantilever (invented)",
        "domain": {"shape": [16, 8, 8], "element_size": 1.0},
        "material": {"youngs_modulus": 1.0, "poisson_ratio": 0.3},
        "restraints": [{"where": {"x": [0.0, 0.0]}, "fix": ["x", "y", "z"]}],
        "loads": [{"where": {"x": [16.0, 16.0], "z": [3.0, 5.0]}, "force": [0.0, 0.0, -1.0]}],
        "optimize": {"volume_fraction": 0.25, "filter_radius": 1.5, "max_iterations": 100},
        "build": {"direction": [0.0, 1.0, 1.0], "overhang_angle": 45.0},
    })
    result = optimize(problem)
    solid = result.density > 0.5
    reach = _reach([0.0, 1.0, 1.0], 45.0, 3)
    assert not held_check(solid, [0.0, 1.0, 1.0], 45.0, reach).any()
    assert result.grey_level < 0.05


def test_axis_as_vector_gives_the_same_design():
    a = problem_from_dict({**CANTILEVER_2D, "optimize": {**CANTILEVER_2D["optimize"],
                                                         "max_iterations": 12},
                           "build": {"direction": "+y", "overhang_angle": 40.0}})
    b = problem_from_dict({**CANTILEVER_2D, "optimize": {**CANTILEVER_2D["optimize"],
                                                         "max_iterations": 12},
                           "build": {"direction": [0.0, 3.0], "overhang_angle": 40.0}})
    ra, rb = optimize(a), optimize(b)
    np.testing.assert_allclose(ra.density, rb.density, rtol=0, atol=1e-10)


def _plate_part(n: int, theta: float, d: np.ndarray) -> np.ndarray:
    """A thin plate (3 elements thick) whose underside makes ``theta`` degrees with the
    build plate: cut below and above by planes normal to ``d`` (it stands on the plate)
    and at its sides by planes containing ``d`` (vertical walls)."""
    g = np.stack(np.meshgrid(*[np.arange(n) + 0.5] * 3, indexing="ij"), -1) - n / 2
    helper = np.array([1.0, 0.0, 0.0]) if abs(d[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    lean = np.cross(d, helper)
    lean /= np.linalg.norm(lean)
    side = np.cross(d, lean)
    t = math.radians(theta)
    normal = math.cos(t) * d - math.sin(t) * lean  # inward normal of the underside
    s = g @ normal
    height = g @ d
    return ((s >= 0) & (s <= 3.0) & (np.abs(height) <= 0.3 * n)
            & (np.abs(g @ side) <= 0.3 * n))


@pytest.mark.parametrize("direction", [[0.0, 1.0, 1.0], [1.0, 2.0, 2.0]])
def test_inspect_tilted_plates_need_support_iff_below_the_angle(direction):
    # common practice: a down-facing surface needs support when shallower than the
    # overhang angle; tolerance: 6 degrees either side (one voxel over the plate's reach)
    d = unit_vector(direction, 3)
    for theta, needs in ((30.0, True), (57.0, False)):
        part = _plate_part(28, theta, d)
        reports, _, _ = analyze_design(part, element_size=1.0, directions=[direction],
                                       overhang_angle=45.0)
        assert (reports[0].support_volume > 0) is needs, (theta, reports[0].support_volume)


def test_orientation_search_finds_a_rotated_part():
    # a disc with a stem standing on it (a mushroom upside down) prints without support
    # only disc down: tilted, the disc needs a wedge of support; on its side, the stem
    # overhangs. Turned by a rotation not about an axis, the search must find that
    # orientation (within 10 degrees) with at most a tenth of the best axis's support.
    from topopt.build import rank_directions
    from topopt.commands.inspect import orientation_search

    axis = np.array([1.0, 2.0, 3.0]) / math.sqrt(14.0)
    t = math.radians(35.0)
    k = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
    rot = np.eye(3) + math.sin(t) * k + (1 - math.cos(t)) * k @ k
    n = 40
    g = np.stack(np.meshgrid(*[np.arange(n) + 0.5] * 3, indexing="ij"), -1) - n / 2
    x, y, z = np.moveaxis(g @ rot, -1, 0)  # coordinates in the part's own frame
    r = np.hypot(x, y)
    disc = (z >= -0.25 * n) & (z <= -0.13 * n) & (r <= 0.4 * n)
    stem = (z > -0.13 * n) & (z <= 0.25 * n) & (r <= 0.12 * n)
    part = disc | stem
    settings = {"element_size": 1.0, "overhang_angle": 45.0, "thickness": 1.0,
                "process": None, "mass_density": None, "weights": None, "keep_masks": False,
                "through_holes": False}
    _, reports = orientation_search(part, 80, settings)
    ranked, best = rank_directions(reports)
    top = next(r for r in ranked if r.direction == best)
    expected = rot @ np.array([0.0, 0.0, 1.0])
    assert math.degrees(math.acos(min(1.0, float(np.dot(top.vector, expected))))) <= 10.0
    axes = [r for r in ranked if r.direction in ("+x", "-x", "+y", "-y", "+z", "-z")]
    assert top.support_volume <= 0.1 * min(r.support_volume for r in axes)


def test_keep_in_constraint_gradient_matches_central_differences():
    from topopt.driver import KeepInConstraint, build_filter_chain

    problem = problem_from_dict({
        **CANTILEVER_2D, "domain": {"shape": [10, 8], "element_size": 1.0},
        "loads": [{"where": {"x": [10.0, 10.0], "y": [3.0, 5.0]}, "force": [0.0, -1.0]}],
        "passive": [{"where": {"center": [6.0, 6.0], "radius": 1.2}, "state": "solid"}],
        "build": {"direction": [0.5, 1.0], "overhang_angle": 45.0},
    })
    chain = build_filter_chain(problem)
    rng = np.random.default_rng(2)
    x = 0.2 + 0.6 * rng.random(problem.grid.shape)
    c = KeepInConstraint(chain, problem.passive_solid)
    chain.forward(x)
    g = c.gradient()
    fd = np.zeros_like(x)
    for idx in np.ndindex(x.shape):
        for sign in (1, -1):
            xs = x.copy()
            xs[idx] += sign * 1e-6
            chain.forward(xs)
            fd[idx] += sign * c.value() / 2e-6
    np.testing.assert_allclose(g, fd, rtol=1e-4, atol=1e-6)


@pytest.mark.parametrize("direction,angle,message", [
    ("[0.0, 0.0]", "45.0", "must not be zero"),
    ("[1.0, 0.0, 0.0]", "45.0", "expected 2 numbers"),
    ("[nan, 1.0]", "45.0", "finite"),
    ('"+y"', "75.0", "between 20 and 70"),
    ('"+y"', "15.0", "between 20 and 70"),
])
def test_bad_build_input_exits_2_and_leaves_results_alone(tmp_path, capsys, direction, angle,
                                                          message):
    text = (
        '[domain]\nshape = [8, 6]\nelement_size = 1.0\n'
        '[material]\nyoungs_modulus = 1.0\npoisson_ratio = 0.3\n'
        '[[restraints]]\nwhere = { x = [0.0, 0.0] }\nfix = ["x", "y"]\n'
        '[[loads]]\nwhere = { x = [8.0, 8.0] }\nforce = [0.0, -1.0]\n'
        '[optimize]\nvolume_fraction = 0.4\n'
        f'[build]\ndirection = {direction}\noverhang_angle = {angle}\n'
    )
    path = tmp_path / "p.toml"
    path.write_text(text)
    out = tmp_path / "run"
    out.mkdir()
    (out / "summary.json").write_text(json.dumps({"old": True}))
    assert main(["optimize", str(path), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "build." in err[0] and message in err[0], err
    assert json.loads((out / "summary.json").read_text()) == {"old": True}


def _reference_layer_filter_oc(problem, iterations: int = 200):
    """Plain reference, written separately: density filter (hat weights), the layer
    filter of Langelaar (SMO 55:871-883, 2017; 45 degrees, +y) with the passive solid
    elements in its input, OC with the volume of the printed density bisected; FE by
    the verified compliance model. Returns the printed density and its compliance."""
    from scipy.sparse import coo_matrix

    from topopt.objective import ComplianceModel

    nx, ny = problem.grid.shape
    keep = problem.passive_solid
    radius = problem.optimize.filter_radius / problem.grid.element_size
    reach = int(math.ceil(radius))
    rows, cols, vals = [], [], []
    for i in range(nx):
        for j in range(ny):
            row = [(a, b, radius - math.hypot(a - i, b - j))
                   for a in range(max(0, i - reach), min(nx, i + reach + 1))
                   for b in range(max(0, j - reach), min(ny, j + reach + 1))
                   if radius - math.hypot(a - i, b - j) > 0]
            total = sum(w for _, _, w in row)
            for a, b, w in row:
                rows.append(i * ny + j)
                cols.append(a * ny + b)
                vals.append(w / total)
    h = coo_matrix((vals, (rows, cols)), shape=(nx * ny, nx * ny)).tocsr()
    eps, p_exp = 1e-4, 40.0
    q_exp = p_exp + math.log(3) / math.log(0.5)
    sq = math.sqrt(eps)

    def below(row):
        pad = np.pad(row, 1)
        return np.stack([pad[:-2], pad[1:-1], pad[2:]])

    def layer(xt):
        xi, big = np.zeros_like(xt), np.zeros_like(xt)
        xi[:, 0] = xt[:, 0]
        for j in range(1, ny):
            sup = below(xi[:, j - 1])
            m = sup.max(axis=0)
            safe = np.where(m > 0, m, 1.0)
            big[:, j] = np.where(m > 0, safe ** (p_exp / q_exp)
                                 * ((sup / safe) ** p_exp).sum(axis=0) ** (1 / q_exp), 0.0)
            d = xt[:, j] - big[:, j]
            xi[:, j] = 0.5 * (xt[:, j] + big[:, j] - np.sqrt(d * d + eps) + sq)
        return xi, big

    def layer_back(xt, xi, big, dy):
        lam, dx = dy.copy(), np.zeros_like(xt)
        for j in range(ny - 1, 0, -1):
            d = xt[:, j] - big[:, j]
            rt = np.sqrt(d * d + eps)
            dx[:, j] = lam[:, j] * 0.5 * (1 - d / rt)
            g_big = lam[:, j] * 0.5 * (1 + d / rt)
            sup = below(xi[:, j - 1])
            m = sup.max(axis=0)
            safe = np.where(m > 0, m, 1.0)
            tot = np.where(m > 0, ((sup / safe) ** p_exp).sum(axis=0), 1.0)
            coef = np.where(m > 0, g_big * (p_exp / q_exp) * safe ** (p_exp / q_exp - 1)
                            * tot ** (1 / q_exp - 1), 0.0)
            g = coef * (sup / safe) ** (p_exp - 1)
            gpad = np.zeros(nx + 2)
            gpad[:-2] += g[0]
            gpad[1:-1] += g[1]
            gpad[2:] += g[2]
            lam[:, j - 1] += gpad[1:-1]
        dx[:, 0] = lam[:, 0]
        return dx

    def printed(x):
        xt = (h @ x.ravel()).reshape(x.shape)
        xt[keep] = 1.0  # the passive solid elements in the layer filter's input
        return xt, *layer(xt)

    model = ComplianceModel(problem)
    vf = problem.optimize.volume_fraction
    x = np.where(keep, 1.0, vf)
    for _ in range(iterations):
        xt, xi, big = printed(x)
        ev = model.evaluate(xi)
        dc = layer_back(xt, xi, big, ev.gradient)
        dc[keep] = 0.0
        dc = (h.T @ dc.ravel()).reshape(x.shape)
        dv = layer_back(xt, xi, big, np.ones_like(xi))
        dv[keep] = 0.0
        dv = (h.T @ dv.ravel()).reshape(x.shape)
        lo, hi, move = 1e-9, 1e9, 0.1
        while (hi - lo) / (lo + hi) > 1e-4:
            mid = 0.5 * (lo + hi)
            step = x * np.sqrt(np.maximum(-dc, 0.0) / (mid * np.maximum(dv, 1e-12)))
            new = np.where(keep, 1.0, np.clip(step, np.maximum(0.0, x - move),
                                               np.minimum(1.0, x + move)))
            if printed(new)[1].mean() > vf:
                lo = mid
            else:
                hi = mid
        change = float(np.abs(new - x).max())
        x = new
        if change < 0.01:
            break
    xi = printed(x)[1]
    return xi, model.evaluate(xi).compliance


@pytest.mark.slow
def test_keep_in_eye_is_held_against_the_plain_reference():
    # issue check: the project's design has no unsupported element, keep-in included,
    # at a compliance no more than 5 % above the plain reference's (Langelaar 2017)
    problem = problem_from_dict({
        "name": "bracket with a keep-in eye (invented)",
        "domain": {"shape": [60, 30], "element_size": 1.0},
        "material": {"youngs_modulus": 1.0, "poisson_ratio": 0.3},
        "restraints": [{"where": {"x": [0.0, 0.0]}, "fix": ["x", "y"]}],
        "loads": [{"where": {"x": [48.0, 48.0], "y": [16.0, 16.0]}, "force": [0.0, -1.0]}],
        "passive": [{"where": {"center": [48.0, 18.0], "radius": 4.0}, "state": "solid"}],
        "optimize": {"volume_fraction": 0.35, "filter_radius": 2.0, "max_iterations": 300},
        "build": {"direction": "+y", "overhang_angle": 45.0},
    })
    _, reference = _reference_layer_filter_oc(problem)
    result = optimize(problem)
    solid = result.density > 0.5
    assert result.converged and result.grey_level < 0.02
    assert not (solid & ~supported_mask(solid, direction="+y")).any()
    assert not held_check(solid, "+y", 45.0, 1.5).any()
    assert result.compliance <= 1.05 * reference, (result.compliance, reference)


def test_supported_keep_in_with_the_earlier_settings_gives_the_earlier_design():
    # issue check "the switch for today's behaviour gives today's result": keep_in =
    # "supported" with the settings that were the defaults before keep-in regions were held
    # (OC, move limit 0.1, no projection, smooth-maximum exponent 40) reproduces the design
    # of the version before that change. Regression reference: commit 5cdd1fa, run 2026-12-03 on this problem (our own
    # earlier code, not an outside source): compliance 220.84658023222303 after 40
    # iterations, sum of densities 399.37977034983464.
    problem = problem_from_dict({
        "name": "keep-in regression (invented)",
        "domain": {"shape": [48, 24], "element_size": 1.0, "thickness": 1.0},
        "material": {"youngs_modulus": 1.0, "poisson_ratio": 0.3, "void_stiffness": 1e-9},
        "restraints": [{"where": {"center": [3.0, 12.0], "radius": 2.5}, "fix": ["x", "y"]}],
        "loads": [{"where": {"center": [40.0, 16.0], "radius": 1.5}, "force": [0.0, -1.0]}],
        "passive": [{"where": {"center": [40.0, 16.0], "radius": 3.5}, "state": "solid"}],
        "optimize": {"method": "oc", "volume_fraction": 0.35, "filter_radius": 1.5,
                     "max_iterations": 40, "change_tolerance": 0.001, "move_limit": 0.1,
                     "projection": False},
        "build": {"direction": "+y", "overhang_angle": 45.0, "keep_in": "supported",
                  "smooth_max_power": 40.0},
    })
    result = optimize(problem)
    assert result.iterations == 40
    assert result.compliance == pytest.approx(220.84658023222303, rel=1e-7)
    assert float(result.density.sum()) == pytest.approx(399.37977034983464, rel=1e-7)


def test_projection_false_switches_off_the_default_projection(tmp_path):
    from topopt.problem import problem_table

    base = {**CANTILEVER_2D, "build": {"direction": "+y", "keep_in": "supported"}}
    assert problem_from_dict(base).optimize.projection is not None  # the default with a direction
    off = problem_from_dict({**base, "optimize": {"volume_fraction": 0.4, "projection": False}})
    assert off.optimize.projection is None
    # written and read back it stays off (the table form says so explicitly)
    assert problem_from_dict(problem_table(off)).optimize.projection is None
    with pytest.raises(ValueError, match="optimize.projection"):
        problem_from_dict({**base, "optimize": {"volume_fraction": 0.4, "projection": True}})


def test_smooth_max_power_reaches_the_filter_and_round_trips():
    from topopt.driver import build_filter_chain
    from topopt.problem import problem_table

    base = {**CANTILEVER_2D, "build": {"direction": "+y"}}
    default = problem_from_dict(base)
    assert default.build.smooth_max_power == 80.0
    assert build_filter_chain(default).links[-1].p == 80.0
    p40 = problem_from_dict({**base, "build": {"direction": "+y", "smooth_max_power": 40}})
    assert build_filter_chain(p40).links[-1].p == 40.0
    assert problem_from_dict(problem_table(p40)).build.smooth_max_power == 40.0
    for bad in (19.0, 401.0, "80", float("nan")):
        with pytest.raises(ValueError, match="build.smooth_max_power"):
            problem_from_dict({**base, "build": {"direction": "+y", "smooth_max_power": bad}})
