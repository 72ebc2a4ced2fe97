"""Start-up time of the command line: ``buttress --help`` against bare Python, same run.

Target: ``buttress --help`` under 0.3 s on a quiet machine. The help text
needs no numerics, so the command line must not load numpy, SciPy or numba before it
has parsed its arguments (tests/test_layers.py checks *which* modules load; this script
measures *how long* it takes). Each command is started ``--repeat`` times in a fresh
process, in turns so that load from other jobs spreads over all of them; the table gives
the median and the fastest wall time, and the ratio of the medians to the baseline
``python -c pass`` measured in the same run.

Usage::

    .venv/bin/python benchmarks/startup.py --repeat 20 --markdown benchmarks/startup.md
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

COMMANDS = {
    "python -c pass (baseline)": [sys.executable, "-c", "pass"],
    "python -c 'import numpy'": [sys.executable, "-c", "import numpy"],
    "python -c 'import topopt'": [sys.executable, "-c", "import topopt"],
    "buttress --help": [sys.executable, "-m", "topopt.cli", "--help"],
    "buttress optimize --help": [sys.executable, "-m", "topopt.cli", "optimize", "--help"],
    "python -c 'import topopt.driver' (the solver stack)": [sys.executable, "-c",
                                                             "import topopt.driver"],
}


def time_once(argv: list[str], root: Path = ROOT) -> float:
    env = {**os.environ, "PYTHONPATH": str(root)}
    start = time.perf_counter()
    subprocess.run(argv, cwd=root, env=env, stdout=subprocess.DEVNULL, check=True)
    return time.perf_counter() - start


def machine() -> str:
    cpu = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return (f"{cpu}, {os.cpu_count()} cores, Python {platform.python_version()}, "
            f"{platform.system()} {platform.release()}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeat", type=int, default=15, help="runs of each command")
    parser.add_argument("--markdown", type=Path, help="write the table to this file")
    parser.add_argument("--other", type=Path, metavar="CHECKOUT",
                        help="also time `buttress --help` of another checkout (e.g. an older "
                             "commit in a git worktree), in the same run")
    args = parser.parse_args(argv)
    commands = {name: (argv_, ROOT) for name, argv_ in COMMANDS.items()}
    if args.other:
        commands[f"buttress --help of {args.other}"] = (COMMANDS["buttress --help"], args.other)

    load_before = os.getloadavg()
    for argv_, root in commands.values():  # warm the file cache and the bytecode
        time_once(argv_, root)
    times: dict[str, list[float]] = {name: [] for name in commands}
    for _ in range(args.repeat):
        for name, (argv_, root) in commands.items():
            times[name].append(time_once(argv_, root))
    load_after = os.getloadavg()

    base = statistics.median(times["python -c pass (baseline)"])
    lines = [
        f"Machine: {machine()}.",
        f"Run: {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}, {args.repeat} runs each, "
        f"1-minute load {load_before[0]:.2f} before, {load_after[0]:.2f} after "
        f"(above {os.cpu_count()} the machine was shared and times are inflated).",
        "",
        "| command | median s | fastest s | median / baseline |",
        "|---|---|---|---|",
    ]
    for name, values in times.items():
        median = statistics.median(values)
        lines.append(f"| {name} | {median:.3f} | {min(values):.3f} | {median / base:.2f} |")
    text = "\n".join(lines) + "\n"
    print(text)
    if args.markdown:
        header = ("# Command-line start-up\n\nWritten by `benchmarks/startup.py` "
                  f"(`.venv/bin/python benchmarks/startup.py --repeat {args.repeat} "
                  f"--markdown {args.markdown}"
                  + (f" --other {args.other}" if args.other else "") + "`). Target: `buttress --help` under 0.3 s "
                  "on a quiet machine.\n\n")
        args.markdown.write_text(header + text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
