"""Ranking of build directions: a part that cannot be cleaned is never recommended first.

Source: support removal and powder drainage as conditions of a usable orientation
(Mirzendehdel et al., arXiv 2107.07686, 2021, support no tool can reach; Gaynor &
Johnson, Additive Manufacturing 33:101149, 2020, drainage of enclosed voids). The
geometry is checked by hand: a square tube 20 x 5 x 5 mm with a 1.5 mm square bore
along x. Built along x the bore walls are vertical (no support); built along y or z
the middle of the bore's ceiling needs support, inside a bore narrower than the 2 mm
tool, so it cannot be removed, while the short build wins on time.
"""

from __future__ import annotations

import json

import numpy as np

from topopt.build import BuildReport, analyze_design, rank_directions
from topopt.cli import main

TIME_ONLY = {"time": 1, "cost": 0, "support": 0}


def tube() -> np.ndarray:
    design = np.ones((40, 10, 10), dtype=bool)
    design[:, 4:7, 4:7] = False
    return design


def test_best_scoring_direction_with_unreachable_support_is_not_recommended():
    reports, best, _ = analyze_design(tube(), element_size=0.5, weights=TIME_ONLY)
    by = {r.direction: r for r in reports}
    # the premise: the short builds score better but leave support in the bore
    assert by["+z"].score < by["+x"].score
    assert by["+z"].unremovable_support_volume > 0 and by["+z"].flag == "unremovable support"
    assert by["+x"].unremovable_support_volume == 0 and by["+x"].flag == ""
    assert best in ("+x", "-x")
    assert sorted(r.rank for r in reports) == [1, 2, 3, 4, 5, 6]
    clean_ranks = [r.rank for r in reports if not r.flag]
    assert max(clean_ranks) < min(r.rank for r in reports if r.flag)
    # on request the score alone decides (still flagged)
    reports, best, _ = analyze_design(tube(), element_size=0.5, weights=TIME_ONLY,
                                      allow_unclean=True)
    assert best in ("+y", "-y", "+z", "-z")
    assert next(r for r in reports if r.direction == best).flag == "unremovable support"


def test_trapped_powder_is_ranked_after_and_all_unclean_falls_back_to_score():
    a = BuildReport("+x", 45, 1, 1, 1, 1, 0, 0, 0, 0.0, 0, 0, 0, 0, 0, 1.0, 1.0)
    trapped = BuildReport("-x", 45, 1, 1, 1, 1, 0, 0, 0, 0.0, 0, 0, 0, 5.0, 1, 9.0, 1.0)
    # a direction with trapped powder that builds faster
    fast = BuildReport("-x", 45, 1, 1, 1, 1, 0, 0, 0, 0.0, 0, 0, 0, 5.0, 1, 0.5, 1.0)
    ranked, best = rank_directions([fast, a], weights=TIME_ONLY)
    assert ranked[0].score < ranked[1].score
    assert best == "+x" and ranked[0].flag == "trapped powder" and ranked[0].rank == 2
    # when nothing is clean, the score decides
    ranked, best = rank_directions([fast, trapped], weights=TIME_ONLY)
    assert best == "-x" and ranked[0].rank == 1


def test_inspect_recommends_the_clean_direction(tmp_path, capsys):
    np.save(tmp_path / "tube.npy", tube())
    out = tmp_path / "report"
    assert main(["inspect", str(tmp_path / "tube.npy"), "--element-size", "0.5",
                 "--weights", "time=1,cost=0,support=0", "--out", str(out)]) == 0
    report = json.loads((out / "inspect.json").read_text())
    assert report["best"] in ("+x", "-x")
    text = capsys.readouterr().out
    assert "ranked after it because of unremovable support" in text
    header = (out / "inspect.csv").read_text().splitlines()[0].split(",")
    assert header[-2:] == ["rank", "flag"]
    out2 = tmp_path / "report2"
    assert main(["inspect", str(tmp_path / "tube.npy"), "--element-size", "0.5",
                 "--weights", "time=1,cost=0,support=0", "--out", str(out2),
                 "--allow-unclean"]) == 0
    assert json.loads((out2 / "inspect.json").read_text())["best"] in ("+y", "-y", "+z", "-z")
    assert "--allow-unclean was given" in capsys.readouterr().out
