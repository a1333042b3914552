"""The plan of one structure (leafcv.cv.plan, one plan per method in leafcv.cv.plans) without a sampler:
the task count `expected_tasks` gives (the progress total of a run) against the tasks a plan actually
yields when driven with the fake engine of tests/fakes.py."""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

import leafcv.cv.plan as plan_module
import leafcv.cv.tasks as tasks_module
from leafcv.cv.plan import Context, execute, expected_tasks, plan
from leafcv.cv.tasks import roundtrip
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec

from ..fakes import FakeEngine
from ..helpers import pooled_structure

SAMPLER = SamplerSpec(chains=2, warmup=10, draws=60, seed=3)


@pytest.fixture(scope="module")
def six_leaves(quick_demo):
    """The quick demo's first 6 leaves (every campaign and species still present)."""
    import pandas as pd

    from leafcv.data.reading import load_dataset

    comparison, _, _ = quick_demo
    table = pd.read_csv(comparison.data.file, dtype=str)
    column = comparison.data.columns["leaf"]
    table = table[table[column].isin(sorted(table[column].unique())[:6])]
    dataset = load_dataset(comparison.data, table=table)
    assert dataset.n_leaves == 6
    return comparison, dataset, fit_leaves(dataset)


def _yielded(case, **how) -> tuple[int, list[str], object]:
    """Drive a plan to its end with the fake engine; the tasks it yielded (every list, counted), their
    kinds, and its result."""
    comparison, dataset, leaf_fits = case
    ctx = Context(comparison, dataset, leaf_fits, SAMPLER, engine=FakeEngine())
    steps = plan(pooled_structure(comparison), dataset, comparison, sampler=SAMPLER, **how)
    done, outputs, kinds = {}, None, []
    try:
        while True:
            batch = steps.send(outputs) if outputs is not None else next(steps)
            kinds += [t.kind for t in batch]
            for t in batch:
                if t.key not in done:
                    done[t.key] = roundtrip(execute(ctx, t, {k: done[k] for k in t.inputs}))
            outputs = [done[t.key] for t in batch]
    except StopIteration as stop:
        result = stop.value[0]
    return len(kinds), kinds, result


def _expected(case, **how) -> int:
    comparison, dataset, _ = case
    return expected_tasks(pooled_structure(comparison), dataset, sampler=SAMPLER, **how)


@pytest.mark.parametrize("how", [dict(method="exact"), dict(method="exact", estimates=True),
                                 dict(method="kfold", folds=4, estimates=True),
                                 dict(method="exact", by="taxon"), dict(method="kfold", by="campaign", folds=2),
                                 dict(method="auto", by="taxon", estimates=True)],
                         ids=lambda how: "-".join(f"{k}={v}" for k, v in how.items()))
def test_exact_and_fold_plans_yield_exactly_the_expected_tasks(six_leaves, monkeypatch, how):
    monkeypatch.setattr(tasks_module, "SCORE_BLOCK", 4)          # 6 leaves: score blocks of 4 and 2
    n, kinds, result = _yielded(six_leaves, **how)
    assert n == _expected(six_leaves, **how)
    assert kinds.count("score") == (2 if how.get("estimates") else 0)
    assert kinds.count("full") == (1 if how.get("estimates") else 0)
    assert result.n_refits == n - kinds.count("full") - kinds.count("score")


def _khat(value: float):
    """integrated_loo with every leaf's k-hat set to ``value`` (the scores left as they are)."""
    real = plan_module.integrated_loo

    def fixed(log_m, chains=1):
        est = real(log_m, chains)
        return replace(est, khat=np.full_like(est.khat, value))
    return fixed


@pytest.mark.parametrize("spot_checks", [0, 1, 8])
def test_auto_yields_the_expected_tasks_when_no_leaf_is_flagged(six_leaves, monkeypatch, spot_checks):
    # with k-hat 0 no leaf is flagged and at most one spot check can disagree (two refit every leaf), so
    # the plan is the full fit, its score blocks and min(spot checks, leaves) refits
    monkeypatch.setattr(tasks_module, "SCORE_BLOCK", 4)
    monkeypatch.setattr(plan_module, "integrated_loo", _khat(0.0))
    n, kinds, result = _yielded(six_leaves, method="auto", spot_checks=spot_checks)
    assert n == _expected(six_leaves, method="auto", spot_checks=spot_checks)
    assert kinds[:3] == ["full", "score", "score"]
    assert kinds.count("refit") == min(spot_checks, 6)
    if spot_checks == 8:
        assert n == 1 + 2 + 6                   # more spot checks asked for than there are leaves


def test_auto_refits_of_flagged_leaves_are_beyond_the_expected_count(six_leaves, monkeypatch):
    # every leaf above the k-hat threshold: each is refitted, none is left for a spot check
    monkeypatch.setattr(plan_module, "integrated_loo", _khat(5.0))
    n, kinds, result = _yielded(six_leaves, method="auto", spot_checks=2)
    assert set(result.method_i) == {"refit"} and result.n_refits == 6
    assert n == _expected(six_leaves, method="auto", spot_checks=2) - 2 + 6
