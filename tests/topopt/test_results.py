"""The results folder as one unit: swap, lock, refusals, damaged files, checkpoints.

Sources
-------
- Results-folder contract: DESIGN.md ("Results folder") and issue 15 ("the folder is
  either the complete old one or the complete new one", "two concurrent runs: one is
  refused at once").
- Atomic replacement by rename / exchange of a directory entry: POSIX rename(2) and Linux
  renameat2(2) RENAME_EXCHANGE (man-pages); advisory locks: flock(2). Common practice.
- NumPy file format (magic, header, data): NEP 1, "A simple file format for NumPy arrays".
"""

from __future__ import annotations

import contextlib
import os
import random
import shutil
import signal
import subprocess
import sys
import time
import tomllib
import zipfile
from pathlib import Path

import numpy as np
import pytest
from helpers import SMALL, refused, write_problem

from topopt.cli import main
from topopt.results import (
    ResultsError,
    folder_lock,
    load_checkpoint,
    read_arrays,
    read_results,
    save_checkpoint,
)

ROOT = Path(__file__).resolve().parents[2]

@pytest.fixture(scope="module")
def finished_folder(tmp_path_factory):
    root = tmp_path_factory.mktemp("results")
    problem = write_problem(root)
    out = root / "out"
    assert main(["optimize", str(problem), "--out", str(out), "--quiet"]) == 0
    return problem, out


@pytest.fixture
def finished(tmp_path, finished_folder):
    """A private copy of a finished results folder and its problem file."""
    problem, out = finished_folder
    shutil.copy(problem, tmp_path / "small.toml")
    shutil.copytree(out, tmp_path / "runs" / "out")
    return tmp_path / "small.toml", tmp_path / "runs" / "out"


# ---------------------------------------------------------------------------- refusals


def test_users_own_files_are_not_replaced_without_overwrite(tmp_path, capsys):
    problem = write_problem(tmp_path)
    out = tmp_path / "runs" / "mine"
    out.mkdir(parents=True)
    (out / "design.png").write_bytes(b"the user's own picture")
    (out / "notes.txt").write_text("keep")
    refused(capsys, ["optimize", str(problem), "--out", str(out), "--quiet"], out,
            str(out), "--overwrite")
    # with --overwrite the folder is replaced, and files buttress does not write are kept
    assert main(["optimize", str(problem), "--out", str(out), "--quiet", "--overwrite"]) == 0
    assert (out / "notes.txt").read_text() == "keep"
    assert (out / "design.png").read_bytes() != b"the user's own picture"
    assert (out / "summary.json").exists()


def test_finished_results_are_kept_without_overwrite(finished, capsys):
    problem, out = finished
    refused(capsys, ["optimize", str(problem), "--out", str(out), "--quiet"], out,
            str(out), "--overwrite")


@contextlib.contextmanager
def unwritable(folder: Path):
    """``folder`` cannot be written while the block runs (skips the test where impossible)."""
    if os.geteuid() == 0:
        # root writes through permission bits; the immutable flag stops root as well
        if shutil.which("chattr") is None or subprocess.run(
                ["chattr", "+i", str(folder)], capture_output=True).returncode != 0:
            pytest.skip("cannot make a folder unwritable for root here (no chattr +i)")
    else:
        folder.chmod(0o555)
    try:
        yield
    finally:
        if os.geteuid() == 0:
            subprocess.run(["chattr", "-i", str(folder)], check=True)
        else:
            folder.chmod(0o755)


def test_unwritable_target_is_refused_before_the_run(tmp_path, capsys):
    problem = write_problem(tmp_path, SMALL.replace("max_iterations = 4", "max_iterations = 5000"))
    parent = tmp_path / "locked"
    parent.mkdir()
    with unwritable(parent):
        t0 = time.perf_counter()
        code = main(["optimize", str(problem), "--out", str(parent / "out"), "--quiet"])
        err = capsys.readouterr().err
        # refused at once (5000 iterations would take minutes), one line naming the folder
        assert code == 2 and time.perf_counter() - t0 < 5.0
        assert len(err.strip().splitlines()) == 1 and str(parent / "out") in err, err
    assert list(parent.iterdir()) == []


def test_a_second_writer_is_refused_at_once(tmp_path, capsys):
    out = tmp_path / "out"
    problem = write_problem(tmp_path)
    with folder_lock(out):
        t0 = time.perf_counter()
        code = main(["optimize", str(problem), "--out", str(out), "--quiet"])
        err = capsys.readouterr().err
        assert code == 2 and time.perf_counter() - t0 < 5.0
        assert "another buttress run" in err and len(err.strip().splitlines()) == 1
    assert not out.exists()
    # the lock is released (and its file removed) when the holder ends
    assert main(["optimize", str(problem), "--out", str(out), "--quiet"]) == 0
    assert not (tmp_path / ".out.lock").exists()


def test_two_concurrent_processes_one_is_refused(tmp_path):
    problem = write_problem(tmp_path, SMALL.replace("max_iterations = 4", "max_iterations = 60")
                                      .replace("[optimize]", "[optimize]\nchange_tolerance = 1e-9"))
    out = tmp_path / "out"
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    cmd = [sys.executable, "-m", "topopt.cli", "optimize", str(problem), "--out", str(out),
           "--quiet"]
    procs = [subprocess.Popen(cmd, cwd=ROOT, env=env, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for _ in range(2)]
    results = [p.communicate(timeout=300) for p in procs]
    codes = sorted(p.returncode for p in procs)
    assert codes == [0, 2], (codes, results)
    loser = results[[p.returncode for p in procs].index(2)][1]
    assert "another buttress run" in loser and "Traceback" not in loser
    assert read_results(out).summary["iterations"] == 60


# ---------------------------------------------------------------------------- one unit

KILL_SCRIPT = """
import os, sys, time
from pathlib import Path
from topopt.problem import load_problem
from topopt.driver import optimize
from topopt.results import folder_lock, write_results
problem = load_problem(sys.argv[1])
result = optimize(problem)
with folder_lock(Path(sys.argv[2])):
    print("writing", flush=True)
    write_results(result, problem, sys.argv[2])
print("done", flush=True)
"""


def folder_is_complete(out: Path, iterations: int) -> bool:
    folder = read_results(out)
    return folder.summary["iterations"] == iterations and folder.problem.optimize.max_iterations == iterations


@pytest.mark.parametrize("rounds", [4, pytest.param(50, marks=pytest.mark.slow)])
def test_kill_during_writing_leaves_the_old_or_the_new_folder(tmp_path, finished, rounds):
    # kill -9 at a random moment of writing an --overwrite run, many times: the folder
    # must always read back complete, either the old run (4 iterations) or the new (3)
    problem, out = finished
    new_problem = write_problem(tmp_path, SMALL.replace("max_iterations = 4", "max_iterations = 3"),
                                name="new.toml")
    script = tmp_path / "kill_writer.py"
    script.write_text(KILL_SCRIPT)
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    pristine = tmp_path / "pristine"
    shutil.copytree(out, pristine)
    # how long writing takes here (a copy of the folder, not killed)
    spare = tmp_path / "spare" / "out"
    shutil.copytree(out, spare)
    proc = subprocess.Popen([sys.executable, str(script), str(new_problem), str(spare)],
                            cwd=ROOT, env=env, stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "writing"
    t0 = time.perf_counter()
    assert proc.stdout.readline().strip() == "done"
    duration = time.perf_counter() - t0
    proc.wait()
    proc.stdout.close()
    # kill moments spread over the whole write (and a little after), in random order
    rng = random.Random(15)
    moments = [1.2 * duration * (k + rng.random()) / rounds for k in range(rounds)]
    rng.shuffle(moments)
    outcomes = {"old": 0, "new": 0}
    for moment in moments:
        proc = subprocess.Popen([sys.executable, str(script), str(new_problem), str(out)],
                                cwd=ROOT, env=env, stdout=subprocess.PIPE, text=True)
        assert proc.stdout.readline().strip() == "writing"
        time.sleep(moment)
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        proc.stdout.close()
        with folder_lock(out):  # tidies what the killed writer left behind
            pass
        if folder_is_complete(out, 4):
            outcomes["old"] += 1
        else:
            assert folder_is_complete(out, 3)
            outcomes["new"] += 1
            # back to the old run for the next round
            shutil.rmtree(out)
            shutil.copytree(pristine, out)
        leftovers = [p.name for p in out.parent.iterdir() if p.name.startswith(".")]
        assert leftovers == [], leftovers
    print(f"kill -9 while writing, {rounds} rounds: {outcomes}")
    assert outcomes["old"] + outcomes["new"] == rounds


# ---------------------------------------------------------------------------- reading


def damaged_copies(path: Path, tmp_path: Path) -> dict[str, Path]:
    data = path.read_bytes()
    out = {}
    truncated = tmp_path / "truncated.npz"
    truncated.write_bytes(data[: len(data) // 2])
    out["truncated"] = truncated
    # flip a byte inside the first member's data: the CRC no longer matches
    with zipfile.ZipFile(path) as archive:
        info = archive.infolist()[0]
    offset = info.header_offset + 30 + len(info.filename.encode()) + len(info.extra) + 200
    flipped = bytearray(data)
    flipped[offset] ^= 0xFF
    bad_crc = tmp_path / "bad-crc.npz"
    bad_crc.write_bytes(bytes(flipped))
    out["bad-crc"] = bad_crc
    garbage = tmp_path / "garbage.npz"
    garbage.write_bytes(b"PK\x03\x04" + bytes(100))
    out["garbage"] = garbage
    compressed = tmp_path / "compressed.npz"
    with np.load(path) as arrays:
        np.savez_compressed(compressed, **{k: arrays[k] for k in arrays.files})
    raw = bytearray(compressed.read_bytes())
    with zipfile.ZipFile(compressed) as archive:
        info = archive.infolist()[0]
    start = info.header_offset + 30 + len(info.filename.encode()) + len(info.extra)
    raw[start + 10: start + 40] = bytes(30)  # damage the deflate stream (zlib error)
    bad_zlib = tmp_path / "bad-zlib.npz"
    bad_zlib.write_bytes(bytes(raw))
    out["bad-zlib"] = bad_zlib
    return out


@pytest.mark.parametrize("damage", ["truncated", "bad-crc", "garbage", "bad-zlib"])
def test_damaged_npz_is_one_line_for_inspect_and_export(tmp_path, finished, capsys, damage):
    problem, out = finished
    bad = damaged_copies(out / "result.npz", tmp_path)[damage]
    with pytest.raises(ResultsError) as info:
        read_arrays(bad)
    assert str(bad) in str(info.value) and "\n" not in str(info.value)
    shutil.copy(bad, out / "result.npz")
    report = tmp_path / "report"
    refused(capsys, ["inspect", str(out), "--out", str(report)], out, "result.npz")
    refused(capsys, ["export", str(out), "--format", "png"], out, "result.npz")
    refused(capsys, ["inspect", str(bad), "--element-size", "1", "--out", str(report)], out,
            str(bad))


def test_npy_header_is_checked_before_reading(tmp_path, finished, capsys):
    # a header claiming (1e5)^3 doubles (7 PiB) with no data behind it
    path = tmp_path / "huge.npy"
    with open(path, "wb") as handle:
        np.lib.format.write_array_header_1_0(
            handle, {"descr": "<f8", "fortran_order": False, "shape": (100000,) * 3})
    _, out = finished
    err = refused(capsys, ["inspect", str(path), "--element-size", "1", "--out",
                           str(tmp_path / "r")], out, str(path), "memory cap")
    assert "GiB" in err
    # object arrays are refused from the header alone (nothing is unpickled)
    obj = tmp_path / "objects.npy"
    np.save(obj, np.array([{"a": 1}, None], dtype=object), allow_pickle=True)
    refused(capsys, ["inspect", str(obj), "--element-size", "1", "--out", str(tmp_path / "r")],
            out, str(obj), "objects")


def test_damaged_summary_is_reported_with_the_file(finished):
    _, out = finished
    (out / "summary.json").write_text("{not json")
    with pytest.raises(ResultsError, match="summary.json"):
        read_results(out)


# ---------------------------------------------------------------------------- checkpoints


def checkpoint_state(shape=(20, 10), iteration=3) -> dict:
    history = [{"iteration": i + 1, "compliance": 1.0 / (i + 1), "elapsed_s": 0.1 * i}
               for i in range(iteration)]
    return {"design": np.full(shape, 0.4), "iteration": iteration, "history": history}


def test_checkpoint_round_trip(tmp_path):
    path = tmp_path / "checkpoint.npz"
    save_checkpoint(path, checkpoint_state(), "abc")
    state = load_checkpoint(path, "abc", shape=(20, 10), max_iterations=10)
    assert state["iteration"] == 3 and state["design"].shape == (20, 10)
    assert [row["iteration"] for row in state["history"]] == [1, 2, 3]


@pytest.mark.parametrize("entry, edit", [
    ("iteration", lambda a: a.pop("iteration")),
    ("design", lambda a: a.__setitem__("design", np.zeros((7, 3)))),
    ("design", lambda a: a.__setitem__("design", np.full((20, 10), np.nan))),
    ("iteration", lambda a: a.__setitem__("iteration", np.array(-4))),
    ("iteration", lambda a: a.__setitem__("iteration", np.array(2.5))),
    ("history", lambda a: a.__setitem__("history", np.zeros((3, 9)))),
    ("continuation_beta", lambda a: a.__setitem__("continuation_beta", np.array(np.inf))),
])
def test_hand_made_checkpoint_is_one_line_naming_the_entry(tmp_path, finished, capsys,
                                                          entry, edit):
    problem, out = finished
    from topopt.commands.optimize import problem_digest
    from topopt.problem import load_problem

    digest = problem_digest(load_problem(problem))
    path = out / "checkpoint.npz"
    save_checkpoint(path, checkpoint_state(), digest)
    with np.load(path) as data:
        arrays = {k: data[k] for k in data.files}
    edit(arrays)
    np.savez(path, **arrays)
    err = refused(capsys, ["optimize", str(problem), "--out", str(out), "--resume", "--quiet"],
                  out, str(path), entry)
    assert "--overwrite" in err


def test_compare_and_sweep_refuse_a_folder_being_written(tmp_path, capsys):
    problem = write_problem(tmp_path)
    study = tmp_path / "study.toml"
    study.write_text('problem = "small.toml"\n[vary]\n"optimize.volume_fraction" = [0.3, 0.4]\n')
    for argv, out in ((["compare", str(problem), "--directions", "+y"], tmp_path / "cmp"),
                      (["sweep", str(study), "--workers", "1"], tmp_path / "sweep")):
        with folder_lock(out):
            t0 = time.perf_counter()
            code = main([*argv, "--out", str(out), "--quiet"])
            err = capsys.readouterr().err
            assert code == 2 and time.perf_counter() - t0 < 5.0, err
            assert "another buttress run" in err and len(err.strip().splitlines()) == 1
        assert not out.exists()


# ---------------------------------------------------------------------------- metrics


def plain(value):
    """A metric as ``summary.json`` holds it: tuples as lists, NaN as null (DESIGN.md)."""
    if isinstance(value, (tuple, list)):
        return [plain(v) for v in value]
    if isinstance(value, dict):
        return {k: plain(v) for k, v in value.items()}
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


@pytest.mark.parametrize("direction", ["+y", "none"])
def test_written_summary_is_the_results_own_metrics(tmp_path, monkeypatch, direction):
    import dataclasses

    import topopt.export
    from topopt.driver import optimize
    from topopt.problem import problem_from_dict
    from topopt.results import measure, read_summary, summary_dict, write_results

    table = tomllib.loads(SMALL)
    table["build"] = {"direction": direction}
    problem = problem_from_dict(table, source="small.toml")
    result = optimize(problem)
    assert result.metrics is None  # the loop itself measures nothing
    measured = measure(result, problem)
    metrics = measured.metrics
    assert measure(measured, problem) is measured
    if direction == "+y":
        assert metrics.unsupported_elements is not None and metrics.build_vector == (0.0, 1.0)
    else:
        assert metrics.unsupported_elements is None and metrics.support_volume is None
    # writing reads the figures from the result: measuring again would fail here
    def measured_again(*args, **kwargs):
        raise AssertionError("the summary writer measured the result again")

    for name in ("printability_summary", "length_scale_summary", "structural_summary_of"):
        monkeypatch.setattr(topopt.export, name, measured_again)
    out = tmp_path / "out"
    write_results(measured, problem, out, formats=())
    summary = read_summary(out)
    figures = metrics.as_dict()
    assert [f.name for f in dataclasses.fields(metrics)] == list(figures)
    assert {k: summary[k] for k in figures} == plain(figures)
    # the figures close the summary, in the dataclass's order (summary.json unchanged)
    assert list(summary)[-len(figures):] == list(figures)
    assert summary == plain(summary_dict(measured, problem))


# ---------------------------------------------------------------------------- compare


def compare_argv(problem: Path, out: Path, *more: str) -> list[str]:
    return ["compare", str(problem), "--directions", "+y", "--workers", "1", "--out", str(out),
            "--quiet", *more]


def test_two_concurrent_compares_one_is_refused_at_once(tmp_path):
    problem = write_problem(tmp_path, SMALL.replace("max_iterations = 4", "max_iterations = 120")
                                      .replace("[optimize]", "[optimize]\nchange_tolerance = 1e-9"))
    out = tmp_path / "cmp"
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    cmd = [sys.executable, "-m", "topopt.cli", *compare_argv(problem, out)]
    procs = [subprocess.Popen(cmd, cwd=ROOT, env=env, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for _ in range(2)]
    ended = {}
    deadline = time.monotonic() + 600
    while len(ended) < 2 and time.monotonic() < deadline:
        for k, p in enumerate(procs):
            if k not in ended and p.poll() is not None:
                ended[k] = time.monotonic()
        time.sleep(0.02)
    results = [p.communicate(timeout=60) for p in procs]
    codes = [p.returncode for p in procs]
    assert sorted(codes) == [0, 2], (codes, results)
    loser, winner = codes.index(2), codes.index(0)
    err = results[loser][1]
    assert "another buttress run" in err and "Traceback" not in err, err
    assert len(err.strip().splitlines()) == 1, err
    # refused at once: the loser ended while the winner was still running its cases
    assert ended[loser] < ended[winner]
    assert read_results(out / "plus-y").summary["iterations"] == 120
    assert (out / "comparison.csv").exists()


def test_compare_into_a_read_only_location_is_refused_before_any_run(tmp_path, capsys):
    problem = write_problem(tmp_path, SMALL.replace("max_iterations = 4", "max_iterations = 5000")
                                      .replace("[optimize]", "[optimize]\nchange_tolerance = 1e-9"))
    parent = tmp_path / "locked"
    parent.mkdir()
    with unwritable(parent):
        refused(capsys, compare_argv(problem, parent / "cmp"), parent, str(parent / "cmp"),
                "cannot write")
    assert list(parent.iterdir()) == []


@pytest.mark.parametrize("own", ["notes.txt", "comparison.png", "none/design.png",
                                 "plus-y/problem.toml"])
def test_compare_never_replaces_the_users_own_files_without_overwrite(tmp_path, capsys, own):
    problem = write_problem(tmp_path)
    out = tmp_path / "runs" / "cmp"
    (out / own).parent.mkdir(parents=True, exist_ok=True)
    (out / own).write_bytes(b"the user's own file")
    refused(capsys, compare_argv(problem, out), out, str(out), "--overwrite")
    # with --overwrite the comparison is written; files that are not its own are kept
    (out / "keep.txt").write_text("keep")
    assert main(compare_argv(problem, out, "--overwrite")) == 0
    assert (out / "keep.txt").read_text() == "keep"
    assert (out / "comparison.csv").exists() and (out / "plus-y" / "summary.json").exists()
