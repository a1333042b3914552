"""The decision box of the report (leafcv.report.decision) against the ranking's own sentences (ranking.txt,
written by leafcv.compare.write_ranking): one decision rule, the same words in both places. Each run folder
here is made of invented per-unit scores written through leafcv's own write_ranking and read back through
the report's own readers, without a sampler.

The rule: not told apart when |Δelpd| < 4 nats (Sivula, Magnusson, Matamoros & Vehtari 2020), or within
2·sqrt(SE_diff² + MCSE_a² + MCSE_b²) + summed quadrature bounds (factor 2: common practice, no source), or,
with fewer than 10 units, when dropping any one unit changes the sign or leaves less than 4 nats (common
practice, no source). Paired SE = sqrt(G var(d, ddof=1)) (Vehtari, Gelman & Gabry 2017, recalled from memory).
"""
from __future__ import annotations

import html as htmllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from leafcv.compare import write_ranking
from leafcv.cv.result import CVResult
from leafcv.report.decision import decision_html
from leafcv.report.html import Tables
from leafcv.report.run import RunFolder
from leafcv.runfolder import read_ranking

pytestmark = pytest.mark.filterwarnings("ignore:The inplace keyword")


def make(name: str, elpd_i, ids, unit="leaf", **kwargs) -> CVResult:
    kwargs.setdefault("n_draws", 4000)
    return CVResult(structure=name, method="exact" if unit != "leaf" else "auto", leaves=tuple(ids),
                    elpd_i=np.asarray(elpd_i, float), unit=unit, **kwargs)


def decide(folder: Path, results: list[CVResult]) -> tuple[str, str]:
    """(the decision section's text, ranking.txt) of a run folder holding ``results``."""
    folder.mkdir(parents=True, exist_ok=True)
    text, _ = write_ranking(folder, results, {}, len(results[0].leaves))
    run = RunFolder(folder, {}, read_ranking(folder / "ranking.csv"), pd.read_csv(folder / "pointwise.csv"),
                    {}, [r.structure for r in results], [], True, results[0].unit, None)
    section = decision_html(run, {}, Tables(folder / "tables"))
    return htmllib.unescape(section), text


def announced(section: str) -> list[str]:
    start = "<b>Announced first:</b> "
    return [part.split("</p>")[0] for part in section.split(start)[1:]]


LEAVES = [f"L{i:02d}" for i in range(30)]
BASE = np.linspace(-30, -10, 30)


def test_unscored_structure_scoring_higher_is_named_alike_in_the_box_and_the_summary(tmp_path):
    c = BASE + np.where(np.arange(30) % 2 == 0, 2.5, -1.5)          # +15.0 nats, se_diff 11.1: not told apart
    section, text = decide(tmp_path, [make("A", BASE, LEAVES), make("B", BASE - 10.0, LEAVES),
                                      make("C", c, LEAVES, unscored="the held-out quadrature did not settle for L03")])
    sentence = "C could not be scored reliably; its score, 15.0 nats higher, would make it the best; see Diagnostics."
    assert announced(section) == [sentence]
    assert sentence in text.splitlines()
    box = section[section.index('<div class="box">'):]
    assert "<b>A is the best among the reliably scored structures</b>" in box
    assert "The best structure is" not in section and "A predicts new leaves best" not in text
    # B is 10 nats behind on each of the 30 leaves: 300 nats, SE 0
    assert "A is the best among the reliably scored structures; its lead over B (300.0 nats, SE 0.0) is clear." in text


def test_failed_structure_scoring_higher_says_its_fits_failed(tmp_path):
    section, text = decide(tmp_path, [make("A", BASE, LEAVES), make("B", BASE - 10.0, LEAVES),
                                      make("C", BASE + 0.1, LEAVES, grade="failed")])
    sentence = ("C's fits did not pass their diagnostics; its score, 3.0 nats higher, would make it the best; "
                "see Diagnostics.")
    assert announced(section) == [sentence] and sentence in text.splitlines()
    assert "The best structure is" not in section


def test_nan_se_is_handled_alike_in_the_box_and_the_summary(tmp_path):
    # one unit: every SE is NaN; the unranked structure scoring higher is named all the same, and the ranked
    # runner-up is not told apart ("without an SE") in both places
    one = ["L00"]
    section, text = decide(tmp_path, [make("A", [-20.0], one), make("B", [-30.0], one),
                                      make("C", [-17.0], one, grade="failed")])
    sentence = ("C's fits did not pass their diagnostics; its score, 3.0 nats higher, would make it the best; "
                "see Diagnostics.")
    assert announced(section) == [sentence] and sentence in text.splitlines()
    assert "Not told apart from it" in section and "B (Δelpd −10.0 ± –: without an SE of the difference)" in section
    assert "its lead over B (10.0 nats, SE nan) is not clear: it is without an SE of the difference." in text


def test_no_unranked_structure_above_the_leader_means_a_plain_best(tmp_path):
    section, text = decide(tmp_path, [make("A", BASE, LEAVES), make("B", BASE - 10.0, LEAVES),
                                      make("C", BASE - 1.0, LEAVES, grade="failed")])
    assert announced(section) == []
    assert "<b>The best structure is A</b>" in section
    assert text.count("A predicts new leaves best; its lead over B (300.0 nats, SE 0.0) is clear.") == 1


def test_few_units_show_the_per_unit_differences_and_refuse_a_lead_one_unit_undoes(tmp_path):
    # 5 species; d = A - B = (4.5, 0.875 x 4): total 8.0, SE 3.6 (see tests/test_ranking.py), clear on the SE
    # alone (8 >= 4, 8 > 7.25), but without sp1 only 3.5 nats are left: not told apart, in the box and the summary
    species = [f"sp{i}" for i in range(1, 6)]
    b = np.array([-120.0, -95.0, -130.0, -110.0, -101.0])
    a = b + np.array([4.5, 0.875, 0.875, 0.875, 0.875])
    section, text = decide(tmp_path, [make("A", a, species, "species"), make("B", b, species, "species")])
    # (B − A, the runner-up against the leader, hence the minus signs)
    reason = ("undone when sp1 alone is dropped (with only 5 units the difference goes from -8.0 to -3.5 nats, "
              "less than 4 in size; leave-one-unit-out check)")
    assert f"B (Δelpd −8.0 ± 3.6: {reason})" in section
    assert f"A has the highest elpd, but its lead over B (8.0 nats, SE 3.6) is not clear: it is {reason}." in text
    assert "With only 5 levels of species the SE of a difference is unreliable" in section
    table = pd.read_csv(tmp_path / "tables" / "few_units.csv")
    assert list(table.columns) == ["unit", "elpd:A", "elpd:B", "difference", "difference_without_unit"]
    assert list(table["unit"]) == species
    np.testing.assert_allclose(table["difference"], a - b)
    np.testing.assert_allclose(table["difference_without_unit"], [3.5, 7.125, 7.125, 7.125, 7.125])
    # the same lead spread evenly over the 5 species is clear, and the per-unit table is still shown
    even, text2 = decide(tmp_path / "even", [make("A", b + 1.6, species, "species"), make("B", b, species, "species")])
    assert "Every other ranked structure is told apart from it" in even
    assert "A predicts new levels of species best; its lead over B (8.0 nats, SE 0.0) is clear." in text2
    assert (tmp_path / "even" / "tables" / "few_units.csv").exists()


def test_no_per_unit_table_with_ten_units_or_more(tmp_path):
    ids = [f"sp{i}" for i in range(10)]
    b = np.linspace(-200, -100, 10)
    section, _ = decide(tmp_path, [make("A", b + 1.0, ids, "species"), make("B", b, ids, "species")])
    assert not (tmp_path / "tables" / "few_units.csv").exists()
    assert "SE of a difference is unreliable" not in section
