"""Runs with Heaviside projection, MMA and the robust (minimum member size) formulation.

Sources
-------
- Projection and robust formulation: Wang, Lazarov & Sigmund, "On projection methods,
  convergence and robust formulations in topology optimization", SMO 43:767-784, 2011.
- Grey-level measure (share of elements with 0.1 < rho < 0.9): Sigmund, SMO 33:401-424,
  2007.
- MMA: Svanberg, IJNME 24:359-373, 1987.
- MBB-beam settings: Andreassen et al., SMO 43:1-16, 2011 (see tests/topopt/test_mbb.py).
- Compliance does not grow when material is added (load control): Bendsoe & Sigmund,
  Topology Optimization, 2003, ch. 1. The eroded design lies below the blueprint, the
  blueprint below the dilated design, so c_eroded >= c_blueprint >= c_dilated.
"""

from __future__ import annotations

import copy
import csv
from pathlib import Path

import numpy as np
import pytest

from topopt import load_problem, optimize
from topopt.driver import build_filter_chain
from topopt.lengthscale import minimum_member_size
from topopt.objective import ComplianceModel
from topopt.problem import ProblemError, problem_from_dict
from topopt.results import summary_dict, write_results

EXAMPLES = Path(__file__).resolve().parents[2] / "examples"
MBB = EXAMPLES / "mbb-beam.toml"
BRACKET = EXAMPLES / "wall-bracket-2d.toml"


def _variant(path, *, drop=(), **tables):
    """The problem at ``path`` with ``optimize``/``build`` keys replaced or dropped."""
    data = copy.deepcopy(dict(load_problem(path).source))
    for key in drop:
        data["optimize"].pop(key, None)
    for table, values in tables.items():
        data.setdefault(table, {}).update(values)
    return data


def _coarse_mbb(**optimize_keys):
    """A 30 x 10 half MBB beam (quick runs)."""
    data = _variant(MBB, optimize=dict(max_iterations=120, **optimize_keys))
    data["domain"]["shape"] = [30, 10]
    data["restraints"][1]["where"] = {"x": [30.0, 30.0], "y": [0.0, 0.0]}
    data["loads"][0]["where"] = {"x": [0.0, 0.0], "y": [10.0, 10.0]}
    return data


# ----------------------------------------------------------------- problem-file keys


def test_projection_keys_are_read():
    data = _coarse_mbb(
        method="mma",
        projection=dict(beta_start=2.0, beta_max=16.0, eta=0.4, every=10, robust_delta=0.2),
    )
    p = problem_from_dict(data, source="t.toml")
    proj = p.optimize.projection
    assert (proj.beta_start, proj.beta_max, proj.eta, proj.every, proj.robust_delta) == (
        2.0,
        16.0,
        0.4,
        10,
        0.2,
    )
    assert p.optimize.method == "mma"
    assert (proj.stall_change, proj.preserve_volume) == (0.0, False)  # defaults
    data["optimize"]["projection"] = dict(stall_change=0.02, preserve_volume=True)
    proj = problem_from_dict(data, source="t.toml").optimize.projection
    assert (proj.stall_change, proj.preserve_volume) == (0.02, True)


@pytest.mark.parametrize(
    "change, drop, message",
    [
        (dict(projection=dict(beta_start=0.0)), (), "optimize.projection.beta_start"),
        (dict(projection=dict(beta_start=8.0, beta_max=4.0)), (), "optimize.projection.beta_max"),
        (dict(projection=dict(every=0)), (), "optimize.projection.every"),
        (dict(projection=dict(robust_delta=0.5)), (), "optimize.projection.robust_delta"),
        (dict(projection=dict(sharpness=3.0)), (), "optimize.projection.sharpness: unknown key"),
        (dict(min_member_size=4.0), ("filter_radius",), 'needs method = "mma"'),
        (dict(method="mma", min_member_size=4.0), (), "remove optimize.filter_radius"),
        (dict(method="mma", min_member_size=1.5), ("filter_radius",), "at least two elements"),
        (dict(method="newton"), (), "optimize.method"),
        (dict(projection=dict(stall_change=-0.1)), (), "optimize.projection.stall_change"),
        (dict(projection=dict(preserve_volume="yes")), (), "expected true or false"),
        (dict(projection=dict(preserve_volume=True, eta=0.4)), (), "remove eta"),
        (dict(method="mma", min_member_size=4.0, projection=dict(preserve_volume=True)),
         ("filter_radius",), "optimize.projection.preserve_volume"),
        (dict(projection=dict(stall_change=1.0)), (), "optimize.projection.stall_change"),
    ],
)
def test_bad_projection_settings_give_one_line(change, drop, message):
    data = _coarse_mbb(**change)
    for key in drop:
        data["optimize"].pop(key)
    with pytest.raises(ProblemError) as err:
        problem_from_dict(data, source="t.toml")
    text = str(err.value)
    assert message in text and "\n" not in text and text.startswith("t.toml: ")


# ----------------------------------------------------------------- gradients


def test_compliance_gradient_through_projection_matches_central_differences():
    # common practice: the adjoint of the whole chain (density filter, projection,
    # passive values) against central differences of the compliance
    data = _coarse_mbb(projection=dict(beta_start=4.0, eta=0.45))
    data["domain"]["shape"] = [8, 4]
    data["restraints"][1]["where"] = {"x": [8.0, 8.0], "y": [0.0, 0.0]}
    data["loads"][0]["where"] = {"x": [0.0, 0.0], "y": [4.0, 4.0]}
    p = problem_from_dict(data, source="t.toml")
    chain = build_filter_chain(p)
    model = ComplianceModel(p, solver="scipy")
    x = np.random.default_rng(7).uniform(0.2, 0.9, p.grid.shape)

    def compliance(z):
        return model.evaluate(chain.forward(z)).compliance

    ev = model.evaluate(chain.forward(x))
    analytic = chain.backward(ev.gradient)
    numeric = np.zeros_like(x)
    step = 1e-6
    for idx in np.ndindex(x.shape):
        xp, xm = x.copy(), x.copy()
        xp[idx] += step
        xm[idx] -= step
        numeric[idx] = (compliance(xp) - compliance(xm)) / (2 * step)
    assert np.linalg.norm(analytic - numeric) / np.linalg.norm(numeric) < 1e-6


# ----------------------------------------------------------------- quick runs


def test_mma_coarse_mbb_meets_volume_and_is_no_worse_than_oc():
    oc = optimize(problem_from_dict(_coarse_mbb(), source="t.toml"))
    mma = optimize(problem_from_dict(_coarse_mbb(method="mma"), source="t.toml"))
    assert mma.converged, mma.message
    assert mma.volume_fraction <= 0.5 + 1e-4
    assert mma.volume_fraction >= 0.5 - 1e-3  # the constraint is active at the optimum
    assert mma.compliance <= 1.01 * oc.compliance, (mma.compliance, oc.compliance)


def test_projection_run_doubles_beta_and_sharpens_the_design():
    plain = optimize(problem_from_dict(_coarse_mbb(method="mma"), source="t.toml"))
    data = _coarse_mbb(method="mma", projection=dict(beta_start=1.0, beta_max=16.0, every=15))
    data["optimize"]["max_iterations"] = 150
    result = optimize(problem_from_dict(data, source="t.toml"))
    betas = [row["beta"] for row in result.history]
    assert betas[0] == 1.0 and betas[-1] == 16.0
    assert set(betas) == {1.0, 2.0, 4.0, 8.0, 16.0}
    assert all(b2 in (b1, 2 * b1) for b1, b2 in zip(betas, betas[1:], strict=False))
    assert betas.index(2.0) == 15  # every 15 iterations
    assert result.grey_level < 0.5 * plain.grey_level
    assert result.grey_level < 0.05
    assert result.volume_fraction <= 0.5 + 1e-4


def test_not_converged_before_the_final_beta():
    # a loose change tolerance would stop a plain run at once; with continuation the run
    # goes on until beta_max
    data = _coarse_mbb(
        method="mma", change_tolerance=0.9, projection=dict(beta_start=1.0, beta_max=4.0, every=5)
    )
    result = optimize(problem_from_dict(data, source="t.toml"))
    assert result.converged
    betas = [row["beta"] for row in result.history]
    assert betas[:10] == [1.0] * 5 + [2.0] * 5
    # a still design at beta_max that is more than 2 % grey is not finished: beta doubles
    # again (at most twice), one iteration per still-but-grey step here
    assert betas[10] == 4.0
    for k in range(10, len(betas) - 1):
        assert result.history[k]["grey_level"] > 0.02
        assert betas[k + 1] == 2 * betas[k]
    assert result.history[-1]["grey_level"] <= 0.02 or betas[-1] == 16.0
    assert betas[-1] <= 16.0


def test_a_crisp_still_design_ends_at_beta_max():
    # the extension past beta_max only acts on grey designs: a design already below 2 %
    # grey at beta_max converges there
    data = _coarse_mbb(
        method="mma", projection=dict(beta_start=1.0, beta_max=16.0, every=15)
    )
    data["optimize"]["max_iterations"] = 200
    result = optimize(problem_from_dict(data, source="t.toml"))
    assert result.converged
    last = result.history[-1]
    assert last["grey_level"] <= 0.02 and last["beta"] == 16.0


def test_stall_change_doubles_beta_before_every():
    # beta doubles once the largest design change drops below stall_change (after at
    # least 5 iterations at one beta), long before every = 1000 iterations
    data = _coarse_mbb(
        method="mma", projection=dict(beta_start=1.0, beta_max=8.0, every=1000, stall_change=0.05)
    )
    result = optimize(problem_from_dict(data, source="t.toml"))
    betas = [row["beta"] for row in result.history]
    assert betas[-1] == 8.0 and result.iterations < 120
    for k in range(1, len(betas)):
        if betas[k] > betas[k - 1]:
            assert result.history[k - 1]["change"] < 0.05
    plain = optimize(problem_from_dict(_coarse_mbb(method="mma", projection=dict(every=1000)),
                                       source="t.toml"))
    assert {row["beta"] for row in plain.history} == {1.0}


def test_preserve_volume_run_chooses_eta_each_iteration_and_meets_the_volume(tmp_path):
    # Wang, Lazarov & Sigmund 2011, sec. 3: eta chosen at every iteration so that the
    # projection keeps the filtered volume; the run reports it in history.csv
    data = _coarse_mbb(
        method="oc", projection=dict(beta_start=1.0, beta_max=16.0, every=10, preserve_volume=True)
    )
    data["optimize"]["max_iterations"] = 60
    p = problem_from_dict(data, source="t.toml")
    result = optimize(p)
    etas = [row["eta"] for row in result.history]
    assert len(set(etas)) > 10 and all(0.0 < e < 1.0 for e in etas)
    assert abs(result.volume_fraction - 0.5) < 2e-3
    write_results(result, p, tmp_path / "run")
    with open(tmp_path / "run" / "history.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    assert [float(row["eta"]) for row in rows] == pytest.approx(etas, rel=1e-12)
    fixed = optimize(problem_from_dict(_coarse_mbb(method="oc", projection=dict(every=10)),
                                       source="t.toml"))
    assert "eta" not in fixed.history[0]


def test_robust_run_orders_the_three_designs_and_reports_sizes():
    data = _coarse_mbb(
        method="mma",
        min_member_size=3.0,
        projection=dict(beta_start=1.0, beta_max=8.0, every=20),
    )
    data["optimize"].pop("filter_radius")
    p = problem_from_dict(data, source="t.toml")
    result = optimize(p)
    for row in result.history:
        assert row["compliance_eroded"] >= row["compliance"] * (1 - 1e-9)
        assert row["compliance"] >= row["compliance_dilated"] * (1 - 1e-9)
    summary = summary_dict(result, p)
    assert (
        summary["min_member_size"] == minimum_member_size(result.density, element_size=1.0)["solid"]
    )
    assert summary["min_member_size"] is not None and summary["min_gap_size"] is not None
    assert result.volume_fraction <= 0.5 + 1e-3


def test_resume_with_mma_and_projection_repeats_the_uninterrupted_run():
    data = _coarse_mbb(
        method="mma", checkpoint_every=7, projection=dict(beta_start=1.0, beta_max=4.0, every=6)
    )
    data["optimize"]["max_iterations"] = 20
    p = problem_from_dict(data, source="t.toml")
    saved = []
    full = optimize(p, checkpoint=lambda state: saved.append(copy.deepcopy(state)))
    state = saved[1]  # after iteration 14, with beta 4 reached at iteration 12
    assert state["iteration"] == 14 and state["continuation_beta"] == 4.0
    resumed = optimize(p, resume=state)
    np.testing.assert_allclose(resumed.design, full.design, atol=1e-12)
    assert [r["beta"] for r in resumed.history] == [r["beta"] for r in full.history]


# ----------------------------------------------------------------- full checks (slow)


@pytest.mark.slow
def test_mma_mbb_against_oc():
    # issue 4: on the MBB beam MMA ends at the same compliance as OC within 1 %, with the
    # volume constraint met. Both run to a design change of 0.001: at the usual 0.01 OC
    # stops at 217.8 while its layout is still creeping towards MMA's (OC needs ~1500
    # iterations to finish the creep; see oc_update). Measured: OC 210.86 (1482 it),
    # MMA 210.66 (137 it).
    tight = dict(change_tolerance=0.001, max_iterations=3000)
    oc = optimize(problem_from_dict(_variant(MBB, optimize=tight), source="m"))
    mma = optimize(problem_from_dict(_variant(MBB, optimize=dict(method="mma", **tight)), source="m"))
    print(
        f"MBB: OC {oc.compliance:.2f} ({oc.iterations} it), "
        f"MMA {mma.compliance:.2f} ({mma.iterations} it)"
    )
    assert oc.converged and mma.converged
    assert abs(mma.volume_fraction - 0.5) < 1e-4
    assert mma.compliance == pytest.approx(oc.compliance, rel=0.01)


@pytest.mark.slow
def test_mma_and_oc_agree_where_they_find_the_same_layout():
    # With filter radius 2.5 (instead of 1.5) both optimisers end in the same layout
    # (checked by eye on the pictures). Measured: OC 237.54 (164 it), MMA 237.17 (104 it).
    data = _variant(MBB, optimize=dict(filter_radius=2.5))
    oc = optimize(problem_from_dict(data, source="m"))
    data["optimize"]["method"] = "mma"
    mma = optimize(problem_from_dict(data, source="m"))
    print(f"MBB r=2.5: OC {oc.compliance:.2f}, MMA {mma.compliance:.2f}")
    assert abs(mma.volume_fraction - 0.5) < 1e-4
    assert mma.compliance == pytest.approx(oc.compliance, rel=0.01)
    assert np.mean(np.abs(mma.density - oc.density)) < 0.05


PROJECTION = dict(beta_start=1.0, beta_max=32.0, every=40)


@pytest.mark.slow
@pytest.mark.parametrize("method", ["oc", "mma"])
@pytest.mark.parametrize("path", [MBB, BRACKET], ids=["mbb", "bracket"])
def test_projection_ends_nearly_black_and_white(path, method):
    # issue 4: grey level below 2 % with projection on
    data = _variant(path, optimize=dict(method=method, max_iterations=300, projection=PROJECTION))
    result = optimize(problem_from_dict(data, source=str(path)))
    print(
        f"{path.name} {method}: grey {result.grey_level:.4f}, c {result.compliance:.4g}, "
        f"vol {result.volume_fraction:.4f}, {result.iterations} it, {result.message}"
    )
    assert result.history[-1]["beta"] == 32.0
    assert result.grey_level < 0.02
    assert result.volume_fraction <= data["optimize"]["volume_fraction"] + 1e-3


@pytest.mark.slow
@pytest.mark.parametrize("size, beta_max", [(3.0, 32.0), (5.0, 64.0)])
def test_robust_mbb_meets_the_minimum_member_size(size, beta_max):
    # issue 4: the measured smallest solid member is at least the requested size,
    # within one element. Size 5 needs beta_max 64 to end crisp on this coarse grid
    # (measured grey 6.2 % at 32 after 400 iterations, 1.0 % at 64).
    data = _variant(
        MBB,
        drop=("filter_radius",),
        optimize=dict(
            method="mma",
            min_member_size=size,
            max_iterations=500,
            projection=dict(beta_start=1.0, beta_max=beta_max, every=40),
        ),
    )
    p = problem_from_dict(data, source="mbb")
    result = optimize(p)
    sizes = minimum_member_size(result.density, element_size=1.0)
    print(
        f"robust MBB size {size}: measured {sizes}, grey {result.grey_level:.4f}, "
        f"c {result.compliance:.4g}, {result.iterations} it"
    )
    assert sizes["solid"] >= size - 1.0
    assert result.converged and result.grey_level < 0.02


@pytest.mark.slow
@pytest.mark.parametrize("direction", ["+y", "-x"])
def test_projection_mma_and_build_direction_leave_nothing_unsupported(direction):
    # issue 4: projection + MMA + printability filter -> zero unsupported elements
    data = _variant(
        MBB,
        optimize=dict(method="mma", max_iterations=300, projection=PROJECTION),
        build=dict(direction=direction),
    )
    p = problem_from_dict(data, source="mbb")
    result = optimize(p)
    summary = summary_dict(result, p)
    print(
        f"MBB {direction}: unsupported {summary['unsupported_elements']}, grey "
        f"{result.grey_level:.4f}, c {result.compliance:.4g}, {result.iterations} it"
    )
    assert summary["unsupported_elements"] == 0
    assert result.grey_level < 0.02


def test_robust_run_in_3d():
    # the 3D path (cone filter marginal for the radius, three chains) on a tiny cantilever
    data = {
        "domain": {"shape": [8, 4, 4], "element_size": 1.0},
        "material": {"youngs_modulus": 1.0, "poisson_ratio": 0.3},
        "restraints": [{"where": {"x": [0.0, 0.0]}, "fix": ["x", "y", "z"]}],
        "loads": [{"where": {"x": [8.0, 8.0], "z": [0.0, 0.0]}, "force": [0.0, 0.0, -1.0]}],
        "optimize": {
            "volume_fraction": 0.4,
            "method": "mma",
            "min_member_size": 2.0,
            "max_iterations": 12,
            "projection": {"beta_start": 1.0, "beta_max": 4.0, "every": 4},
        },
    }
    p = problem_from_dict(data, source="t.toml")
    result = optimize(p)
    assert result.iterations == 12 and result.density.shape == (8, 4, 4)
    assert [row["beta"] for row in result.history][::4] == [1.0, 2.0, 4.0]
    assert result.history[-1]["compliance"] < result.history[0]["compliance"]
    assert result.volume_fraction <= 0.4 + 1e-3
    assert all(r["compliance_eroded"] >= r["compliance_dilated"] for r in result.history)


def test_resume_through_the_checkpoint_file(tmp_path):
    # the loop state of a projection + robust MMA run survives the .npz checkpoint of
    # `buttress optimize` (plain arrays, no pickle) and the resumed run repeats the full one
    from topopt.results import load_checkpoint, save_checkpoint

    data = _coarse_mbb(
        method="mma",
        min_member_size=2.0,
        checkpoint_every=5,
        projection=dict(beta_start=1.0, beta_max=4.0, every=4),
    )
    data["optimize"].pop("filter_radius")
    data["optimize"]["max_iterations"] = 14
    p = problem_from_dict(data, source="t.toml")
    path = tmp_path / "checkpoint.npz"
    saved = []

    def keep(state):
        if state["iteration"] == 10:
            save_checkpoint(path, state, "digest")
        saved.append(state["iteration"])

    full = optimize(p, checkpoint=keep)
    assert 10 in saved
    state = load_checkpoint(path, "digest")
    assert state["continuation_beta"] == 4.0 and "mma_asy_low" in state
    resumed = optimize(p, resume=state)
    np.testing.assert_allclose(resumed.design, full.design, atol=1e-10)
    assert resumed.compliance == pytest.approx(full.compliance, rel=1e-9)


def test_move_damping_calms_swinging_elements_and_spares_steady_ones():
    # the rule MMA applies to its asymptotes (Svanberg 1987), applied to move limits
    from topopt.driver import MoveDamping

    damping = MoveDamping(0.1, (3,))
    swing, steady, still = 0, 1, 2
    for k in range(6):
        step = np.array([0.1 * (-1) ** k, 0.1, 0.0])
        move = damping.step(step, final=True)
    assert move[swing] == pytest.approx(0.1 * 0.5 ** 5)  # halved at each of 5 sign changes
    assert move[steady] == 0.1 and move[still] == 0.1
    # before the final beta nothing changes
    early = MoveDamping(0.1, (1,))
    for k in range(6):
        assert early.step(np.array([0.1 * (-1) ** k]), final=False)[0] == 0.1
    # a damped element that then moves steadily against its limit gets it back
    for _ in range(30):
        move = damping.step(np.array([0.0, 0.1, 0.0]) + move * np.array([1.0, 0.0, 0.0]), final=True)
    assert move[swing] == pytest.approx(0.1)


def test_resume_with_damped_move_limits_repeats_the_uninterrupted_run():
    data = _coarse_mbb(
        method="mma", checkpoint_every=5, projection=dict(beta_start=1.0, beta_max=2.0, every=3)
    )
    data["optimize"]["max_iterations"] = 40
    data["optimize"]["change_tolerance"] = 1e-6
    p = problem_from_dict(data, source="t.toml")
    saved = []
    full = optimize(p, checkpoint=lambda state: saved.append(copy.deepcopy(state)))
    damped = [s for s in saved if s["iteration"] < 40 and np.ptp(s["damping_move"]) > 0]
    assert damped, "the move limits were never damped: the check would not test the resume"
    resumed = optimize(p, resume=damped[0])
    np.testing.assert_allclose(resumed.design, full.design, atol=1e-12)
    # without the damping state the resumed run would differ (the check can fail)
    plain = {k: v for k, v in damped[0].items() if not k.startswith("damping_")}
    assert np.abs(optimize(p, resume=plain).design - full.design).max() > 1e-9


def test_compliance_tolerance_stops_a_creeping_run_at_the_final_beta():
    # optimize.compliance_tolerance: a design at the final beta whose compliance moved by
    # less than the tolerance over the last 10 iterations is finished even while a few
    # elements still creep by more than change_tolerance (common practice: stopping on
    # the objective's relative change). The strict run here is the reference.
    data = _coarse_mbb(method="mma", change_tolerance=0.001,
                       projection=dict(beta_start=1.0, beta_max=16.0, every=15))
    data["optimize"]["max_iterations"] = 300
    strict = optimize(problem_from_dict(data, source="t.toml"))
    data["optimize"]["compliance_tolerance"] = 1e-3
    quick = optimize(problem_from_dict(data, source="t.toml"))
    assert quick.converged and "compliance_tolerance" in quick.message, quick.message
    assert quick.iterations < strict.iterations
    last = quick.history[-11:]
    assert {row["beta"] for row in last} == {16.0}
    values = [row["compliance"] for row in last]
    assert (max(values) - min(values)) / values[-1] < 1e-3
    assert quick.history[-1]["change"] >= 0.001      # the change rule alone would go on
    assert quick.grey_level <= 0.02
    assert abs(quick.compliance - strict.compliance) <= 0.01 * strict.compliance


def test_compliance_drift_ignores_windows_across_a_beta_change():
    from topopt.driver import compliance_drift

    rows = [{"compliance": 100.0 - k, "beta": 8.0 if k < 3 else 16.0} for k in range(12)]
    assert compliance_drift(rows, 10) is None          # beta doubled inside the window
    assert compliance_drift(rows[3:], 8) == pytest.approx(8.0 / 89.0)
    assert compliance_drift([{"compliance": 5.0}] * 11, 10) == 0.0  # no projection column


def test_progress_bar_shows_the_compliance_spread_when_the_rule_is_on(capsys):
    # a long run tells its user how far the compliance rule is from firing
    data = _coarse_mbb(method="mma", projection=dict(beta_start=1.0, beta_max=1.0),
                       compliance_tolerance=1e-3)
    data["optimize"]["max_iterations"] = 14        # the spread exists from iteration 11
    optimize(problem_from_dict(data, source="t.toml"), progress=True)
    assert "spread=" in capsys.readouterr().err
    data["optimize"].pop("compliance_tolerance")
    optimize(problem_from_dict(data, source="t.toml"), progress=True)
    assert "spread=" not in capsys.readouterr().err


def test_compliance_drift_is_the_spread_of_the_window_not_its_ends():
    # exact arithmetic: a compliance that dips by 2 % and climbs back has moved, though
    # its ends agree; a steady creep gives the same value either way
    from topopt.driver import compliance_drift

    dip = [{"compliance": c, "beta": 16.0} for c in (100.0, 99.0, 98.0, 99.0, 100.0)]
    assert compliance_drift(dip, 4) == pytest.approx(0.02)
    creep = [{"compliance": 100.0 - 0.5 * k, "beta": 16.0} for k in range(5)]
    assert compliance_drift(creep, 4) == pytest.approx(2.0 / 98.0)


def test_compliance_tolerance_is_read_checked_and_round_trips(tmp_path):
    import subprocess
    import sys

    from topopt.problem import problem_table

    assert problem_from_dict(_coarse_mbb(), source="t.toml").optimize.compliance_tolerance == 0.0
    p = problem_from_dict(_coarse_mbb(compliance_tolerance=5e-4), source="t.toml")
    assert p.optimize.compliance_tolerance == 5e-4
    assert problem_from_dict(problem_table(p)).optimize.compliance_tolerance == 5e-4
    for bad in (-1e-3, 0.2, "0.001", float("nan")):
        with pytest.raises(ValueError, match="optimize.compliance_tolerance"):
            problem_from_dict(_coarse_mbb(compliance_tolerance=bad), source="t.toml")
    # on the command line: one line, exit code 2, no results folder written
    bad_file = tmp_path / "bad.toml"
    text = MBB.read_text().replace("[optimize]", "[optimize]\ncompliance_tolerance = 0.5", 1)
    bad_file.write_text(text)
    out = tmp_path / "out"
    run = subprocess.run([sys.executable, "-m", "topopt.cli", "optimize", str(bad_file),
                          "--out", str(out)], capture_output=True, text=True)
    assert run.returncode == 2
    assert "optimize.compliance_tolerance" in run.stderr
    assert len(run.stderr.strip().splitlines()) == 1 and not out.exists()
