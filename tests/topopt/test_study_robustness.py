"""Studies that survive damage and kills (issue 15): damaged cases rerun, no worker left
behind, one case per number, a private local Dask cluster.

Sources
-------
- Process behaviour: prctl(2) PR_SET_PDEATHSIG and getppid(2) (Linux man-pages); the
  process table is read from /proc (proc(5)). Common practice.
- Mutual TLS for Dask: distributed's ``Security.temporary`` (dask.distributed
  documentation, "TLS/SSL").
"""

from __future__ import annotations

import contextlib
import gc
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from helpers import write_study

from topopt import study

REPO = Path(__file__).resolve().parents[2]
#: a change tolerance no case reaches: every case runs all its iterations
NEVER = 1e-9


def test_damaged_finished_cases_are_failed_and_rerun(tmp_path, monkeypatch):
    path = write_study(tmp_path, {"optimize.volume_fraction": [0.3, 0.4, 0.5, 0.6]},
                       iterations=8, change_tolerance=NEVER)
    out = tmp_path / "out"
    first = study.run(path, out_dir=out, workers=1)
    assert [r["status"] for r in first] == ["ok"] * 4
    cases = [out / "cases" / r["case"] for r in first]
    npz = (cases[0] / "result.npz").read_bytes()
    (cases[0] / "result.npz").write_bytes(npz[: len(npz) // 2])  # truncated
    (cases[1] / "summary.json").write_text("{ half a summ")      # corrupt
    untouched = {c.name: (c / "summary.json").stat().st_mtime_ns for c in cases[2:]}

    ran = []
    real = study.run_case
    monkeypatch.setattr(study, "run_case", lambda *a, **k: ran.append(1) or real(*a, **k))
    rows = study.run(path, out_dir=out, workers=1)
    assert len(ran) == 2  # only the two damaged cases
    assert [r["status"] for r in rows] == ["ok"] * 4
    for row, before in zip(rows, first, strict=True):
        assert row["compliance"] == pytest.approx(before["compliance"], rel=1e-9)
    assert {c.name: (c / "summary.json").stat().st_mtime_ns for c in cases[2:]} == untouched


def test_two_and_two_point_zero_are_one_case(tmp_path):
    a = study.case_id({"optimize": {"penalty": 2}}, {"optimize.penalty": 2})
    b = study.case_id({"optimize": {"penalty": 2.0}}, {"optimize.penalty": 2.0})
    assert a == b
    assert a != study.case_id({"optimize": {"penalty": 2.5}}, {"optimize.penalty": 2.5})
    path = write_study(tmp_path, {"optimize.penalty": [2, 3, 2.0]}, iterations=8,
                       change_tolerance=NEVER)
    with pytest.raises(study.StudyError, match="appears twice"):
        study.load_study(path)


def session_processes(sid: int) -> dict[int, tuple[int, str]]:
    """Live (not zombie) processes of session ``sid``: pid -> (parent pid, command line)."""
    found = {}
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
            cmdline = (entry / "cmdline").read_bytes().replace(b"\0", b" ").decode()
        except OSError:
            continue
        fields = stat[stat.rindex(")") + 2:].split()
        state, ppid, session = fields[0], int(fields[1]), int(fields[3])
        if session == sid and state != "Z":
            found[int(entry.name)] = (ppid, cmdline)
    return found


def _dask_available() -> bool:
    try:
        import cryptography  # noqa: F401
        import distributed  # noqa: F401
    except ImportError:
        return False
    return True


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs /proc")
@pytest.mark.parametrize("signum", [signal.SIGKILL, signal.SIGTERM], ids=["SIGKILL", "SIGTERM"])
@pytest.mark.parametrize("runner", [
    "pool",
    pytest.param("dask", marks=pytest.mark.skipif(not _dask_available(),
                                                  reason="needs distributed and cryptography")),
])
def test_killed_sweep_leaves_no_worker_behind(tmp_path, signum, runner):
    # pool: the sweep's own worker processes (topopt.parallel); dask: the local cluster's
    # worker processes (spawned by its nannies, which run inside the sweep) and
    # multiprocessing's resource tracker
    path = write_study(tmp_path, {"optimize.volume_fraction": [0.3, 0.35, 0.4, 0.45, 0.5, 0.55]},
                       iterations=2000, change_tolerance=NEVER)
    out = tmp_path / "out"
    proc = subprocess.Popen(
        [sys.executable, "-m", "topopt.cli", "sweep", str(path), "--out", str(out),
         "--workers", "2", "--quiet", *(["--dask"] if runner == "dask" else [])],
        cwd=REPO, start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
        env={**os.environ, "PYTHONPATH": str(REPO)})
    sid = proc.pid  # a new session's id is its leader's pid

    def workers() -> list[int]:
        return [pid for pid, (ppid, cmd) in session_processes(sid).items()
                if ppid == proc.pid and "spawn_main" in cmd]

    try:
        deadline = time.monotonic() + 120
        while len(workers()) < 2:
            assert proc.poll() is None, proc.stderr.read().decode()
            assert time.monotonic() < deadline, "workers did not start within 120 s"
            time.sleep(0.05)
        # let the workers take up their cases (a Dask worker first imports and connects)
        time.sleep(1.0 if runner == "pool" else 5.0)
        proc.send_signal(signum)  # the sweep only, not its workers
        proc.wait(timeout=60)
        deadline = time.monotonic() + 15
        while session_processes(sid) and time.monotonic() < deadline:
            time.sleep(0.1)
        left = session_processes(sid)
        assert left == {}, f"processes left behind: {left}"
    finally:
        for pid in session_processes(sid):
            with contextlib.suppress(OSError):
                os.kill(pid, signal.SIGKILL)
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stderr.close()
    if signum == signal.SIGTERM:
        assert proc.returncode == 130
    else:
        assert proc.returncode == -signal.SIGKILL


def test_local_dask_cluster_refuses_other_processes():
    distributed = pytest.importorskip("distributed")
    pytest.importorskip("cryptography")
    security = study._private_security()
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                  host="127.0.0.1", dashboard_address=None, protocol="tls://",
                                  security=security) as cluster:
        address = cluster.scheduler_address
        assert address.startswith("tls://")
        # an outsider without a certificate cannot connect (refused before any attempt) ...
        with pytest.raises((OSError, TimeoutError, TypeError)):
            distributed.Client(address, timeout=3)
        # a refused client is half built; collect it now, or its __del__ may run inside
        # the next client's start-up and deadlock distributed's loop runner (seen once
        # in a full test run)
        gc.collect()
        # ... with another certificate neither
        with pytest.raises((OSError, TimeoutError)):
            distributed.Client(address, timeout=3, security=study._private_security())
        gc.collect()
        # the owner can
        with distributed.Client(address, security=security, timeout=10) as client:
            assert client.submit(sum, [1, 2]).result() == 3
