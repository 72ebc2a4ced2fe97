"""What does printing the wall bracket without supports cost, build direction by direction?

Invented scenario (see wall-bracket-2d.toml). The script optimises the bracket once
free and once self-supporting for each axis build direction, prints the stiffness cost
of each direction, then checks the free design for supports in the cheapest one.
Run it from the repository folder:

    .venv/bin/python examples/direction_tradeoff.py

Results are a design aid: verify the final part with a full analysis and physical tests.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

import topopt
from topopt.build import analyze_design
from topopt.compare import compare
from topopt.problem import with_settings

HERE = Path(__file__).resolve().parent


def main(out_dir: str | Path = "results/direction-tradeoff", *, quick: bool = False) -> list[dict]:
    """Run the comparison; ``quick`` uses a coarse grid and few iterations (for tests)."""
    problem = topopt.load_problem(HERE / "wall-bracket-2d.toml")
    if quick:
        problem = with_settings(problem, {
            "domain.shape": [40, 20], "domain.element_size": 1.5,
            "optimize.filter_radius": 3.0, "optimize.max_iterations": 10,
        })
    rows = compare(problem, out_dir=out_dir, workers=1 if quick else None, overwrite=True)
    print(f"{'direction':>9}  {'compliance':>10}  {'increase':>8}  unsupported")
    for row in rows:
        print(f"{row['direction']:>9}  {row['compliance']:10.1f}  "
              f"{row['compliance_increase_percent']:+7.1f}%  {row['unsupported_elements']}")

    built = [r for r in rows if r["direction"] != "none"]
    cheapest = min(built, key=lambda r: r["compliance"])["direction"]
    with np.load(Path(out_dir) / "none" / "result.npz", allow_pickle=False) as data:
        free_design = np.array(data["density"])
    grid = problem.grid
    reports, _, _ = analyze_design(free_design, directions=[cheapest],
                                   element_size=grid.element_size, thickness=grid.thickness)
    print(f"the free design built along {cheapest} would need "
          f"{reports[0].support_volume:.0f} mm^3 of support")
    return rows


if __name__ == "__main__":
    main()
