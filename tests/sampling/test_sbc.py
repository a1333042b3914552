"""A 20-replicate simulation-based calibration of the generic program (bench/sbc.py) on one structure:
slow (about 10 minutes on 2 cores), so it runs only with LEAFCV_SLOW=1. The full run (>= 100 replicates
per structure) writes docs/validation.md."""
from __future__ import annotations

import os

import pytest

pytestmark = [pytest.mark.slow,
              pytest.mark.skipif(os.environ.get("LEAFCV_SLOW") != "1", reason="slow: set LEAFCV_SLOW=1 to run")]


def test_sbc_of_twenty_replicates(tmp_path):
    from bench import sbc
    from leafcv.report.reliability import read_validation

    doc = tmp_path / "validation.md"
    sbc.main(["--folder", str(tmp_path / "reps"), "--replicates", "20", "--structure", "leaf-vcmax-alpha",
              "--warmup", "200", "--draws", "200", "--doc", str(doc)])
    assert len(list((tmp_path / "reps" / "leaf-vcmax-alpha").glob("rep-*.json"))) == 20   # failed fits recorded too
    v = read_validation(doc)
    assert len(v.rows) == 9          # 5 intercepts, 2 leaf SDs, the residual SD, the joint log-likelihood
    # each check alone fails 1 % of the time for a correct program: two or more failures among 9 have
    # probability about 0.3 % (binomial), so they point at a real miscalibration
    failed = [r for r in v.rows if r["result"] != "pass"]
    assert len(failed) <= 1, failed
