"""``compare`` and studies with worker processes from a plain script (no main guard).

Source: common practice. With the "spawn" start method every worker imports the
parent's main script, so a script that calls ``compare(..., workers=2)`` at its top
level without ``if __name__ == "__main__":`` used to run again in each worker and end in
``BrokenProcessPool``; the workers must now start without running the script. Run in a
fresh interpreter (a subprocess), as a user would, with 2 workers; repeated twice
because it concerns process start-up.
"""

from __future__ import annotations

import csv
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]

PROBLEM = {
    "domain": {"shape": [16, 8], "element_size": 1.0},
    "material": {"youngs_modulus": 1.0, "poisson_ratio": 0.3},
    "restraints": [{"where": {"x": [0.0, 0.0]}}],
    "loads": [{"where": {"x": [16.0, 16.0], "y": [0.0, 0.0]}, "force": [0.0, -1.0]}],
    "optimize": {"volume_fraction": 0.5, "max_iterations": 4},
    "build": {"direction": "none"},
}


def run_script(tmp_path: Path, body: str) -> subprocess.CompletedProcess:
    script = tmp_path / "plain_script.py"
    # The counter file shows how often the script's top level ran.
    script.write_text(textwrap.dedent(f"""\
        with open({str(tmp_path / 'runs.txt')!r}, "a") as f:
            f.write("x")
        PROBLEM = {PROBLEM!r}
    """) + textwrap.dedent(body))
    env = {**os.environ, "PYTHONPATH": os.environ.get("BUTTRESS_TEST_ROOT", str(ROOT))}
    return subprocess.run([sys.executable, str(script)], cwd=tmp_path, env=env,
                          capture_output=True, text=True, timeout=300)


@pytest.mark.parametrize("attempt", [1, 2])
def test_compare_with_two_workers_from_a_plain_script(tmp_path, attempt):
    done = run_script(tmp_path, """
        from topopt.compare import compare
        from topopt.problem import problem_from_dict
        rows = compare(problem_from_dict(PROBLEM), directions=["+y", "-y"],
                       out_dir="cmp", workers=2)
        print("rows", len(rows))
    """)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "rows 3" in done.stdout
    assert (tmp_path / "runs.txt").read_text() == "x"  # the script ran once, not per worker
    folders = [p for p in (tmp_path / "cmp").iterdir() if p.is_dir()]
    assert len(folders) == 3  # free, +y, -y
    assert all((p / "summary.json").is_file() for p in folders)


def test_study_with_two_workers_from_a_plain_script(tmp_path):
    done = run_script(tmp_path, """
        from topopt import study
        rows = study.run({"problem": PROBLEM, "vary": {"build.direction": ["none", "+y"]}},
                         out_dir="st", workers=2)
        print("status", sorted(r["status"] for r in rows))
    """)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "status ['ok', 'ok']" in done.stdout
    assert (tmp_path / "runs.txt").read_text() == "x"
    with open(tmp_path / "st" / "table.csv") as handle:
        assert [r["status"] for r in csv.DictReader(handle)] == ["ok", "ok"]
