"""`leafcv simulate` on the session's demo run (one replicate at short chains): the replicate is compared
over the run's candidates through the task store, summed up, and a second call reuses it."""
from __future__ import annotations

import json

from leafcv.api import open_run
from leafcv.cli import main


def test_simulate_compares_a_replicate_and_resumes(demo_run, tmp_path, capsys):
    comp, dataset, out, table = demo_run
    folder = tmp_path / "sim"
    code = main(["simulate", str(out), "--replicates", "1", "--chains", "2", "--warmup", "100", "--draws", "100",
                 "--out", str(folder), "--progress", "quiet"])
    assert code == 0
    said = capsys.readouterr().out
    assert "1 replicate studies drawn from traits-month-fixed" in said
    rep = folder / "replicate-001"
    assert json.loads((rep / "run" / "manifest.json").read_text())["finished"]
    assert not (rep / "run" / "report.html").exists()          # replicates write no report
    ranked = set(json.loads((rep / "run" / "manifest.json").read_text())["structures"])
    assert ranked == {"leaf-vcmax-alpha", "traits-month-fixed"}  # the run's candidates, not the whole file
    t = open_run(out).simulate(replicates=1, chains=2, warmup=100, draws=100, out=folder, progress="quiet")
    assert t["n_replicates"] == 1
    cands = t["candidates"].set_index("structure")
    assert cands["share_first"].sum() >= 1.0
    assert set(t["coverage"]["quantity"]) >= {"b0[vcmax25]", "tau_leaf[vcmax25]", "sigma[all points]"}
    stamp = (rep / "run" / "ranking.csv").stat().st_mtime_ns
    main(["simulate", str(out), "--replicates", "1", "--chains", "2", "--warmup", "100", "--draws", "100",
          "--out", str(folder), "--progress", "quiet"])
    assert (rep / "run" / "ranking.csv").stat().st_mtime_ns == stamp   # a finished replicate is kept
