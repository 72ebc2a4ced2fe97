"""``buttress optimize``: the results folder, an independent check of the reported
compliance, refusing to overwrite, and resuming an interrupted run.

Sources
-------
- Results-folder contract: DESIGN.md ("Results folder").
- Reported compliance vs an independent recomputation from ``result.npz`` and the
  folder's ``problem.toml`` with scikit-fem (Gustafsson & McBain, JOSS 5(52):2369, 2020;
  see ``tests/conftest.py``): relative difference < 1e-8.
- Resume: an interrupted run continued with ``--resume`` ends with the same design as an
  uninterrupted one (issue 2); the loop is deterministic, so the tolerance is 1e-12.
- Command-line behaviour (``main(argv)`` called directly, one line and exit code 2 on bad
  input): common practice, STYLE.md.
"""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import time
import tomllib
from pathlib import Path

import numpy as np
import pytest

import topopt.results as optimize_command  # run() takes save_checkpoint from here
from topopt.cli import main

ROOT = Path(__file__).resolve().parents[2]

PROBLEM = """\
name = "two-case plate"

[domain]
shape = [24, 12]
element_size = 0.5
thickness = 3.0

[material]
youngs_modulus = 70000.0
poisson_ratio = 0.33
mass_density = 2.7e-9

[[restraints]]
where = { x = [0.0, 0.0] }
fix = ["x", "y"]

[[loads]]
where = { x = [12.0, 12.0], y = [0.0, 1.0] }
force = [0.0, -50.0]
case = "down"

[[loads]]
where = { center = [9.0, 4.5], radius = 0.8 }
force = [30.0, 10.0]
case = "pull"

[[passive]]
where = { center = [9.0, 4.5], radius = 1.6 }
state = "solid"

[[passive]]
where = { x = [3.0, 5.0], y = [2.0, 4.0] }
state = "void"

[optimize]
volume_fraction = 0.4
filter_radius = 0.9
max_iterations = 12
change_tolerance = 1e-6
checkpoint_every = 3
"""


def write_problem(folder: Path, text: str = PROBLEM) -> Path:
    path = folder / "problem-in.toml"
    path.write_text(text)
    return path


def read_folder(out: Path) -> dict:
    with np.load(out / "result.npz", allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    with open(out / "history.csv", newline="") as handle:
        history = list(csv.DictReader(handle))
    return {
        "summary": json.loads((out / "summary.json").read_text()),
        "arrays": arrays,
        "history": history,
        "problem": tomllib.loads((out / "problem.toml").read_text()),
    }


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """An uninterrupted run of PROBLEM."""
    root = tmp_path_factory.mktemp("finished")
    out = root / "out"
    assert main(["optimize", str(write_problem(root)), "--out", str(out), "--quiet"]) == 0
    return out


def test_results_folder_contents(finished):
    names = {p.name for p in finished.iterdir()}
    assert {"summary.json", "result.npz", "history.csv", "design.png", "design.vtu",
            "problem.toml"} <= names
    assert "checkpoint.npz" not in names
    assert not [n for n in names if n.startswith(".")], names  # no temporary files left
    got = read_folder(finished)
    summary = got["summary"]
    for key in ("compliance", "volume_fraction", "iterations", "converged", "build_direction",
                "overhang_angle", "grey_level", "elapsed_s", "version"):
        assert key in summary, key
    density, design = got["arrays"]["density"], got["arrays"]["design"]
    assert density.shape == design.shape == (24, 12)
    assert summary["iterations"] == 12 and summary["converged"] is False
    assert abs(summary["volume_fraction"] - density.mean()) < 1e-12
    assert abs(summary["volume_fraction"] - 0.4) < 1e-3
    grey = np.mean((density > 0.1) & (density < 0.9))
    assert abs(summary["grey_level"] - grey) < 1e-12
    history = got["history"]
    assert [int(r["iteration"]) for r in history] == list(range(1, 13))
    for column in ("iteration", "compliance", "volume_fraction", "change", "elapsed_s"):
        assert column in history[0], column
    elapsed = [float(r["elapsed_s"]) for r in history]
    assert elapsed == sorted(elapsed)
    assert float(history[-1]["compliance"]) < float(history[0]["compliance"])
    # Passive elements keep their state in the physical density.
    assert np.all(density[18:20, 8:10] == 1.0)  # centre of the solid lug ring
    assert np.all(density[6:10, 4:8] == 0.0)  # the void box


def test_reported_compliance_matches_independent_recomputation(finished, skfem_reference):
    got = read_folder(finished)
    ref = skfem_reference.compliance(got["problem"], got["arrays"]["density"])
    reported = got["summary"]["compliance"]
    assert abs(reported - ref) / ref < 1e-8, (reported, ref)
    # The folder's problem.toml is the file that was run.
    assert got["problem"] == tomllib.loads(PROBLEM)


def test_existing_results_are_not_overwritten(finished, capsys):
    before = {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in finished.iterdir()}
    problem = finished.parent / "problem-in.toml"
    code = main(["optimize", str(problem), "--out", str(finished), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and "--overwrite" in err
    after = {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in finished.iterdir()}
    assert after == before
    # --resume on a finished folder does nothing.
    assert main(["optimize", str(problem), "--out", str(finished), "--resume", "--quiet"]) == 0
    after = {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in finished.iterdir()}
    assert after == before


def test_quiet_is_silent_and_default_reports(tmp_path, capsys):
    text = PROBLEM.replace("max_iterations = 12", "max_iterations = 2")
    problem = write_problem(tmp_path, text)
    assert main(["optimize", str(problem), "--out", str(tmp_path / "q"), "--quiet"]) == 0
    captured = capsys.readouterr()
    assert captured.out == "" and captured.err == ""
    assert main(["optimize", str(problem), "--out", str(tmp_path / "v")]) == 0
    captured = capsys.readouterr()
    assert "compliance" in captured.out and str(tmp_path / "v") in captured.out


@pytest.mark.parametrize("extra", [["--solver", "nonsense"], ["--overwrite", "--solver", "x"]])
def test_bad_solver_option_leaves_results_alone(finished, capsys, extra):
    before = {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in finished.iterdir()}
    problem = finished.parent / "problem-in.toml"
    code = main(["optimize", str(problem), "--out", str(finished), "--quiet", *extra])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and "Traceback" not in err
    after = {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in finished.iterdir()}
    assert after == before


def test_out_is_a_file(tmp_path, capsys):
    target = tmp_path / "taken"
    target.write_text("keep me")
    code = main(["optimize", str(write_problem(tmp_path)), "--out", str(target), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and str(target) in err
    assert target.read_text() == "keep me"


def test_help_explains_every_option(capsys):
    with pytest.raises(SystemExit) as info:
        main(["optimize", "--help"])
    assert info.value.code == 0
    text = capsys.readouterr().out
    for option in ("--out", "--resume", "--overwrite", "--solver", "--quiet"):
        assert option in text, option
    with pytest.raises(SystemExit):
        main(["--help"])
    assert "optimize" in capsys.readouterr().out


def run_interrupted(folder: Path, monkeypatch, capsys, *, at_iteration: int):
    """Run PROBLEM; the checkpoint at ``at_iteration`` raises KeyboardInterrupt right
    after writing its file, as Ctrl-C between two iterations would (deterministic).

    Returns the problem path, the results folder and the iterations checkpointed.
    """
    problem = write_problem(folder)
    out = folder / "out"
    real_save = optimize_command.save_checkpoint
    calls = []

    def save_then_interrupt(path, state, digest):
        real_save(path, state, digest)
        calls.append(state["iteration"])
        if state["iteration"] == at_iteration and calls.count(at_iteration) == 1:
            raise KeyboardInterrupt

    monkeypatch.setattr(optimize_command, "save_checkpoint", save_then_interrupt)
    try:
        code = main(["optimize", str(problem), "--out", str(out), "--quiet"])
    finally:
        monkeypatch.setattr(optimize_command, "save_checkpoint", real_save)
    err = capsys.readouterr().err
    assert code == 130 and "--resume" in err
    assert (out / "checkpoint.npz").exists() and not (out / "summary.json").exists()
    return problem, out, calls


def test_resume_after_interrupt_gives_the_same_result(tmp_path, finished, monkeypatch, capsys):
    problem, out, calls = run_interrupted(tmp_path, monkeypatch, capsys, at_iteration=6)
    # Checkpoints every 3 iterations, then once more on the interrupt.
    assert calls == [3, 6, 6]
    # Without --resume the interrupted run is not thrown away.
    assert main(["optimize", str(problem), "--out", str(out), "--quiet"]) == 2
    capsys.readouterr()
    assert main(["optimize", str(problem), "--out", str(out), "--resume", "--quiet"]) == 0
    assert_same_run(read_folder(out), read_folder(finished))


def assert_same_run(resumed: dict, reference: dict) -> None:
    for name in ("density", "design"):
        a, b = resumed["arrays"][name], reference["arrays"][name]
        assert np.max(np.abs(a - b)) <= 1e-12, name
    assert resumed["summary"]["iterations"] == reference["summary"]["iterations"]
    assert abs(resumed["summary"]["compliance"] / reference["summary"]["compliance"] - 1) < 1e-12
    got = [float(r["compliance"]) for r in resumed["history"]]
    want = [float(r["compliance"]) for r in reference["history"]]
    assert np.allclose(got, want, rtol=1e-12, atol=0)
    # The clock continues across the interruption (seconds since the run started).
    elapsed = [float(r["elapsed_s"]) for r in resumed["history"]]
    assert elapsed == sorted(elapsed)


def test_resume_with_a_changed_problem_is_refused(tmp_path, monkeypatch, capsys):
    _, out, _ = run_interrupted(tmp_path, monkeypatch, capsys, at_iteration=3)
    before = (out / "checkpoint.npz").read_bytes()
    changed = write_problem(tmp_path, PROBLEM.replace("volume_fraction = 0.4",
                                                      "volume_fraction = 0.3"))
    code = main(["optimize", str(changed), "--out", str(out), "--resume", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and "checkpoint" in err
    assert (out / "checkpoint.npz").read_bytes() == before


@pytest.mark.parametrize("damage", ["truncated", "empty", "zeros"])
def test_damaged_checkpoint_is_one_line(tmp_path, monkeypatch, capsys, damage):
    # A checkpoint cut short (full disk, killed copy) is reported, not a traceback.
    problem, out, _ = run_interrupted(tmp_path, monkeypatch, capsys, at_iteration=3)
    path = out / "checkpoint.npz"
    data = path.read_bytes()
    damaged = {"truncated": data[: len(data) // 2], "empty": b"", "zeros": bytes(64)}
    path.write_bytes(damaged[damage])
    before = path.read_bytes()
    code = main(["optimize", str(problem), "--out", str(out), "--resume", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert "checkpoint" in err and "Traceback" not in err
    assert path.read_bytes() == before


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_signal_to_a_running_process_then_resume(tmp_path, signum):
    # A real Ctrl-C (or a kill from a batch system): start the command in a subprocess,
    # wait for its first checkpoint, send the signal, then resume in-process.
    text = PROBLEM.replace("max_iterations = 12", "max_iterations = 120").replace(
        "checkpoint_every = 3", "checkpoint_every = 2")
    problem = write_problem(tmp_path, text)
    out = tmp_path / "out"
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen(
        [sys.executable, "-m", "topopt.cli", "optimize", str(problem), "--out", str(out),
         "--quiet"],
        cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 120
        while not (out / "checkpoint.npz").exists():
            assert proc.poll() is None, proc.communicate()
            assert time.monotonic() < deadline
            time.sleep(0.01)
        proc.send_signal(signum)
        _, err = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 130, err
    assert "Traceback" not in err and "--resume" in err
    assert not (out / "summary.json").exists()
    with np.load(out / "checkpoint.npz", allow_pickle=False) as data:
        stopped_at = int(data["iteration"])
    assert 2 <= stopped_at < 120
    assert main(["optimize", str(problem), "--out", str(out), "--resume", "--quiet"]) == 0
    # Reference: the same problem run without interruption.
    reference = tmp_path / "reference"
    assert main(["optimize", str(problem), "--out", str(reference), "--quiet"]) == 0
    assert_same_run(read_folder(out), read_folder(reference))


PROBLEM_3D = """\
name = "small 3D mount"

[domain]
shape = [8, 4, 4]
element_size = 2.0

[material]
youngs_modulus = 200000.0
poisson_ratio = 0.3

[[restraints]]
where = { x = [0.0, 0.0] }

[[loads]]
where = { x = [16.0, 16.0], y = [0.0, 0.0], z = [2.0, 6.0] }
force = [0.0, -100.0, 10.0]

[[passive]]
where = { center = [8.0, 4.0, 0.0], radius = 1.5, axis = "z" }
state = "void"

[optimize]
volume_fraction = 0.3
filter_radius = 3.0
max_iterations = 4
"""


def test_reported_compliance_matches_recomputation_3d(tmp_path, skfem_reference):
    out = tmp_path / "out"
    problem = write_problem(tmp_path, PROBLEM_3D)
    assert main(["optimize", str(problem), "--out", str(out), "--quiet"]) == 0
    got = read_folder(out)
    assert got["arrays"]["density"].shape == (8, 4, 4)
    ref = skfem_reference.compliance(got["problem"], got["arrays"]["density"])
    reported = got["summary"]["compliance"]
    assert abs(reported - ref) / ref < 1e-8, (reported, ref)
