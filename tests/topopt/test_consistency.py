"""Small consistencies users rely on: empty cells, the word 'free', best designs weigh mass.

Source: the README contract (empty cells for values not estimated) and common practice
(Pareto dominance: a point is dominated when another is no worse in every cost and
better in one).
"""

from __future__ import annotations

import csv

import numpy as np

from topopt.cli import main
from topopt.study import _direction_label, non_dominated


def test_inspect_leaves_cells_empty_without_mass_density(tmp_path, capsys):
    design = np.zeros((10, 8, 6), dtype=bool)
    design[2:8, 2:6, 0:4] = True
    np.save(tmp_path / "block.npy", design)
    out = tmp_path / "report"
    assert main(["inspect", str(tmp_path / "block.npy"), "--element-size", "1.0",
                 "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "nan" not in text.lower()
    with open(out / "inspect.csv", newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert rows and all(r["part_mass"] == "" and r["material_cost"] == "" for r in rows)
    assert "nan" not in (out / "inspect.csv").read_text().lower()


def test_study_rings_lighter_designs_too():
    # (support, compliance, volume fraction): the second case is stiffer with the same
    # support but heavier, so the first is not beaten once mass counts.
    costs = [(1.0, 10.0, 0.3), (1.0, 8.0, 0.4), (2.0, 12.0, 0.4)]
    assert non_dominated([c[:2] for c in costs]) == [False, True, False]
    assert non_dominated(costs) == [True, True, False]


def test_one_word_for_the_design_without_build_direction():
    assert _direction_label("none").startswith("free")
