"""leafcv from Python, cell by cell as in a notebook (each "# %%" starts a cell).

Run as a script: python3 examples/notebook.py [FOLDER] [--fast]
(--fast: short chains and two structures, to try the API in a minute; the ranking is then rough).
"""
# %% Write the invented demo scenario and load it: the comparison file and its data, every problem checked
import argparse
import logging
import tempfile
from dataclasses import replace
from pathlib import Path

from arviz_stats import loo, summary

import leafcv
from leafcv.demo import write_demo
from leafcv.spec import SamplerSpec

ap = argparse.ArgumentParser()
ap.add_argument("folder", nargs="?", type=Path)
ap.add_argument("--fast", action="store_true")
ap.add_argument("--engine", choices=("pystan", "cmdstan"), help="the Stan engine (default: PyStan)")
args, _ = ap.parse_known_args()
logging.basicConfig(level=logging.INFO, format="%(message)s")   # leafcv's progress is on the "leafcv" logger
folder = args.folder or Path(tempfile.mkdtemp(prefix="leafcv-notebook-"))
study = leafcv.load(write_demo(folder, quick=True))
print(study.structures)
print(study.describe())

# %% Short chains for a first look (--fast); the comparison file's own settings otherwise
if args.fast:
    study = leafcv.Study(replace(study.comparison, sampler=SamplerSpec(chains=2, warmup=150, draws=150, seed=7),
                                 structures=tuple(study.comparison.structure(n)
                                                  for n in ("leaf-vcmax-alpha", "traits-month-fixed"))),
                         study.dataset)

# %% One structure on all leaves: estimates, diagnostics, and the posterior for ArviZ (an xarray DataTree)
fit = study.fit("traits-month-fixed", engine=args.engine)
print(fit.diagnostics.grade)
print(fit.summary.to_string(index=False))
tree = fit.to_datatree()
for name in ("b0", "beta"):           # one at a time: each carries its own labelling coordinates
    print(summary(tree, var_names=[name], kind="diagnostics"))

# %% The main job: every structure cross-validated by leaf and ranked (resumable: run it again to reuse)
run = study.run(folder / "runs" / "notebook", engine=args.engine)
print(run.ranking[["structure", "rank", "elpd", "se", "elpd_diff", "se_diff", "converged"]].to_string(index=False))

# %% The best structure's full-data fit, and leave-one-leaf-out PSIS from ArviZ on its log_likelihood group
best = run.ranking.iloc[0]["structure"]
print(best, loo(run.fit(best)))
