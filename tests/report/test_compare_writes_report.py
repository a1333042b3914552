"""The main job ends by writing the report: run_comparison on the quick demo with its cross-validation
replaced by invented scores (no sampler), every engine disabled."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from leafcv.cv.result import CVResult

from .fake_run import labelled_idata

pytestmark = pytest.mark.filterwarnings("ignore:The inplace keyword")


def test_run_comparison_writes_report_html_at_the_end(quick_demo, tmp_path, monkeypatch, no_engine):
    import leafcv.compare as compare
    import leafcv.cv.methods as methods
    import leafcv.cv.plan as plan

    comparison, dataset, _ = quick_demo
    leaves = tuple(str(x) for x in dataset.leaves["leaf"])
    rng = np.random.default_rng(2)
    base = -20 + rng.normal(0, 2, len(leaves))

    def invented(structure, *args, **kwargs):
        """A plan that needs no task: its result, and what scoring keeps for the run folder (the fit,
        and held-out predictions: none here)."""
        k = [s.name for s in comparison.structures].index(structure.name)
        keep = dict(fit="a fit", log_m=None, points=pd.DataFrame(), curves=pd.DataFrame())
        res = CVResult(structure.name, "auto", leaves, base - 3 * k + rng.normal(0, 0.3, len(leaves)), 400,
                       pareto_k=rng.uniform(0, 0.5, len(leaves)), n_refits=0, grade="converged")
        return res, methods.CVDetails(), keep
        yield                                  # a generator, as plans are

    def write_fit(path, fit, data, log_m):
        path.parent.mkdir(parents=True, exist_ok=True)
        labelled_idata().to_netcdf(str(path), engine="h5netcdf")

    monkeypatch.setattr(plan, "plan", invented)
    monkeypatch.setattr(compare, "write_fit", write_fit)
    monkeypatch.setattr(compare, "fit_leaves", lambda data: None)
    logs: list[str] = []
    table = compare.run_comparison(comparison, dataset, tmp_path / "run", log=logs.append)
    report = tmp_path / "run" / "report.html"
    assert logs[-1] == f"report: {report}"
    html = report.read_text()
    assert f"The best structure is {table.iloc[0]['structure']}</b>" in html
    assert (tmp_path / "run" / "figures" / "ranking.png").exists()
    # the demo file's question comment, its two lines joined (leafcv.demo.QUESTION_QUICK)
    assert ("which traits shift Vcmax25 and alpha, and is the season better month fixed, month random or a "
            "smooth trend over the day of year?") in html
