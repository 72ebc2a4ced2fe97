"""Parameter studies (`buttress sweep`): same numbers as single runs, resume, Dask, failures.

All studies here run on a 24 x 12 cantilever of our own (invented, unit modulus), so each
case takes well under a second.
"""

from __future__ import annotations

import copy
import csv
import json
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from helpers import TINY, write_study

from topopt import study
from topopt.cli import main
from topopt.problem import to_toml

REPO = Path(__file__).resolve().parents[2]

FOUR = {"optimize.volume_fraction": [0.35, 0.5], "optimize.filter_radius": [1.5, 2.0]}


def read_table(path: Path) -> list[dict]:
    with open(path, newline="") as handle:
        return list(csv.DictReader(handle))


def apply(settings: dict) -> dict:
    """The problem of one case, built here without the study code."""
    data = copy.deepcopy(TINY)
    for dotted, value in settings.items():
        table, key = data, dotted.split(".")
        for part in key[:-1]:
            table = table.setdefault(part, {})
        table[key[-1]] = value
    return data


def test_four_cases_match_four_separate_optimize_runs(tmp_path):
    # Common practice: running cases side by side must not change any case's result.
    # Tolerance 1e-9 relative: the pool runs each case with one BLAS thread, the single
    # runs with all of them, which may reorder floating-point sums in the solver.
    path = write_study(tmp_path, FOUR)
    assert main(["sweep", str(path), "--out", str(tmp_path / "out"), "--workers", "2",
                 "--quiet"]) == 0
    rows = read_table(tmp_path / "out" / "table.csv")
    assert len(rows) == 4
    assert list(rows[0])[:3] == ["case", "optimize.volume_fraction", "optimize.filter_radius"]
    for row in rows:
        assert row["status"] == "ok", row["error"]
        settings = {k: float(row[k]) for k in FOUR}
        single = tmp_path / f"single-{row['case']}"
        problem_file = tmp_path / f"{row['case']}.toml"
        problem_file.write_text(to_toml(apply(settings)))
        assert main(["optimize", str(problem_file), "--out", str(single), "--quiet"]) == 0
        summary = json.loads((single / "summary.json").read_text())
        assert float(row["compliance"]) == pytest.approx(summary["compliance"], rel=1e-9)
        assert float(row["volume_fraction"]) == pytest.approx(summary["volume_fraction"], rel=1e-9)
        assert int(row["iterations"]) == summary["iterations"]
        case_dir = tmp_path / "out" / "cases" / row["case"]
        with np.load(case_dir / "result.npz", allow_pickle=False) as a, \
                np.load(single / "result.npz", allow_pickle=False) as b:
            np.testing.assert_allclose(a["density"], b["density"], atol=1e-9)
        # the case folder holds its own problem file, equal to the one built here
        assert (case_dir / "problem.toml").read_text() == problem_file.read_text()
    # different settings -> different results: the comparison above is not vacuous
    assert len({row["compliance"] for row in rows}) == 4
    assert (tmp_path / "out" / "study.png").stat().st_size > 0


def _case_summaries(out):
    """summary.json of each case folder, by case name.

    pathlib's ``*`` also matches hidden names: a killed writer's temporary folder
    (``.CASE.new-...``, summary.json written last, just before the swap) would count as
    a finished case (seen once in a loop of this test).
    """
    return {p.parent.name: p for p in out.glob("cases/*/summary.json")
            if not p.parent.name.startswith(".")}


def test_killed_sweep_resumes_with_only_the_missing_cases(tmp_path, monkeypatch):
    vary = {"optimize.volume_fraction": [0.3, 0.35, 0.4, 0.45, 0.5, 0.55]}
    path = write_study(tmp_path, vary, iterations=40)
    out = tmp_path / "out"
    proc = subprocess.Popen(
        [sys.executable, "-m", "topopt.cli", "sweep", str(path), "--out", str(out),
         "--workers", "2", "--quiet"],
        cwd=REPO, start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
    )
    try:
        deadline = time.monotonic() + 120
        while len(_case_summaries(out)) < 2:
            assert proc.poll() is None, proc.stderr.read().decode()
            assert time.monotonic() < deadline, "no case finished within 120 s"
            time.sleep(0.02)
    finally:
        # the sweep and its worker processes share the new session's process group
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
        proc.stderr.close()
    before = {name: p.stat().st_mtime_ns for name, p in _case_summaries(out).items()}
    assert 2 <= len(before) < 6, "the kill came too late to test resuming"

    ran = []
    real = study.run_case
    monkeypatch.setattr(study, "run_case", lambda *a, **k: ran.append(1) or real(*a, **k))
    rows = study.run(path, out_dir=out, workers=1)
    assert len(ran) == 6 - len(before)
    assert [r["status"] for r in rows] == ["ok"] * 6
    after = {name: p.stat().st_mtime_ns for name, p in _case_summaries(out).items()}
    assert len(after) == 6
    assert all(after[name] == mtime for name, mtime in before.items())
    # a third run has nothing left to do
    ran.clear()
    assert study.run(path, out_dir=out, workers=1) == rows
    assert ran == []


def _comparable(rows: list[dict]) -> list[dict]:
    return [{k: v for k, v in r.items() if k != "elapsed_s"} for r in rows]


def _assert_same_rows(a: list[dict], b: list[dict]) -> None:
    assert len(a) == len(b)
    for ra, rb in zip(_comparable(a), _comparable(b), strict=True):
        assert ra.keys() == rb.keys()
        for key in ra:
            if isinstance(ra[key], float):
                # same algorithm, same BLAS thread count: only a hair of rounding allowed
                assert ra[key] == pytest.approx(rb[key], rel=1e-9), key
            else:
                assert ra[key] == rb[key], key


def test_local_dask_cluster_gives_the_same_table_as_the_process_pool(tmp_path):
    distributed = pytest.importorskip("distributed")
    path = write_study(tmp_path, FOUR)
    pool_rows = study.run(path, out_dir=tmp_path / "pool", workers=2)
    # In-process cluster (no network at all): two single-threaded workers.
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        dask_rows = study.run(path, out_dir=tmp_path / "dask", scheduler=cluster.scheduler_address)
    assert [r["status"] for r in dask_rows] == ["ok"] * 4
    _assert_same_rows(pool_rows, dask_rows)
    assert (tmp_path / "pool" / "table.csv").read_text().count("\n") == 5
    pool_csv = read_table(tmp_path / "pool" / "table.csv")
    dask_csv = read_table(tmp_path / "dask" / "table.csv")
    assert [r["case"] for r in pool_csv] == [r["case"] for r in dask_csv]


@pytest.mark.slow
def test_cli_dask_flag_starts_a_local_cluster_of_worker_processes(tmp_path):
    # Worker processes take several seconds to start on 2 cores, hence slow.
    pytest.importorskip("distributed")
    path = write_study(tmp_path, {"optimize.volume_fraction": [0.35, 0.5]})
    assert main(["sweep", str(path), "--out", str(tmp_path / "dask"), "--dask", "--workers", "2",
                 "--quiet"]) == 0
    pool_rows = study.run(path, out_dir=tmp_path / "pool", workers=2)
    dask_rows = study.run(path, out_dir=tmp_path / "dask", workers=2)  # all reused
    _assert_same_rows(pool_rows, dask_rows)


def test_invalid_value_fails_alone_with_its_error(tmp_path):
    vary = {"optimize.volume_fraction": [0.4, 1.5, 0.5]}
    path = write_study(tmp_path, vary)
    code = main(["sweep", str(path), "--out", str(tmp_path / "out"), "--workers", "1", "--quiet"])
    assert code == 1  # some case failed
    rows = read_table(tmp_path / "out" / "table.csv")
    assert [r["status"] for r in rows] == ["ok", "failed", "ok"]
    assert "optimize.volume_fraction" in rows[1]["error"] and "1.5" in rows[1]["error"]
    assert rows[1]["compliance"] == ""
    assert all(math.isfinite(float(rows[i]["compliance"])) for i in (0, 2))
    assert not (tmp_path / "out" / "cases" / rows[1]["case"] / "summary.json").exists()


def test_failure_while_running_is_recorded_and_the_rest_finish(tmp_path, monkeypatch):
    import topopt.driver

    real = topopt.driver.optimize

    def flaky(problem, **kwargs):
        if problem.optimize.volume_fraction == 0.5:
            raise RuntimeError("solver blew up")
        return real(problem, **kwargs)

    monkeypatch.setattr(topopt.driver, "optimize", flaky)
    path = write_study(tmp_path, {"optimize.volume_fraction": [0.4, 0.5, 0.45]})
    rows = study.run(path, out_dir=tmp_path / "out", workers=1)
    assert [r["status"] for r in rows] == ["ok", "failed", "ok"]
    assert rows[1]["error"] == "RuntimeError: solver blew up"
    # a failed case is tried again on the next run
    monkeypatch.setattr(topopt.driver, "optimize", real)
    rows = study.run(path, out_dir=tmp_path / "out", workers=1)
    assert [r["status"] for r in rows] == ["ok"] * 3


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ('problem = "tiny.toml"\ncolour = 1\n[vary]\n"optimize.volume_fraction" = [0.3]\n',
         "colour: unknown key"),
        ('problem = "tiny.toml"\n[vary]\n"optimize.volume_fraction" = 0.3\n',
         "vary.optimize.volume_fraction: expected a list"),
        ('problem = "tiny.toml"\nmode = "zip"\n[vary]\n"optimize.volume_fraction" = [0.3, 0.4]\n'
         '"optimize.penalty" = [3.0]\n', "equal length"),
        ('problem = "tiny.toml"\n[vary]\n"optimize.volume_fractoin" = [0.3, 0.4]\n',
         "no case is valid"),
        ('problem = "missing.toml"\n[vary]\n"optimize.volume_fraction" = [0.3]\n',
         "file not found"),
        ('problem = "tiny.toml"\n[set]\n"optimize.penalty" = -1.0\n[vary]\n'
         '"optimize.volume_fraction" = [0.3]\n', "set: optimize.penalty"),
        ('problem = "tiny.toml"\n[vary]\n"optimize.volume_fraction" = [0.3, 0.3]\n',
         "appears twice"),
        ('problem = "tiny.toml"\n[vary\n', "not valid TOML"),
    ],
)
def test_unusable_study_file_is_one_line_and_exit_2(tmp_path, capsys, text, expected):
    write_study(tmp_path, {"optimize.volume_fraction": [0.3]})
    path = tmp_path / "bad.toml"
    path.write_text(text)
    out = tmp_path / "out"
    assert main(["sweep", str(path), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and expected in err, err
    assert not out.exists()  # nothing written before the study is known to be usable


def test_zip_mode_and_nested_keys(tmp_path):
    # [vary] build.direction = [...] (unquoted) parses as nested tables; it must work too
    path = tmp_path / "zip.toml"
    (tmp_path / "tiny.toml").write_text(to_toml(TINY))
    path.write_text('problem = "tiny.toml"\nmode = "zip"\n[vary]\n'
                    'optimize.volume_fraction = [0.3, 0.4]\noptimize.penalty = [3.0, 2.0]\n')
    st = study.load_study(path)
    assert st.keys == ("optimize.volume_fraction", "optimize.penalty")
    assert [c.settings for c in st.cases] == [
        {"optimize.volume_fraction": 0.3, "optimize.penalty": 3.0},
        {"optimize.volume_fraction": 0.4, "optimize.penalty": 2.0},
    ]


def test_case_id_is_stable_and_follows_the_whole_problem():
    settings = {"optimize.volume_fraction": 0.3}
    a = study.case_id(apply(settings), settings)
    reordered = dict(reversed(list(apply(settings).items())))
    assert study.case_id(reordered, settings) == a
    other = apply({**settings, "optimize.penalty": 2.5})
    assert study.case_id(other, settings) != a
    assert a.startswith("0.3-")


def test_non_dominated_cases():
    # common practice (Pareto dominance, all costs minimised)
    flags = study.non_dominated([(1.0, 5.0), (2.0, 3.0), (3.0, 4.0), (4.0, 1.0), (2.0, 3.0)])
    assert flags == [True, True, False, True, True]


def test_bundled_overhang_study_is_valid_and_runs_on_a_coarse_grid(tmp_path):
    import tomllib

    path = REPO / "examples" / "overhang-study.toml"
    st = study.load_study(path)
    assert len(st.cases) == 24 and all(c.problem is not None for c in st.cases)
    # The same study, cut down: two values per key, a coarse grid, three iterations.
    data = tomllib.loads(path.read_text())
    data["problem"] = str(REPO / "examples" / data["problem"])
    data["set"].update({"domain.shape": [40, 20], "domain.element_size": 1.5,
                        "optimize.filter_radius": 3.0, "optimize.max_iterations": 3})
    data["vary"] = {k: v[:2] for k, v in data["vary"].items()}
    rows = study.run(data, out_dir=tmp_path / "out", workers=1)
    assert len(rows) == 8 and all(r["status"] == "ok" for r in rows), rows
    assert (tmp_path / "out" / "study.png").stat().st_size > 0


def test_cases_are_measured_once_in_the_runner_and_the_summary_holds_it(tmp_path, monkeypatch):
    # the case's figures are measured with its result (in the worker) and written as they
    # are: one measurement per case, and summary.json holds the result's own metrics
    import topopt.export
    from topopt.results import read_summary

    path = write_study(tmp_path, {"build.direction": ["+y", "none"]}, iterations=4)
    measured = []
    real = topopt.export.printability_summary
    monkeypatch.setattr(topopt.export, "printability_summary",
                        lambda *a, **k: measured.append(1) or real(*a, **k))
    results = {}
    real_run_case = study.run_case
    monkeypatch.setattr(study, "run_case", lambda table, **k: results.setdefault(
        table.get("build", {}).get("direction", "none"), real_run_case(table, **k)))
    rows = study.run(path, out_dir=tmp_path / "out", workers=1)
    assert len(measured) == 2
    for row in rows:
        metrics = results[row["build.direction"]]["result"].metrics
        summary = read_summary(tmp_path / "out" / "cases" / row["case"])
        assert summary["unsupported_elements"] == metrics.unsupported_elements
        assert summary["support_volume"] == metrics.support_volume
        assert row["unsupported_elements"] == metrics.unsupported_elements
    assert {r["build.direction"]: r["unsupported_elements"] is None for r in rows} == {
        "+y": False, "none": True}
