"""Model options and new terms fitted on small simulated cases, each checked by a property that would
fail if the option were ignored."""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from leafcv.api import load
from leafcv.cv.leafmodel import flatten_draws
from leafcv.demo import write_demo
from leafcv.design import leaf_link_values
from leafcv.fitting import fit_structure
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec

pytestmark = pytest.mark.stan

SAMPLER = SamplerSpec(chains=2, warmup=300, draws=200, seed=5, adapt_delta=0.95)


@pytest.fixture(scope="module")
def outlier_case(tmp_path_factory):
    """The quick demo with three gross outliers on the Rubisco-limited points of leaf L001."""
    folder = tmp_path_factory.mktemp("outliers")
    write_demo(folder, quick=True)
    obs = pd.read_csv(folder / "observations.csv")
    aci = obs.index[(obs["plant_leaf"] == "L001") & obs["run"].str.endswith("aci")]
    low = obs.loc[aci].sort_values("ci_ppm").index[1:4]       # three low-Ci points (Wc-limited)
    obs.loc[low, "assim"] -= 12.0
    obs.to_csv(folder / "observations.csv", index=False)
    shutil.copy(Path(__file__).resolve().parents[1] / "comparisons" / "robustness.toml", folder)
    comparison, dataset = load(folder / "robustness.toml")
    truth = pd.read_csv(folder / "truth.csv").set_index("leaf")
    return comparison, dataset, truth


def _leaf_vcmax(fit, leaf: int) -> float:
    draws = flatten_draws(fit.draws.params)
    _, eta = leaf_link_values(fit.design, draws)
    return float(np.mean(np.exp(eta[:, leaf, 0])))


def test_student_t_resists_outliers_where_the_normal_is_pulled(outlier_case):
    # Robust regression with a Student-t likelihood (Lange, Little & Taylor 1989, JASA 84:881-896):
    # three points 12 umol m-2 s-1 low on the Rubisco-limited part pull a normal fit's Vcmax25 of
    # that leaf down; the Student-t fit stays near the generating value.
    comparison, dataset, truth = outlier_case
    leaf_fits = fit_leaves(dataset)
    leaf = int(np.flatnonzero(dataset.leaves["leaf"].astype(str) == "L001")[0])
    target = float(truth.loc["L001", "vcmax25"])
    normal = fit_structure(comparison.structure("reference"), dataset, comparison.data, SAMPLER, leaf_fits=leaf_fits)
    robust = fit_structure(comparison.structure("robust"), dataset, comparison.data, SAMPLER, leaf_fits=leaf_fits)
    err_normal = abs(_leaf_vcmax(normal, leaf) - target) / target
    err_robust = abs(_leaf_vcmax(robust, leaf) - target) / target
    nu = float(np.median(robust.draws.params["nu"]))
    assert err_robust < 0.5 * err_normal, (err_normal, err_robust)
    assert err_robust < 0.08
    assert nu < 10                                    # the heavy tails were used (prior median ~17)
    # the outliers inflate the normal fit's residual SD above the robust scale
    assert np.median(normal.draws.params["sigma"]) > 1.2 * np.median(robust.draws.params["sigma"])


def test_split_recovers_within_and_between_slopes(tmp_path):
    # Group-mean centring separates the within-group slope from the between-group one (Enders &
    # Tofighi 2007, Psychological Methods 12:121-138, from memory). The demo's true Vcmax25 follows
    # leaf N with one slope; shifting the recorded N of each taxon by -0.8 x its index reverses the
    # order of the taxon means, so the between-taxon slope becomes about minus the within-taxon one.
    from leafcv.demo import GEN

    write_demo(tmp_path, quick=True)
    obs = pd.read_csv(tmp_path / "observations.csv")
    taxa = sorted(obs["taxon"].unique())
    obs["n_area"] = obs["n_area"] - 0.8 * obs["taxon"].map({t: i for i, t in enumerate(taxa)})
    obs.to_csv(tmp_path / "observations.csv", index=False)
    text = (tmp_path / "demo.toml").read_text()
    text = text[:text.index("[[structure]]")].replace("format = 1", "format = 2")
    text += """
[[structure]]
name = "common"
vcmax25 = { fixed = ["n_area", "campaign"], random = ["leaf"] }
alpha = { fixed = ["chl_ug", "sla_m2kg"], random = ["leaf"] }
jmax25 = { ratio_to = "vcmax25" }
rd25 = { ratio_to = "vcmax25" }

[[structure]]
name = "split"
vcmax25 = { fixed = ["campaign"], split = { n_area = "taxon" }, random = ["leaf"] }
alpha = { fixed = ["chl_ug", "sla_m2kg"], random = ["leaf"] }
jmax25 = { ratio_to = "vcmax25" }
rd25 = { ratio_to = "vcmax25" }
"""
    (tmp_path / "split.toml").write_text(text)
    comparison, dataset = load(tmp_path / "split.toml")
    leaf_fits = fit_leaves(dataset)
    fits = {n: fit_structure(comparison.structure(n), dataset, comparison.data, SAMPLER, leaf_fits=leaf_fits)
            for n in ("common", "split")}
    coefs = fits["split"].design.coefficients
    w = next(k for k, c in enumerate(coefs) if c.kind == "within")
    b = next(k for k, c in enumerate(coefs) if c.kind == "between")
    beta = fits["split"].draws.params["beta"].reshape(-1, len(coefs))
    within, between = beta[:, w], beta[:, b]
    slope = GEN["n_slope"]
    lo, hi = np.quantile(within, [0.05, 0.95])
    assert lo < slope < hi                                        # within-taxon slope recovered
    assert np.quantile(between, 0.95) < 0 < slope                 # the between-taxon slope has the other sign
    diff = fits["split"].draws.params["split_diff"].reshape(-1)
    assert np.quantile(diff, 0.95) < 0                            # and the difference is reported as such
    k = next(k for k, c in enumerate(fits["common"].design.coefficients) if c.term == "n_area")
    common = fits["common"].draws.params["beta"].reshape(-1, len(fits["common"].design.coefficients))[:, k]
    assert abs(np.mean(common) - slope) > abs(np.mean(within) - slope)   # one common slope mixes the two
