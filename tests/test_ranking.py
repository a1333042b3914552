"""Tests of the ranking of structures (leafcv.ranking); the ArviZ bridge and the result type have their own
(tests/cv/test_arviz_bridge.py, tests/cv/test_result.py).

Outside references: ArviZ 0.23's ``loo`` and ``compare`` (called directly, not through
leafcv), SciPy's SLSQP on the simplex, closed forms of the stacking objective
(Yao, Vehtari, Simpson & Gelman 2018, Bayesian Analysis 13:917-1007, eq. 4), the SE of a total
and of paired differences with the sample variance (Vehtari, Gelman & Gabry 2017, Stat Comput
27:1413-1432, eq. 23, recalled from memory; checked against hand computations written out
below), the k-hat threshold min(1 - 1/log10 S, 0.7) (Vehtari et al. 2024, JMLR 25(72)),
|Δelpd| < 4 as small (Sivula, Magnusson, Matamoros & Vehtari 2020) and the many-structures
caveat (McLatchie & Vehtari 2024). All per-leaf values are simulated or chosen here.

ArviZ 0.23 computes ``se`` and ``dse`` with the population variance (ddof=0); leafcv uses the
sample variance (ddof=1), so ArviZ's values are compared after the factor sqrt(G / (G - 1)).
"""
from __future__ import annotations

from arviz_stats import compare
import numpy as np
import pandas as pd
import pytest
from scipy.optimize import check_grad, minimize

from leafcv.cv.arviz_bridge import accepted_keywords, compare_results, to_elpd_data
from leafcv.cv.result import CVResult
from leafcv.compare import pointwise_table
from leafcv.ranking import (
    COLUMNS, MARGINAL_WARNING, NOT_RANKED, NOT_TOLD_APART, _negative_mean_log_score, format_ranking, rank,
    stacking_weights, summary_notes, summed_bound, table_columns, told_apart,
)

# ArviZ 0.23's compare, called directly below as the reference, uses an inplace sort that pandas 3.1 deprecates
pytestmark = pytest.mark.filterwarnings("ignore:The inplace keyword")

G = 30
LEAVES = tuple(f"leaf{i:02d}" for i in range(G))
DDOF1 = np.sqrt(G / (G - 1))     # sample SD / population SD: sqrt(G / (G - 1))


def make(name: str, elpd_i, **kwargs) -> CVResult:
    """A result over LEAVES with method auto and 4000 draws unless told otherwise."""
    kwargs.setdefault("n_draws", 4000)
    kwargs.setdefault("method", "auto")
    leaves = kwargs.pop("leaves", LEAVES)
    return CVResult(structure=name, leaves=leaves, elpd_i=np.asarray(elpd_i, dtype=float), **kwargs)


def results_from(matrix: np.ndarray) -> dict[str, CVResult]:
    """One result per column of a (G, K) matrix of per-leaf elpd, named m0, m1, ..."""
    leaves = tuple(f"leaf{i:02d}" for i in range(matrix.shape[0]))
    return {f"m{k}": make(f"m{k}", matrix[:, k], leaves=leaves) for k in range(matrix.shape[1])}


# ------------------------------------------------------------------------------------------
# independent reference: the stacking objective optimised by SLSQP on the simplex

def log_score(weights: np.ndarray, elpd: np.ndarray) -> float:
    """Σ_g log Σ_k w_k exp(elpd_gk), computed with a per-leaf shift (Yao et al. 2018, eq. 4)."""
    top = elpd.max(axis=1)
    return float(np.sum(top + np.log(np.maximum(np.exp(elpd - top[:, None]) @ weights, 1e-300))))


def slsqp_weights(elpd: np.ndarray) -> np.ndarray:
    """Stacking weights by SLSQP with bounds [0, 1] and the constraint Σ w = 1."""
    k = elpd.shape[1]
    dens = np.exp(elpd - elpd.max(axis=1, keepdims=True))

    def fun(w):
        return -np.sum(np.log(np.maximum(dens @ w, 1e-300)))

    def jac(w):
        return -np.sum(dens / np.maximum(dens @ w, 1e-300)[:, None], axis=0)

    fit = minimize(fun, np.full(k, 1.0 / k), jac=jac, method="SLSQP", bounds=[(0.0, 1.0)] * k,
                   constraints={"type": "eq", "fun": lambda w: np.sum(w) - 1.0, "jac": lambda w: np.ones(k)},
                   options={"ftol": 1e-14, "maxiter": 1000})
    assert fit.success, fit.message
    return fit.x


def random_matrix(seed: int) -> np.ndarray:
    """Per-leaf elpd of three overlapping structures on 40 leaves."""
    rng = np.random.default_rng(seed)
    base = rng.normal(-25.0, 3.0, size=(40, 1))
    return base + rng.normal(0.0, 1.5, size=(40, 3))


def dominant_matrix() -> np.ndarray:
    """Structure m0 better than m1 and m2 by 2 to 4 nats on every leaf."""
    rng = np.random.default_rng(7)
    base = rng.normal(-25.0, 3.0, size=(40, 1))
    return base + np.column_stack([np.zeros(40), -rng.uniform(2, 4, 40), -rng.uniform(2, 4, 40)])


def complementary_matrix() -> np.ndarray:
    """m0 better on the first half of the leaves, m1 on the second, by 3 to 6 nats."""
    rng = np.random.default_rng(11)
    base = rng.normal(-25.0, 3.0, size=40)
    gap = rng.uniform(3, 6, 40)
    first = np.arange(40) < 20
    return np.column_stack([base - np.where(first, 0.0, gap), base - np.where(first, gap, 0.0)])


def arviz_weights(matrix: np.ndarray) -> np.ndarray:
    """Stacking weights through the ArviZ bridge, in column order."""
    weights = compare_results(results_from(matrix))
    return weights.loc[[f"m{k}" for k in range(matrix.shape[1])]].to_numpy()


# ------------------------------------------------------------------------------------------
# (b) stacking weights: ArviZ path vs a direct SciPy optimisation

@pytest.mark.parametrize("matrix", [random_matrix(1), random_matrix(2), dominant_matrix(), complementary_matrix()],
                         ids=["random1", "random2", "dominant", "complementary"])
def test_stacking_weights_arviz_path_match_scipy_slsqp(matrix):
    reference = slsqp_weights(matrix)
    np.testing.assert_allclose(arviz_weights(matrix), reference, atol=1e-3)
    np.testing.assert_allclose(stacking_weights(matrix), reference, atol=1e-3)
    # whatever the optimiser, no weights found may score below the SLSQP optimum by more than noise
    assert log_score(stacking_weights(matrix), matrix) >= log_score(reference, matrix) - 1e-6


def test_dominant_structure_takes_all_weight():
    weights = arviz_weights(dominant_matrix())
    assert weights[0] > 0.99
    assert np.isclose(weights.sum(), 1.0, atol=1e-6)


def test_complementary_structures_get_interior_weights_beating_every_vertex():
    matrix = complementary_matrix()
    weights = arviz_weights(matrix)
    assert np.all(weights > 0.05) and np.all(weights < 0.95)
    found = log_score(weights, matrix)
    for k in range(matrix.shape[1]):
        vertex = np.eye(matrix.shape[1])[k]
        assert found >= log_score(vertex, matrix)


def test_symmetric_complementary_case_has_equal_weights():
    # closed form: half the leaves (0, -d), half (-d, 0); the concave objective is symmetric in
    # w and 1 - w, so its maximum is at w = 1/2 (Yao et al. 2018, eq. 4)
    matrix = np.array([[0.0, -3.0]] * 10 + [[-3.0, 0.0]] * 10) - 20.0
    np.testing.assert_allclose(arviz_weights(matrix), [0.5, 0.5], atol=1e-3)
    np.testing.assert_allclose(stacking_weights(matrix), [0.5, 0.5], atol=1e-6)


def test_two_structures_closed_form_weight():
    # leaves where m0 has density ratio r = exp(e0 - e1) in {a, b} (n each): the stationarity
    # condition Σ_g (r_g - 1) / (w r_g + 1 - w) = 0 gives w = -(a + b - 2) / (2 (a - 1)(b - 1))
    a, b = np.exp(2.0), np.exp(-1.0)
    w_exact = -(a + b - 2) / (2 * (a - 1) * (b - 1))
    matrix = np.array([[2.0, 0.0]] * 6 + [[-1.0, 0.0]] * 6) - 15.0
    np.testing.assert_allclose(stacking_weights(matrix)[0], w_exact, atol=1e-6)
    np.testing.assert_allclose(arviz_weights(matrix)[0], w_exact, atol=1e-3)


def test_stacking_survives_very_negative_leaf_elpd():
    # a leaf scored jointly over many points can have elpd far below log(smallest double) ~ -745
    matrix = random_matrix(1)                    # weights far from uniform
    shifted = matrix - 900.0
    np.testing.assert_allclose(arviz_weights(shifted), slsqp_weights(matrix), atol=1e-3)
    np.testing.assert_allclose(stacking_weights(shifted), stacking_weights(matrix), atol=1e-6)


def test_stacking_gradient_matches_finite_differences():
    matrix = random_matrix(3)
    matrix = matrix - matrix.max(axis=1, keepdims=True)
    z = np.array([0.3, -0.2, 0.1])
    error = check_grad(lambda v: _negative_mean_log_score(v, matrix)[0],
                       lambda v: _negative_mean_log_score(v, matrix)[1], z)
    assert error < 1e-6


def test_single_structure_has_weight_one():
    np.testing.assert_array_equal(stacking_weights(np.full((5, 1), -3.0)), [1.0])


# ------------------------------------------------------------------------------------------
# result type and bridge vs ArviZ itself

def test_table_diffs_and_se_diff_agree_with_arviz_compare():
    rng = np.random.default_rng(8)
    base = rng.normal(-20, 2, G)
    results = [make(f"s{k}", base + rng.normal(-0.3 * k, 1.0, G)) for k in range(4)]
    table = rank(results).set_index("structure")
    ref = compare({r.structure: to_elpd_data(r) for r in results},
                  **accepted_keywords(compare, {"method": "stacking", "round_to": "none"}))
    assert list(table.index) == list(ref.index)
    # arviz-stats 0.8 reports best - model (>= 0), ArviZ 1.x model - best (<= 0), as leafcv does
    np.testing.assert_allclose(table["elpd_diff"], -np.abs(ref["elpd_diff"].astype(float)), atol=1e-9)
    # ArviZ 0.23: dse = sqrt(n * var(diff)) with ddof=0
    np.testing.assert_allclose(table["se_diff"], ref["dse"].astype(float) * DDOF1, atol=1e-9)
    np.testing.assert_allclose(table["weight"], ref["weight"].astype(float), atol=1e-3)
    assert table["elpd_diff"].iloc[0] == 0.0 and not np.signbit(table["elpd_diff"].iloc[0])


def test_se_and_se_diff_by_hand_with_sample_variance():
    # Four leaves (Vehtari, Gelman & Gabry 2017, eq. 23, recalled from memory: SE = sqrt(G var), sample variance).
    # a = (-10, -14, -12, -12): total -48, mean -12, deviations (2, -2, 0, 0), sum of squares 8,
    #     var (ddof=1) = 8/3, se = sqrt(4 * 8/3) = sqrt(32/3) = 3.266   (ddof=0 would give sqrt(8) = 2.828)
    # b = a + d with d = (0, -4, 1, -1) = (-10, -18, -11, -13): total -52, mean -13, deviations (3, -5, 2, 0),
    #     sum of squares 38, se = sqrt(4 * 38/3) = sqrt(152/3) = 7.118
    # paired: elpd_diff = sum d = -4; d mean -1, deviations (1, -3, 2, 0), sum of squares 14,
    #     se_diff = sqrt(4 * 14/3) = sqrt(56/3) = 4.320   (ddof=0 would give sqrt(14) = 3.742)
    leaves = ("L1", "L2", "L3", "L4")
    a = make("a", [-10.0, -14.0, -12.0, -12.0], leaves=leaves)
    b = make("b", [-10.0, -18.0, -11.0, -13.0], leaves=leaves)
    table = rank([b, a]).set_index("structure")
    assert table.loc["a", "elpd"] == -48.0 and table.loc["b", "elpd"] == -52.0
    assert table.loc["a", "se"] == pytest.approx(np.sqrt(32 / 3), rel=1e-12)
    assert table.loc["b", "se"] == pytest.approx(np.sqrt(152 / 3), rel=1e-12)
    assert table.loc["b", "elpd_diff"] == -4.0
    assert table.loc["b", "se_diff"] == pytest.approx(np.sqrt(56 / 3), rel=1e-12)
    assert table.loc["a", "se_diff"] == 0.0


def test_constant_per_leaf_difference_has_zero_se():
    base = np.linspace(-30, -10, G)
    table = rank([make("a", base), make("b", base - 0.25)])
    row = table.iloc[1]
    assert row["elpd_diff"] == pytest.approx(-0.25 * G)
    assert row["se_diff"] == pytest.approx(0.0, abs=1e-9)


def test_sign_convention_and_order():
    rng = np.random.default_rng(9)
    base = rng.normal(-20, 2, G)
    results = [make(f"s{k}", base + rng.normal(0, 1, G)) for k in range(5)]
    table = rank(results)
    assert list(table.columns) == COLUMNS
    # DESIGN.md, "Interfaces", plus quad_bound (the summed per-unit quadrature bound) after mcse
    assert COLUMNS == ["structure", "rank", "elpd", "se", "mcse", "quad_bound", "elpd_diff", "se_diff", "weight",
                       "rmse", "r2", "n_refits", "max_khat", "converged", "warnings"]
    assert table["elpd"].is_monotonic_decreasing
    assert table["elpd_diff"].iloc[0] == 0.0 and table["se_diff"].iloc[0] == 0.0
    assert (table["elpd_diff"] <= 0).all()
    assert list(table["rank"]) == [1, 2, 3, 4, 5]
    expected = {r.structure: r.elpd for r in results}
    best = max(expected.values())
    for _, row in table.iterrows():
        assert row["elpd_diff"] == pytest.approx(expected[row["structure"]] - best)


def test_ties_share_a_rank_and_keep_input_order():
    base = np.arange(-40.0, -40.0 + G)           # dyadic values: totals are exact
    results = [make("first", base), make("second", base[::-1]), make("worse", base - 1.0)]
    table = rank(results)
    assert list(table["structure"]) == ["first", "second", "worse"]
    assert list(table["rank"]) == [1, 1, 3]
    assert table["elpd_diff"].iloc[1] == 0.0
    assert f"{NOT_TOLD_APART}: smaller than 4 nats" in table["warnings"].iloc[1]
    assert summary_notes(table, G)[0] == "first and second are tied for the best elpd."


# ------------------------------------------------------------------------------------------
# convergence and comparability

def test_failed_structure_is_placed_last_without_rank_or_weight():
    rng = np.random.default_rng(10)
    base = rng.normal(-20, 2, G)
    results = [
        make("failed", base + rng.normal(0.0, 1.0, G), grade="failed", warnings=("R-hat 1.08 for sigma",)),
        make("good", base), make("fair", base - rng.uniform(0, 1, G)),
    ]
    table = rank(results)
    assert list(table["structure"]) == ["good", "fair", "failed"]
    last = table.iloc[-1]
    assert last["rank"] is pd.NA
    assert last["converged"] == 0 and np.isnan(last["weight"])
    assert last["warnings"].startswith(f"{NOT_RANKED}; R-hat 1.08 for sigma")
    assert table["weight"].iloc[:2].sum() == pytest.approx(1.0, abs=1e-6)
    assert list(table["rank"].iloc[:2]) == [1, 2]
    notes = summary_notes(table, G)
    assert any("failed (fits did not converge)" in n for n in notes)


def test_when_every_fit_failed_nothing_is_ranked():
    base = np.linspace(-30, -10, G)
    table = rank([make("a", base, grade="failed"), make("b", base - 0.5, grade="failed")])
    assert table["rank"].isna().all() and table["weight"].isna().all()
    assert list(table["structure"]) == ["a", "b"]
    assert table["elpd_diff"].iloc[1] == pytest.approx(-0.5 * G)      # for information, to the highest elpd
    assert all(w.startswith(NOT_RANKED) for w in table["warnings"])
    notes = summary_notes(table, G)
    assert notes[0].startswith("No structure could be ranked")
    assert not any("best" in n for n in notes)


def test_marginal_structure_is_ranked_with_one_marginal_warning():
    base = np.linspace(-30, -10, G)
    caller = "marginal convergence: bulk ESS 310 for tau_leaf"
    table = rank([make("m1", base, grade="marginal"), make("m2", base - 0.5, grade="marginal", warnings=(caller,)),
                  make("ok", base - 9.0)]).set_index("structure")
    assert list(table["rank"]) == [1, 2, 3] and table["weight"].notna().all()
    assert table.loc["m1", "warnings"].startswith(MARGINAL_WARNING)
    assert table.loc["m2", "warnings"].startswith(caller)
    assert table.loc["m2", "warnings"].count("marginal convergence") == 1     # the caller's text is not duplicated
    assert "marginal" not in table.loc["ok", "warnings"]
    assert list(table["converged"]) == [0, 0, 1]          # 1 only for grade "converged"
    assert any("only marginally" in n and "m1, m2" in n for n in summary_notes(table.reset_index(), G))


def test_unscored_structure_is_listed_apart_with_its_reason():
    base = np.linspace(-30, -10, G)
    broken = base + 0.25
    broken[7] = np.nan                     # a leaf whose quadrature did not converge has no usable value
    reason = "quadrature did not converge for leaf leaf07"
    table = rank([make("q", broken, unscored=reason), make("a", base), make("b", base - 0.5)])
    assert list(table["structure"]) == ["a", "b", "q"]
    last = table.iloc[-1]
    assert last["rank"] is pd.NA and np.isnan(last["weight"]) and np.isnan(last["elpd"])
    assert last["converged"] == 1                       # its fits converged; it is unranked for another reason
    assert last["warnings"].startswith(f"not ranked: {reason}")
    both = rank([make("q", base, unscored=reason, grade="failed"), make("a", base - 1.0)])
    assert both.iloc[-1]["warnings"].startswith(f"{NOT_RANKED} and {reason}")
    notes = summary_notes(table, G)
    assert any("q (not scored reliably)" in n for n in notes)
    with pytest.raises(ValueError, match="not finite in: q"):
        rank([make("q", broken), make("a", base)])      # a ranked structure must have finite elpd


def test_unranked_structure_scoring_clearly_higher_is_announced_first():
    base = np.linspace(-30, -10, G)
    # d = failed - good alternates 1.5 and 0.5: elpd_diff = 30 * 1 = 30; deviations +-0.5, sum of squares 7.5,
    # se_diff = sqrt(30 * 7.5 / 29) = sqrt(225 / 29) = 2.79
    failed = base + np.where(np.arange(G) % 2 == 0, 1.5, 0.5)
    table = rank([make("failed", failed, grade="failed"), make("good", base), make("worse", base - 9.0)])
    row = table.set_index("structure").loc["failed"]
    assert row["elpd_diff"] == pytest.approx(30.0) and row["se_diff"] == pytest.approx(np.sqrt(225 / 29))
    notes = summary_notes(table, G)
    assert notes[0] == ("failed's fits did not pass their diagnostics; its score, 30.0 nats higher, would make it "
                        "the best; see Diagnostics.")
    assert not any("predicts new leaves best" in n for n in notes)
    assert notes[1].startswith("good is the best among the reliably scored structures; its lead over worse")
    assert notes[1].endswith("is clear.")


def test_unranked_structure_higher_within_two_se_is_still_announced():
    base = np.linspace(-30, -10, G)
    # d alternates +3 and -2.5: elpd_diff = 15 * 0.5 = 7.5; deviations +-2.75, se_diff = sqrt(30 * 30 * 7.5625 / 29)
    # = 15.3: the rule cannot tell it from the leader, and its score is higher, so the leader is not called best
    failed = base + np.where(np.arange(G) % 2 == 0, 3.0, -2.5)
    table = rank([make("failed", failed, grade="failed"), make("good", base), make("worse", base - 9.0)])
    assert table.iloc[-1]["se_diff"] == pytest.approx(np.sqrt(30 * 30 * 7.5625 / 29))
    notes = summary_notes(table, G)
    assert notes[0].startswith("failed's fits did not pass their diagnostics; its score, 7.5 nats higher")
    assert not any("predicts new leaves best" in n for n in notes)
    # below the leader, an unranked structure is listed, not announced
    lower = rank([make("failed", base - 7.5, grade="failed"), make("good", base), make("worse", base - 9.0)])
    assert summary_notes(lower, G)[0].startswith("good predicts new leaves best")


def test_unscored_structure_far_ahead_with_large_se_is_named_and_the_leader_only_best_among_scored():
    # Unranked C about 15 nats ahead of A with an SE_diff near 11: 15 < 2 SE, so the rule cannot tell C from A,
    # and C's score is higher, so A must not be called the best. d = C - A alternates 2.5 and -1.5: elpd_diff
    # 15 x 2.5 - 15 x 1.5 = 15.0; mean 0.5, deviations +-2, se_diff = sqrt(30 x 30 x 4 / 29) = 11.1.
    base = np.linspace(-30, -10, G)
    c = base + np.where(np.arange(G) % 2 == 0, 2.5, -1.5)
    table = rank([make("A", base), make("B", base - 10.0), make("C", c, unscored="quadrature did not settle for leaf03")])
    row = table.set_index("structure").loc["C"]
    assert row["elpd_diff"] == pytest.approx(15.0)
    assert row["se_diff"] == pytest.approx(np.sqrt(30 * 30 * 4 / 29))
    notes = summary_notes(table, G)
    assert notes[0] == ("C could not be scored reliably; its score, 15.0 nats higher, would make it the best; "
                        "see Diagnostics.")
    assert notes[1].startswith("A is the best among the reliably scored structures")
    assert not any("A predicts new leaves best" in n for n in notes)


def test_nan_se_of_an_unranked_higher_structure_changes_nothing_in_the_announcement():
    # one leaf: every SE is NaN (G < 2); the unranked structure 3 nats higher is named all the same
    one = ("L1",)
    table = rank([make("A", [-20.0], leaves=one), make("C", [-17.0], leaves=one, grade="failed")])
    assert np.isnan(table.set_index("structure").loc["C", "se_diff"])
    notes = summary_notes(table, 1)
    assert notes[0] == ("C's fits did not pass their diagnostics; its score, 3.0 nats higher, would make it the "
                        "best; see Diagnostics.")
    assert notes[1] == "A is the best among the reliably scored structures, and the only one."


def test_notes_count_levels_of_the_unit():
    levels = tuple(f"sp{i}" for i in range(8))
    base = np.linspace(-300, -100, 8)
    results = [make("a", base + 8.0, leaves=levels, unit="species"), make("b", base, leaves=levels, unit="species")]
    table = rank(results)
    notes = summary_notes(table, 8, "species", pointwise_table(results))
    # d = 8 on every level: total 64, 56 without any one level, so the leave-one-unit-out check passes
    assert notes[0].startswith("a predicts new levels of species best")
    assert any("fewer than 100 levels of species (here 8)" in n for n in notes)
    assert any(n.startswith("With only 8 levels of species, the SE of a difference over so few units is unreliable")
               for n in notes)
    # without the per-unit values the check cannot be made, so the lead is not called clear
    assert "with only 8 units, the per-unit values needed for the leave-one-unit-out check are not available" \
        in summary_notes(table, 8, "species")[0]


def test_mismatched_leaves_raise_naming_structures():
    base = np.zeros(G)
    other = tuple(f"x{i}" for i in range(G))
    with pytest.raises(ValueError, match="odd_one"):
        rank([make("ref", base), make("fine", base), make("odd_one", base, leaves=other)])
    with pytest.raises(ValueError, match="reordered"):
        rank([make("ref", base), make("reordered", base, leaves=LEAVES[::-1])])
    with pytest.raises(ValueError, match=r"K-fold results \(folded\) cannot be compared .*ref \(auto\)"):
        rank([make("ref", base), make("folded", base, method="kfold")])
    # auto and exact estimate the same leave-one-leaf-out quantity on the same leaves
    assert len(rank([make("ref", base), make("exact_one", base - 1.0, method="exact")])) == 2


# ------------------------------------------------------------------------------------------
# warnings and notes

def test_small_difference_reason_exactly_below_four():
    # Sivula et al. 2020: |Δelpd| < 4 is small. One leaf shifted by a dyadic amount: exact totals. d has one
    # non-zero value s, so se_diff = sqrt(G var(d, ddof=1)) = s and |Δ| = s <= 2 SE: never told apart, and
    # "smaller than 4 nats" is among the reasons exactly when s < 4.
    base = -np.arange(10.0, 10.0 + G)
    shifts = {"d3.75": 3.75, "d4.00": 4.0, "d4.25": 4.25, "d8.00": 8.0}
    results = [make("best", base)]
    for name, shift in shifts.items():
        elpd = base.copy()
        elpd[0] -= shift
        results.append(make(name, elpd))
    table = rank(results).set_index("structure")
    assert NOT_TOLD_APART not in table.loc["best", "warnings"]
    for name, shift in shifts.items():
        assert table.loc[name, "elpd_diff"] == -shift
        assert table.loc[name, "se_diff"] == pytest.approx(shift)
        assert NOT_TOLD_APART in table.loc[name, "warnings"]
        assert ("smaller than 4 nats" in table.loc[name, "warnings"]) == (shift < 4.0)
        assert "within 2 SE of the difference" in table.loc[name, "warnings"]


def test_within_two_se_reason_follows_paired_se():
    rng = np.random.default_rng(12)
    base = rng.normal(-20, 2, G)
    results = [make("best", base + 0.5)] + [make(f"s{k}", base + rng.normal(-0.2 * k, 1.0, G)) for k in range(5)]
    table = rank(results).set_index("structure")
    best = table["elpd"].idxmax()
    for r in results:
        if r.structure == best:
            continue
        d = r.elpd_i - next(x for x in results if x.structure == best).elpd_i
        within = abs(d.sum()) <= 2 * np.sqrt(G * np.var(d, ddof=1))
        assert ("within 2 SE of the difference" in table.loc[r.structure, "warnings"]) == within


def test_khat_warning_uses_draw_dependent_threshold():
    # Vehtari et al. 2024: threshold min(1 - 1/log10 S, 0.7): 0.5 for S = 100, 0.7 for S = 4000
    base = np.linspace(-30, -10, G)
    k = np.full(G, 0.2)
    k[3] = 0.6
    few = rank([make("few", base, pareto_k=k, n_draws=100), make("other", base - 5.0, n_draws=100)])
    many = rank([make("many", base, pareto_k=k), make("other", base - 5.0)])
    assert "k-hat above 0.50 for 1 of 30 leaves scored by PSIS (max 0.60" in few["warnings"].iloc[0]
    assert "k-hat" not in many["warnings"].iloc[0]
    assert many["max_khat"].iloc[0] == 0.6 and np.isnan(many["max_khat"].iloc[1])


def test_khat_counts_only_psis_scored_leaves():
    # two leaves refitted exactly carry no k-hat; the largest k-hat of the PSIS-scored ones is 0.55
    base = np.linspace(-30, -10, G)
    k = np.full(G, 0.1)
    k[[0, 1]] = np.nan
    k[5] = 0.55
    method_i = ("refit", "refit") + ("psis",) * (G - 2)
    table = rank([make("a", base, pareto_k=k, method_i=method_i, n_draws=100), make("b", base - 5.0, n_draws=100)])
    assert table["max_khat"].iloc[0] == 0.55
    # S = 100: threshold min(1 - 1/log10 100, 0.7) = 0.5 (Vehtari et al. 2024)
    assert "k-hat above 0.50 for 1 of 28 leaves scored by PSIS (max 0.55" in table["warnings"].iloc[0]


def test_mcse_column_adds_entry_variances():
    # sqrt(0.03^2 + 0.04^2 + 0.12^2 + 0^2 ...) = sqrt(0.0009 + 0.0016 + 0.0144) = sqrt(0.0169) = 0.13
    base = np.linspace(-30, -10, G)
    mcse = np.zeros(G)
    mcse[:3] = [0.03, 0.04, 0.12]
    table = rank([make("a", base, mcse_i=mcse), make("b", base - 5.0)])
    assert table["mcse"].iloc[0] == pytest.approx(0.13, rel=1e-12)
    assert np.isnan(table["mcse"].iloc[1])              # not computed


def test_summary_notes_for_few_leaves_and_many_structures():
    rng = np.random.default_rng(13)
    base = rng.normal(-20, 2, G)
    small = rank([make("a", base + 2.0), make("b", base)])
    notes = summary_notes(small, G)
    assert notes[0].startswith("a predicts new leaves best") and "clear" in notes[0]
    assert any("fewer than 100 leaves" in n and "Sivula" in n for n in notes)
    assert not any("Sivula" in n for n in summary_notes(small, 120))
    assert not any("McLatchie" in n for n in notes)
    many = rank([make(f"s{k:02d}", base - 0.01 * k) for k in range(12)])
    assert any("McLatchie & Vehtari 2024" in n for n in summary_notes(many, G))
    eleven = rank([make(f"s{k:02d}", base - 0.01 * k) for k in range(11)])
    assert not any("McLatchie" in n for n in summary_notes(eleven, G))
    assert "not clear" in summary_notes(eleven, G)[0]


def test_rmse_and_r2_columns_per_curve_type():
    base = np.linspace(-30, -10, G)
    only_all = rank([make("a", base, rmse={"all": 0.5}, r2={"all": 0.9}), make("b", base - 1)])
    assert list(only_all.columns) == COLUMNS
    assert only_all["rmse"].iloc[0] == 0.5 and np.isnan(only_all["rmse"].iloc[1])
    by_type = rank([make("a", base, rmse={"all": 0.55, "aq": 0.42, "aci": 0.61}, r2={"all": 0.9, "aci": 0.8}),
                    make("b", base - 1, rmse={"all": 0.7}, r2={"par": 0.3})])
    assert list(by_type.columns) == table_columns(["aci", "aq", "par"])
    at = COLUMNS.index("r2") + 1
    assert list(by_type.columns)[at:at + 6] == ["rmse_aci", "r2_aci", "rmse_aq", "r2_aq", "rmse_par", "r2_par"]
    a, b = by_type.iloc[0], by_type.iloc[1]
    assert (a["rmse"], a["rmse_aci"], a["rmse_aq"], a["r2"], a["r2_aci"]) == (0.55, 0.61, 0.42, 0.9, 0.8)
    assert np.isnan(a["r2_aq"]) and np.isnan(a["rmse_par"]) and b["r2_par"] == 0.3 and np.isnan(b["r2"])


def test_every_column_but_names_and_warnings_is_numeric_in_the_csv(tmp_path):
    base = np.linspace(-30, -10, G)
    table = rank([make("a", base, rmse={"all": 0.5, "aci": 0.4}, r2={"all": 0.9, "aci": 0.8}),
                  make("m", base - 1.0, grade="marginal", pareto_k=np.full(G, 0.2)),
                  make("f", base - 2.0, grade="failed")])
    assert table["rank"].dtype == "Int64" and table["converged"].dtype == "int64"
    path = tmp_path / "ranking.csv"
    table.to_csv(path, index=False)
    back = pd.read_csv(path)
    for column in back.columns:
        if column not in ("structure", "warnings"):
            assert pd.api.types.is_numeric_dtype(back[column]), column
    assert list(back["converged"]) == [1, 0, 0]


def test_format_ranking_lists_every_structure_and_warning():
    base = np.linspace(-30, -10, G)
    table = rank([make("alpha_leaf", base, mcse_i=np.full(G, 0.01)), make("theta_leaf", base - 0.5, grade="marginal"),
                  make("vcmax_leaf", base - 1.0, grade="failed")])
    text = format_ranking(table)
    lines = text.splitlines()
    assert lines[0].split() == [c for c in COLUMNS if c != "warnings"]
    assert [line.split()[0] for line in lines[1:4]] == ["alpha_leaf", "theta_leaf", "vcmax_leaf"]
    assert f"vcmax_leaf: {NOT_RANKED}" in text and f"theta_leaf: {MARGINAL_WARNING}" in text
    assert [line.split()[1] for line in lines[1:4]] == ["1", "2", "-"]
    # mcse of alpha_leaf: sqrt(30 * 0.01^2) = 0.0548
    assert lines[1].split()[4] == "0.05"
    assert [line.split()[-1] for line in lines[1:4]] == ["yes", "marginal", "NO"]


# ------------------------------------------------------------------------------------------
# the one decision rule: |Δ| < 4 nats (Sivula et al. 2020), or |Δ| <= 2 sqrt(SE² + MCSE_a² + MCSE_b²) + B_a + B_b
# (the factor 2: common practice, no source), or, with fewer than 10 units, undone by dropping one unit
# (common practice, no source). Margins below are worked out by hand.

def test_rule_clear_lead():
    # 2 sqrt(1² + 0.1² + 0.1²) + 0.01 + 0.01 = 2 sqrt(1.02) + 0.02 = 2.040; 10 > 2.04 and 10 >= 4
    v = told_apart(-10.0, 1.0, (0.1, 0.1), (0.01, 0.01))
    assert v.told_apart and v.reasons == ()
    assert v.margin == pytest.approx(2 * np.sqrt(1.02) + 0.02)


def test_rule_lead_within_four_nats():
    v = told_apart(3.9, 0.0, (0.0, 0.0), (0.0, 0.0))
    assert not v.told_apart and v.reasons == ("smaller than 4 nats",)
    assert told_apart(4.0, 0.0, (0.0, 0.0), (0.0, 0.0)).told_apart          # 4 itself is not small


def test_rule_lead_hidden_by_monte_carlo_error():
    # A 4.4-nat lead with SE_diff 0.15 alone would be clear: 4.4 >= 4 and 4.4 > 2 x 0.15 = 0.3.
    assert told_apart(4.4, 0.15).told_apart
    # With an MCSE of 3.3 nats: 2 sqrt(0.15² + 3.3²) = 2 sqrt(0.0225 + 10.89) = 6.61 > 4.4, not told apart ...
    v = told_apart(4.4, 0.15, (3.3, 0.0), (0.0, 0.0))
    assert not v.told_apart and v.margin == pytest.approx(2 * np.sqrt(0.0225 + 10.89))
    # ... and with summed quadrature bounds of 3.0 nats on top: 6.61 + 3.0 = 9.61
    v = told_apart(4.4, 0.15, (3.3, 0.0), (1.5, 1.5))
    assert not v.told_apart and v.margin == pytest.approx(2 * np.sqrt(0.0225 + 10.89) + 3.0)
    assert v.why() == ("within the margin 2·√(SE_diff² + MCSE_a² + MCSE_b²) + B_a + B_b = "
                       "2·√(0.15² + 3.30² + 0.00²) + 1.50 + 1.50 = 9.6 nats (B: summed quadrature bounds)")


def test_rule_lead_hidden_by_summed_quadrature_bounds():
    # 100 leaves with a bound of 0.05 nats each sum to 5 nats. A 6-nat lead with SE 0.5 and MCSEs 0.1:
    # 2 sqrt(0.25 + 0.01 + 0.01) = 1.039 alone would tell them apart; + 5.0 + 0 = 6.039 >= 6 does not.
    b = summed_bound(np.full(100, 0.05))
    assert b == pytest.approx(5.0)
    assert told_apart(6.0, 0.5, (0.1, 0.1), (0.0, 0.0)).told_apart
    v = told_apart(6.0, 0.5, (0.1, 0.1), (b, 0.0))
    assert not v.told_apart and v.margin == pytest.approx(2 * np.sqrt(0.27) + 5.0)


def test_rule_nan_se_and_unknown_bounds_cannot_be_told_apart():
    v = told_apart(50.0, np.nan)
    assert not v.told_apart and v.reasons == ("without an SE of the difference",)
    assert not told_apart(50.0, 1.0, bounds=(np.inf, 0.0)).told_apart
    # summed bounds: none computed -> NaN (counted as 0); one missing among computed ones, or any inf -> inf
    assert np.isnan(summed_bound([np.nan, np.nan]))
    assert summed_bound([0.01, np.nan]) == np.inf and summed_bound([0.01, np.inf]) == np.inf
    assert summed_bound([0.01, 0.02]) == pytest.approx(0.03)
    assert told_apart(50.0, 1.0, (np.nan, np.nan), (np.nan, np.nan)).told_apart


def test_rule_few_units_sign_flip_when_one_unit_is_dropped():
    # 5 species; d = (40, -3, -2, -1, -2): total +32, dropping sp1 leaves -8, so the sign flips. (Such a flip
    # always comes with SE > |Δ|: here SE = sqrt(5 var(d, ddof=1)) = 42.0, so 2 SE hides it too; both reasons.)
    d = np.array([40.0, -3.0, -2.0, -1.0, -2.0])
    se = np.sqrt(5 * np.var(d, ddof=1))
    assert se == pytest.approx(np.sqrt(5 * 1413.2 / 4))    # mean 6.4; squares 33.6², 9.4², 8.4², 7.4², 8.4²: 1413.2
    v = told_apart(32.0, se, per_unit=d, unit_ids=["sp1", "sp2", "sp3", "sp4", "sp5"])
    assert not v.told_apart
    assert v.reasons[-1] == ("undone when sp1 alone is dropped (with only 5 units the difference goes from +32.0 "
                             "to -8.0 nats, changing its sign; leave-one-unit-out check)")
    assert v.reasons[0].startswith("within 2 SE of the difference")


def test_rule_few_units_lead_that_one_unit_brings_below_four_nats():
    # d = (4.5, 0.875, 0.875, 0.875, 0.875): total 8.0, mean 1.6, deviations 2.9 and -0.725 (x4), sum of squares
    # 8.41 + 2.1025 = 10.5125, SE = sqrt(5 x 10.5125 / 4) = 3.625; 8 >= 4 and 8 > 2 x 3.625 = 7.25, so on the SE
    # alone it would be clear; without the first unit 3.5 nats are left, below 4: not clear.
    d = np.array([4.5, 0.875, 0.875, 0.875, 0.875])
    se = np.sqrt(5 * np.var(d, ddof=1))
    assert se == pytest.approx(np.sqrt(5 * 10.5125 / 4))
    assert told_apart(8.0, se).told_apart
    v = told_apart(8.0, se, per_unit=d, unit_ids=list("abcde"))
    assert not v.told_apart
    assert v.reasons == ("undone when a alone is dropped (with only 5 units the difference goes from +8.0 to "
                         "+3.5 nats, less than 4 in size; leave-one-unit-out check)",)
    # spread evenly (1.6 each) the lead keeps >= 4 nats without any one unit (6.4): clear
    assert told_apart(8.0, 0.0, per_unit=np.full(5, 1.6)).told_apart
    # with 10 units the check no longer applies
    assert told_apart(8.0, se, per_unit=np.r_[d, np.zeros(5)]).told_apart


def test_ranking_table_sees_the_monte_carlo_and_quadrature_example():
    # The reviewer's example through rank() and summary_notes(): a 4.4-nat lead, SE_diff 0.15, the leader's MCSE
    # 3.3 nats (sqrt(30) x 3.3/sqrt(30)) and summed bounds 3.0 nats (30 x 0.1): not told apart, not clear.
    rng = np.random.default_rng(21)
    base = rng.normal(-20, 2, G)
    a = 0.15 / np.sqrt(G * G / (G - 1))                  # alternating +-a gives se_diff = sqrt(G G a² / (G - 1))
    lead = base + 4.4 / G + np.where(np.arange(G) % 2 == 0, a, -a)
    results = [make("A", lead, mcse_i=np.full(G, 3.3 / np.sqrt(G)), quad_bound_i=np.full(G, 0.1)),
               make("B", base, mcse_i=np.zeros(G), quad_bound_i=np.zeros(G))]
    table = rank(results).set_index("structure")
    assert table.loc["B", "elpd_diff"] == pytest.approx(-4.4) and table.loc["B", "se_diff"] == pytest.approx(0.15)
    assert table.loc["A", "mcse"] == pytest.approx(3.3) and table.loc["A", "quad_bound"] == pytest.approx(3.0)
    assert table.loc["B", "warnings"].startswith(f"{NOT_TOLD_APART}: within the margin")
    note = summary_notes(table.reset_index(), G)[0]
    assert note.startswith("A has the highest elpd, but its lead over B (4.4 nats, SE 0.1)")  # 0.15 shown as 0.1
    assert "is not clear" in note and "= 9.6 nats" in note
    # the same lead without the Monte Carlo error and the bounds is clear
    clean = rank([make("A", lead), make("B", base)])
    assert NOT_TOLD_APART not in clean["warnings"].iloc[1]
    assert summary_notes(clean, G)[0].startswith("A predicts new leaves best; its lead over B")
