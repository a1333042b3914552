"""The invented demo scenario, simulated by leafcv's own FvCB code.

Scenario: a fictional upland field station where four coded species (SP-A .. SP-D) were measured in
three monthly campaigns, each leaf on its own day of the campaign's month. Each leaf has one A-Ci curve (12 points at PPFD 1500) and one A-Q curve
(12 points at Ci near 300), plus area-based nitrogen, chlorophyll and specific leaf area.

Generating structure, in the model's own parameterisation (the "traits-month-fixed" structure of
the demo comparison file, i.e. the one the baseline program also encodes):
  log Vcmax25 = log(GEN['vcmax25_ref']) + GEN['n_slope'] (N - N_CENTRE) + month effect + leaf effect
  logit alpha = logit(GEN['alpha_ref']) + GEN['chl_slope'] (chl - CHL_CENTRE)/10
                + GEN['sla_slope'] (SLA - SLA_CENTRE)/5 + leaf effect
  Jmax25 = GEN['jmax_ratio'] Vcmax25, Rd25 = GEN['rd_ratio'] Vcmax25, theta = GEN['theta'].
Traits are centred at fixed values stated in the comparison file (N_CENTRE, CHL_CENTRE, SLA_CENTRE)
so that the generating intercepts are the reference values the fit estimates.
Magnitudes follow REFERENCES.md (Wullschleger 1993; Walker et al. 2014; Long & Bernacchi 2003).

Tests: tests/test_comparisons_folder.py, tests/test_simulate.py, tests/test_design.py,
tests/sampling/test_fitting.py.
"""
from __future__ import annotations

import textwrap
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.special import expit, logit

from . import fvcb

N_CENTRE, CHL_CENTRE, SLA_CENTRE = 2.0, 45.0, 14.0
GEN = {
    "vcmax25_ref": 55.0, "n_slope": 0.35, "month_effects": (0.0, 0.15, -0.10), "leaf_sd_vcmax": 0.12,
    "alpha_ref": 0.30, "chl_slope": 0.15, "sla_slope": -0.10, "leaf_sd_alpha": 0.10,
    "jmax_ratio": 1.8, "rd_ratio": 0.015, "theta": 0.7, "sigma": 0.5,
}
SPECIES = ("SP-A", "SP-B", "SP-C", "SP-D")
MONTHS = ("2026-05", "2026-07", "2026-09")
MONTH_TEMPERATURE = (22.0, 28.0, 25.0)
#: First and last day of year of each campaign's month (2026: May, July, September).
MONTH_DAYS = ((121, 151), (182, 212), (244, 273))
#: Seed stream of the day-of-year column, apart from the main stream so no other value moves.
DOY_STREAM = 7
CI_STEPS = (50, 80, 120, 180, 250, 350, 500, 700, 900, 1100, 1300, 1500)
Q_STEPS = (0, 25, 50, 100, 200, 400, 600, 900, 1200, 1500, 1800, 2000)


@dataclass(frozen=True)
class DemoSize:
    leaves: int
    chains: int
    warmup: int
    draws: int


#: 4 chains x (500 warm-up + 1000 draws). With 500 draws per chain the worst R-hat of the demo's
#: structures landed at 1.011-1.015 (measured on the quick demo), so most fits were retried or graded
#: marginal; 1000 draws give room below 1.01.
SIZES = {"default": DemoSize(32, 4, 500, 1000), "quick": DemoSize(16, 4, 500, 1000)}


def simulate(n_leaves: int, seed: int = 20261202) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Simulate the scenario: (observations in the station's own column names, true leaf values)."""
    rng = np.random.default_rng(seed)
    species = np.array([SPECIES[i % len(SPECIES)] for i in range(n_leaves)])
    month_i = np.array([(i // len(SPECIES)) % len(MONTHS) for i in range(n_leaves)])
    sp_i = np.searchsorted(SPECIES, species)
    leaf_n = np.clip(rng.normal(1.4 + 0.4 * sp_i, 0.35), 0.6, 4.0)
    chl = np.clip(rng.normal(35 + 6 * sp_i, 7), 15, 80)
    sla = np.clip(rng.normal(20 - 3 * sp_i, 3), 4, 40)
    log_v = (np.log(GEN["vcmax25_ref"]) + GEN["n_slope"] * (leaf_n - N_CENTRE)
             + np.asarray(GEN["month_effects"])[month_i] + rng.normal(0, GEN["leaf_sd_vcmax"], n_leaves))
    logit_a = (logit(GEN["alpha_ref"]) + GEN["chl_slope"] * (chl - CHL_CENTRE) / 10
               + GEN["sla_slope"] * (sla - SLA_CENTRE) / 5 + rng.normal(0, GEN["leaf_sd_alpha"], n_leaves))
    days = np.random.default_rng([seed, DOY_STREAM])
    doy = np.array([days.integers(MONTH_DAYS[m][0], MONTH_DAYS[m][1] + 1) for m in month_i])
    truth = pd.DataFrame({
        "leaf": [f"L{i + 1:03d}" for i in range(n_leaves)], "species": species,
        "month": np.asarray(MONTHS)[month_i], "day_of_year": doy, "leaf_n": leaf_n, "chl": chl, "sla": sla,
        "vcmax25": np.exp(log_v), "alpha": expit(logit_a),
    })
    truth["jmax25"] = GEN["jmax_ratio"] * truth["vcmax25"]
    truth["rd25"] = GEN["rd_ratio"] * truth["vcmax25"]
    rows = []
    for i, t in truth.iterrows():
        t_leaf = MONTH_TEMPERATURE[month_i[i]] + rng.normal(0, 0.8)
        for kind, ci, q in (("aci", np.asarray(CI_STEPS, float), np.full(len(CI_STEPS), 1500.0)),
                            ("aq", 300 + rng.normal(0, 15, len(Q_STEPS)), np.asarray(Q_STEPS, float))):
            tl = t_leaf + rng.normal(0, 0.2, len(ci))
            a = fvcb.net_assimilation(ci, q, tl, t["vcmax25"], t["jmax25"], t["alpha"], GEN["theta"], t["rd25"])
            a = a + rng.normal(0, GEN["sigma"], len(ci))
            for k in range(len(ci)):
                rows.append({
                    "plant_leaf": t["leaf"], "run": f"{t['leaf']}-{kind}", "taxon": t["species"],
                    "campaign": t["month"], "day_of_year": int(t["day_of_year"]), "assim": round(float(a[k]), 3), "ci_ppm": round(float(ci[k]), 1),
                    "par_in": round(float(q[k]), 1), "tl_c": round(float(tl[k]), 2),
                    "n_area": round(float(t["leaf_n"]), 3), "chl_ug": round(float(t["chl"]), 2),
                    "sla_m2kg": round(float(t["sla"]), 2),
                })
    return pd.DataFrame(rows), truth


#: The default demo also asks whether leaves differ at all (the "pooled" baseline, one value shared by
#: all leaves); the quick demo leaves that baseline out and asks only the season and trait question.
QUESTION = ("do Vcmax25 and alpha need leaf effects, which traits shift them, and is the season better "
            "month as fixed levels, month as random levels or a smooth trend over the day of year?")
QUESTION_QUICK = ("which traits shift Vcmax25 and alpha, and is the season better month fixed, month random or a "
                  "smooth trend over the day of year?")
POOLED = """[[structure]]
name = "pooled"
jmax25 = { ratio_to = "vcmax25" }
rd25 = { ratio_to = "vcmax25" }

"""

def _comment_lines(text: str, width: int = 100) -> str:
    """`text` wrapped for the template's "# Question: " line, its continuation lines commented."""
    return "\n# ".join(textwrap.wrap(text, width - len("# Question: "), break_long_words=False))


COMPARISON_TEMPLATE = """\
# leafcv demo comparison: an invented field station, four coded species, three monthly campaigns.
# Question: {question}
# Read the answer in the ranking: the best structure first; a difference of less than about 4 nats,
# or within two standard errors, is not a clear preference.
# The data were simulated by `leafcv demo` from the structure "traits-month-fixed".

format = 1

[data]
file = "observations.csv"
[data.columns]
net_assimilation = "assim"
intercellular_co2 = "ci_ppm"
photon_flux = "par_in"
leaf_temperature = "tl_c"
leaf = "plant_leaf"
curve = "run"
[data.units]
intercellular_co2 = "umol/mol"
[data.leaf]
groups = ["taxon", "campaign"]
traits = ["n_area", "chl_ug", "sla_m2kg", "day_of_year"]
[data.leaf.centre]
n_area = {n_centre}
chl_ug = {chl_centre}
sla_m2kg = {sla_centre}
[data.leaf.scale]
chl_ug = 10
sla_m2kg = 5
day_of_year = 30

[sampler]
chains = {chains}
warmup = {warmup}
draws = {draws}
seed = 20261202
adapt_delta = 0.95

[cv]
by = "leaf"
method = "auto"
folds = 10

{pooled}[[structure]]
name = "leaf-vcmax-alpha"
vcmax25 = {{ random = ["leaf"] }}
alpha = {{ random = ["leaf"] }}
jmax25 = {{ ratio_to = "vcmax25" }}
rd25 = {{ ratio_to = "vcmax25" }}

[[structure]]
name = "traits-month-fixed"
vcmax25 = {{ fixed = ["n_area", "campaign"], random = ["leaf"] }}
alpha = {{ fixed = ["chl_ug", "sla_m2kg"], random = ["leaf"] }}
jmax25 = {{ ratio_to = "vcmax25" }}
rd25 = {{ ratio_to = "vcmax25" }}

[[structure]]
name = "traits-month-random"
vcmax25 = {{ fixed = ["n_area"], random = ["leaf", "campaign"] }}
alpha = {{ fixed = ["chl_ug", "sla_m2kg"], random = ["leaf"] }}
jmax25 = {{ ratio_to = "vcmax25" }}
rd25 = {{ ratio_to = "vcmax25" }}

# the season's third answer: a smooth trend of Vcmax25 over the day of year (a penalised spline)
[[structure]]
name = "traits-season-smooth"
vcmax25 = {{ fixed = ["n_area"], smooth = ["day_of_year"], random = ["leaf"] }}
alpha = {{ fixed = ["chl_ug", "sla_m2kg"], random = ["leaf"] }}
jmax25 = {{ ratio_to = "vcmax25" }}
rd25 = {{ ratio_to = "vcmax25" }}
"""


def write_demo(folder: Path, quick: bool = False, seed: int = 20261202, n_leaves: int | None = None) -> Path:
    """Write observations.csv, truth.csv and demo.toml into ``folder``; return the comparison file.
    ``n_leaves``: simulate this many leaves instead (benchmarks of how cost grows with leaves)."""
    size = SIZES["quick" if quick else "default"]
    if n_leaves is not None:
        size = replace(size, leaves=n_leaves)
    folder.mkdir(parents=True, exist_ok=True)
    obs, truth = simulate(size.leaves, seed)
    obs.to_csv(folder / "observations.csv", index=False)
    truth.to_csv(folder / "truth.csv", index=False)
    toml = COMPARISON_TEMPLATE.format(n_centre=N_CENTRE, chl_centre=CHL_CENTRE, sla_centre=SLA_CENTRE,
                                      chains=size.chains, warmup=size.warmup, draws=size.draws,
                                      question=_comment_lines(QUESTION_QUICK if quick else QUESTION),
                                      pooled="" if quick else POOLED)
    path = folder / "demo.toml"
    path.write_text(toml)
    return path
