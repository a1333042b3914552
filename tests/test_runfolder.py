"""The run folder's schema (`leafcv.runfolder`): a run written by `compare` (fake engine, tests/fakes.py)
holds every file the schema names, and each reader of the folder (the API's `Run`, the report's
`load_run`, the simulation summary) gets the same types from it; study.json is written by `compare` from
the loaded comparison and data, and read back typed, or rebuilt from the inputs for an older folder."""
from __future__ import annotations

import json
import shutil
from dataclasses import replace

import pandas as pd
import pytest

from leafcv.errors import UserInputError
from leafcv.runfolder import (PREDICTION_PARTS, STUDY_VERSION, RunPaths, StudyRecord, is_finished, legacy_study,
                              read_pointwise, read_ranking, read_study)

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
    return out, [s.name for s in comp.structures], comp


def test_every_file_the_schema_names_is_where_compare_wrote_it(written):
    out, names, _ = written
    paths = RunPaths(out)
    for path in (paths.manifest, paths.leaves, paths.structures_text, paths.study, paths.ranking, paths.ranking_text,
                 paths.pointwise, paths.journal, paths.report):
        assert path.is_file(), path
    for name in names:
        assert paths.result(name).is_file() and paths.fit(name).is_file()
        for part in PREDICTION_PARTS:
            assert paths.prediction(name, part).is_file()
    # nothing at the top of the folder that the schema does not name
    named = {p.name for p in (paths.manifest, paths.leaves, paths.structures_text, paths.study, paths.ranking,
                              paths.ranking_text,
                              paths.pointwise, paths.results, paths.fits, paths.predictions, paths.tasks, paths.logs,
                              paths.report, paths.tables, paths.figures)}
    assert {p.name for p in out.iterdir() if not p.name.startswith(".")} <= named
    assert is_finished(out) and not is_finished(out / "results")     # a folder without a ranking or manifest
    with pytest.raises(ValueError, match="part must be one of"):
        paths.prediction(names[0], "draws")


def test_every_reader_gets_the_same_types(written):
    from leafcv.api import open_run
    from leafcv.report.run import load_run

    out, names, _ = written
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


def test_study_json_is_written_by_compare_and_read_back_typed(written, quick_demo):
    out, names, comp = written
    _, dataset, _ = quick_demo
    study = read_study(out)
    assert isinstance(study, StudyRecord) and not study.notes
    # the question: the demo states it in a comment line of its comparison file
    from leafcv.demo import QUESTION_QUICK

    assert study.question == " ".join(QUESTION_QUICK.split())
    assert study.data_file == "observations.csv" and study.groups == comp.data.groups == ("taxon", "campaign")
    assert study.traits == comp.data.traits and study.columns == comp.data.columns
    # each leaf's groups: as pandas reads them from the data file itself, one row per leaf in order of appearance
    data = pd.read_csv(comp.data.file, dtype=str)
    leaf = comp.data.columns["leaf"]
    expected = data[[leaf, *comp.data.groups]].drop_duplicates(leaf).rename(columns={leaf: "leaf"})
    pd.testing.assert_frame_equal(study.leaves, expected.reset_index(drop=True))
    assert study.leaves.map(type).eq(str).all().all()
    assert study.groups_note == "groups read from the data file observations.csv"
    # the parameter lines: the ones structures.txt shows, structure by structure, as a tuple of text
    text = RunPaths(out).structures_text.read_text()
    assert list(study.parameter_lines) == names
    for name, lines in study.parameter_lines.items():
        block = text.split(f"structure {name!r}")[1].split("structure '")[0]
        assert isinstance(lines, tuple) and len(lines) == 5
        assert all(f"\n  {line}\n" in block for line in lines)
    assert json.loads(RunPaths(out).study.read_text())["version"] == STUDY_VERSION


def test_a_later_study_json_is_refused(written, tmp_path):
    out, _, _ = written
    later = tmp_path / "later"
    shutil.copytree(out, later, ignore=shutil.ignore_patterns("tasks", "fits", "figures", "tables"))
    d = json.loads(RunPaths(later).study.read_text())
    d["version"] = STUDY_VERSION + 1
    RunPaths(later).study.write_text(json.dumps(d))
    with pytest.raises(UserInputError, match="written by a later leafcv"):
        read_study(later)


def test_a_folder_without_study_json_is_read_from_its_inputs(written, tmp_path):
    out, _, comp = written
    old = tmp_path / "old"
    shutil.copytree(out, old, ignore=shutil.ignore_patterns("tasks", "fits", "figures", "tables"))
    RunPaths(old).study.unlink()
    manifest = json.loads(RunPaths(old).manifest.read_text())
    new, legacy, via_reader = read_study(out), legacy_study(old, manifest), read_study(old)
    for name in ("question", "data_file", "columns", "groups", "traits", "parameter_lines", "groups_note", "notes"):
        assert getattr(legacy, name) == getattr(new, name) == getattr(via_reader, name), name
    pd.testing.assert_frame_equal(legacy.leaves, new.leaves)
    pd.testing.assert_frame_equal(via_reader.leaves, new.leaves)
    # the legacy reading says what it cannot read
    data = comp.data.file
    moved = data.with_name("moved.csv")
    data.rename(moved)
    try:
        gone = read_study(old)
    finally:
        moved.rename(data)
    assert gone.leaves is None and "is not available, so the leaves' groups are unknown" in gone.groups_note
    assert gone.question == new.question
