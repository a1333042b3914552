"""Structure + data -> Stan data: coding of fixed terms, random terms, held-out leaves, ratios."""
from __future__ import annotations

import numpy as np

from leafcv.design import build_design, natural_values
from leafcv.inits import fit_leaves
from .helpers import pooled_structure


def test_treatment_coding_and_trait_centring(quick_demo):
    comparison, dataset, _ = quick_demo
    design = build_design(comparison.structure("traits-month-fixed"), dataset, comparison.data)
    d = design.stan_data
    labels = [c.label for c in design.coefficients]
    # treatment coding: first level in sorted order is the reference, one 0/1 column per other level
    assert labels == ["n_area", "campaign=2026-07", "campaign=2026-09", "chl_ug", "sla_m2kg"]
    camp = dataset.leaves["campaign"].to_numpy()
    np.testing.assert_array_equal(d["X"][:, 1], (camp == "2026-07").astype(float))
    # traits centred at the stated value and divided by the stated scale (comparison file)
    np.testing.assert_allclose(d["X"][:, 3], (dataset.leaves["chl_ug"].to_numpy() - 45.0) / 10)
    # columns map to their parameter: n_area and campaign to vcmax25 (1), chl and sla to alpha (3)
    np.testing.assert_array_equal(np.argmax(d["fixed_map"], axis=1), [0, 0, 0, 2, 2])
    assert d["ratio_j"] == 1 and d["ratio_rd"] == 1


def test_held_out_leaves_are_non_centred_and_out_of_the_likelihood(quick_demo):
    comparison, dataset, _ = quick_demo
    L = dataset.n_leaves
    train = np.ones(L, bool)
    train[[0, 5]] = False
    design = build_design(comparison.structure("traits-month-random"), dataset, comparison.data,
                          train_leaves=train, leaf_fits=fit_leaves(dataset))
    d = design.stan_data
    assert d["N"] == int(train[dataset.obs["leaf_index"]].sum())
    assert not set(np.asarray(d["leaf"]) - 1) & {0, 5}
    cen_leaves = set(design.cen_cells % L)
    assert not cen_leaves & {0, 5}
    # every (leaf, parameter) cell with a leaf effect is either centred or non-centred, never both
    cells = np.concatenate([design.cen_cells, design.nc_cells])
    assert len(cells) == len(set(cells)) == L * len(design.leaf_terms)
    # campaign random term on vcmax25 with 3 levels
    (g,) = design.group_terms
    assert g.grouping == "campaign" and len(g.levels) == 3 and d["Q"] == 3


def test_ratio_parameters_resolve_to_natural_values(quick_demo):
    comparison, dataset, _ = quick_demo
    design = build_design(pooled_structure(comparison), dataset, comparison.data)
    eta = np.zeros((dataset.n_leaves, 5))
    eta[:, 0] = np.log(50.0)
    eta[:, 1] = np.log(1.8)
    eta[:, 4] = np.log(0.015)
    nat = natural_values(design, eta)
    np.testing.assert_allclose(nat["jmax25"], 90.0)
    np.testing.assert_allclose(nat["rd25"], 0.75)
    np.testing.assert_allclose(nat["alpha"], 0.5)


def test_centring_override_is_respected(quick_demo):
    from dataclasses import replace

    comparison, dataset, _ = quick_demo
    s = comparison.structure("leaf-vcmax-alpha")
    params = dict(s.params)
    params["vcmax25"] = replace(params["vcmax25"], centring={"leaf": "noncentred"})
    design = build_design(replace(s, params=params), dataset, comparison.data, leaf_fits=fit_leaves(dataset))
    lt = {t.param: t for t in design.leaf_terms}
    assert lt["vcmax25"].centred_leaves == 0 and "chosen by the user" in lt["vcmax25"].reason
