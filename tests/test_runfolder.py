"""The run folder's schema (`leafcv.runfolder`): a run written by `compare` (fake engine, tests/fakes.py)
holds every file the schema names, and each reader of the folder (the API's `Run`, the report's
`load_run`, the simulation summary) gets the same types from it."""
from __future__ import annotations

from dataclasses import replace

import pandas as pd
import pytest

from leafcv.runfolder import PREDICTION_PARTS, RunPaths, is_finished, read_pointwise, read_ranking

from .fakes import FakeEngine


@pytest.fixture(scope="module")
def written(quick_demo, tmp_path_factory):
    from leafcv.compare import run_comparison
    from leafcv.spec import SamplerSpec

    comparison, dataset, _ = quick_demo
    comp = replace(comparison, structures=(comparison.structure("leaf-vcmax-alpha"),
                                           comparison.structure("traits-month-fixed")))
    out = tmp_path_factory.mktemp("runfolder") / "run"
    run_comparison(comp, dataset, out, engine=FakeEngine(), spot_checks=0,
                   sampler=SamplerSpec(chains=2, warmup=10, draws=60, seed=3), log=lambda m: None)
    return out, [s.name for s in comp.structures]


def test_every_file_the_schema_names_is_where_compare_wrote_it(written):
    out, names = written
    paths = RunPaths(out)
    for path in (paths.manifest, paths.leaves, paths.structures_text, paths.ranking, paths.ranking_text,
                 paths.pointwise, paths.journal, paths.report):
        assert path.is_file(), path
    for name in names:
        assert paths.result(name).is_file() and paths.fit(name).is_file()
        for part in PREDICTION_PARTS:
            assert paths.prediction(name, part).is_file()
    # nothing at the top of the folder that the schema does not name
    named = {p.name for p in (paths.manifest, paths.leaves, paths.structures_text, paths.ranking, paths.ranking_text,
                              paths.pointwise, paths.results, paths.fits, paths.predictions, paths.tasks, paths.logs,
                              paths.report, paths.tables, paths.figures)}
    assert {p.name for p in out.iterdir() if not p.name.startswith(".")} <= named
    assert is_finished(out) and not is_finished(out / "results")     # a folder without a ranking or manifest
    with pytest.raises(ValueError, match="part must be one of"):
        paths.prediction(names[0], "draws")


def test_every_reader_gets_the_same_types(written):
    from leafcv.api import open_run
    from leafcv.report.run import load_run

    out, names = written
    ranking = read_ranking(RunPaths(out).ranking)
    assert str(ranking["rank"].dtype) == "Int64" and list(ranking["structure"]) == sorted(names, key=list(ranking["structure"]).index)
    api_ranking, report_ranking = open_run(out).ranking, load_run(out).ranking
    pd.testing.assert_frame_equal(api_ranking, ranking)
    pd.testing.assert_frame_equal(report_ranking, ranking)
    pointwise = read_pointwise(RunPaths(out).pointwise)
    assert pointwise["leaf"].map(type).eq(str).all()
    pd.testing.assert_frame_equal(open_run(out).pointwise, pointwise)
    pd.testing.assert_frame_equal(load_run(out).pointwise, pointwise)


def test_units_that_look_like_numbers_stay_text(tmp_path):
    # a month held out as a unit, written 05, 07, 09: read back as "05", not 5
    path = tmp_path / "pointwise.csv"
    path.write_text("campaign,elpd:a\n05,-1.5\n07,-2.0\n09,-1.0\n")
    assert list(read_pointwise(path)["campaign"]) == ["05", "07", "09"]
    ranking = tmp_path / "ranking.csv"
    ranking.write_text("structure,rank,elpd,warnings\n2024,1,-3.0,\nb,,-9.0,not ranked: fits did not converge\n")
    table = read_ranking(ranking)
    assert list(table["structure"]) == ["2024", "b"] and table["rank"].isna().tolist() == [False, True]
    assert table["warnings"].tolist() == ["", "not ranked: fits did not converge"]
