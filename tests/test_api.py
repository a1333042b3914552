"""The Python API without a sampler: a study built from a DataFrame (leafcv.from_frame) is the study its
written files give, and bad input is refused with the file's own checks."""
from __future__ import annotations

import pandas as pd
import pytest

import leafcv
from leafcv.errors import DataError, SpecError


def _frame_and_roles(quick_demo):
    comparison, dataset, _ = quick_demo
    table = pd.read_csv(comparison.data.file)
    from leafcv.data.roles import ROLE_OF

    roles = {ROLE_OF[var]: col for var, col in comparison.data.columns.items()}
    return comparison, dataset, table, roles


def test_a_study_from_a_frame_equals_the_study_from_the_same_files(quick_demo, tmp_path):
    comparison, dataset, table, roles = _frame_and_roles(quick_demo)
    structures = [{"name": "leaf-vcmax", "vcmax25": {"random": ["leaf"]}, "jmax25": {"ratio_to": "vcmax25"}},
                  {"name": "traits", "vcmax25": {"fixed": ["n_area", "campaign"], "random": ["leaf"]},
                   "alpha": {"fixed": ["chl_ug"]}, "jmax25": {"ratio_to": "vcmax25"}}]
    study = leafcv.from_frame(table, roles=roles, structures=structures, folder=tmp_path / "s",
                              groups=comparison.data.groups, traits=comparison.data.traits,
                              centre=comparison.data.centre, scale=comparison.data.scale,
                              sampler={"chains": 2, "draws": 300, "seed": 5}, question="do traits shift Vcmax25?")
    assert study.structures == ["leaf-vcmax", "traits"]
    assert study.comparison.question == "do traits shift Vcmax25?"
    assert study.comparison.sampler.chains == 2 and study.comparison.sampler.seed == 5
    pd.testing.assert_frame_equal(study.dataset.obs.drop(columns="row"), dataset.obs.drop(columns="row"))
    pd.testing.assert_frame_equal(study.dataset.leaves, dataset.leaves)
    st = study.comparison.structure("traits")
    assert st.params["vcmax25"].fixed == ("n_area", "campaign") and st.params["jmax25"].ratio_to == "vcmax25"
    # the written comparison file reads back to the same comparison
    again = leafcv.load(tmp_path / "s" / "comparison.toml")
    assert again.comparison.structures == study.comparison.structures


def test_a_frame_with_a_bad_role_or_column_is_refused_like_a_file(quick_demo, tmp_path):
    comparison, dataset, table, roles = _frame_and_roles(quick_demo)
    bad = dict(roles, intercellular_co2="no_such_column")
    with pytest.raises(DataError, match="no_such_column"):
        leafcv.from_frame(table, roles=bad, structures=[{"name": "p"}], folder=tmp_path / "a")
    with pytest.raises(SpecError) as err:
        leafcv.from_frame(table, roles={**roles, "a_net": "assim"}, structures=[{"name": "p"}], folder=tmp_path / "b")
    assert "net_assimilation" in str(err.value)        # the old key is refused with its new name
    with pytest.raises(SpecError, match="unknown"):
        leafcv.from_frame(table, roles=roles, structures=[{"name": "p", "vcmax25": {"random": ["nope"]}}],
                          folder=tmp_path / "c")
