"""Priors and model options of every structure in words, a methods text ready to paste, the
references, and what reproducing the run needs (versions, hashes, seeds, the command). How each parameter
varies is shown from the run's study record (`leafcv.runfolder.StudyRecord.parameter_lines`).

Tests: tests/report/test_report_page.py.
"""
from __future__ import annotations

from pathlib import Path

import pandas as pd

from ..manifest import file_hash
from ..ranking import FEW_LEAVES, RULE_WORDS, units_word
from .html import Column, Tables, esc
from .run import RunFolder
from .terms import OPTION_WORDS

REFERENCES = {
    "fvcb": "Farquhar GD, von Caemmerer S, Berry JA (1980) A biochemical model of photosynthetic CO2 assimilation "
            "in leaves of C3 species. Planta 149:78–90.",
    "bernacchi2001": "Bernacchi CJ, Singsaas EL, Pimentel C, Portis AR Jr, Long SP (2001) Improved temperature "
                     "response functions for models of Rubisco-limited photosynthesis. Plant, Cell & Environment "
                     "24:253–259.",
    "bernacchi2003": "Bernacchi CJ, Pimentel C, Long SP (2003) In vivo temperature response functions of parameters "
                     "required to model RuBP-limited photosynthesis. Plant, Cell & Environment 26:1419–1430.",
    "leuning2002": "Leuning R (2002) Temperature dependence of two parameters in a photosynthesis model. Plant, Cell "
                   "& Environment 25:1205–1210.",
    "vehtari2017": "Vehtari A, Gelman A, Gabry J (2017) Practical Bayesian model evaluation using leave-one-out "
                   "cross-validation and WAIC. Statistics and Computing 27:1413–1432.",
    "vehtari2024": "Vehtari A, Simpson D, Gelman A, Yao Y, Gabry J (2024) Pareto smoothed importance sampling. "
                   "Journal of Machine Learning Research 25(72):1–58.",
    "yao2018": "Yao Y, Vehtari A, Simpson D, Gelman A (2018) Using stacking to average Bayesian predictive "
               "distributions (with discussion). Bayesian Analysis 13:917–1007.",
    "sivula2020": "Sivula T, Magnusson M, Matamoros AA, Vehtari A (2020) Uncertainty in Bayesian leave-one-out "
                  "cross-validation based model comparison. arXiv:2008.10296.",
    "kallioinen2023": "Kallioinen N, Paananen T, Bürkner P-C, Vehtari A (2023) Detecting and diagnosing prior and "
                      "likelihood sensitivity with power-scaling. Statistics and Computing 34:57.",
    "nguyen2015": "Nguyen HV, Vreeken J (2015) Non-parametric Jensen-Shannon divergence. In: Machine Learning and "
                  "Knowledge Discovery in Databases (ECML PKDD 2015), 173–189.",
    "talts2018": "Talts S, Betancourt M, Simpson D, Vehtari A, Gelman A (2018) Validating Bayesian inference "
                 "algorithms with simulation-based calibration. arXiv:1804.06788.",
    "modrak2023": "Modrák M, Moon AH, Kim S, Bürkner P-C, Huurre N, Faltejsková K, Gelman A, Vehtari A (2023) "
                  "Simulation-based calibration checking for Bayesian computation: the choice of test quantities "
                  "shapes sensitivity. Bayesian Analysis.",
    "sailynoja2022": "Säilynoja T, Bürkner P-C, Vehtari A (2022) Graphical test for discrete uniformity and its "
                     "applications in goodness-of-fit evaluation and multiple sample comparison. Statistics and "
                     "Computing 32:32.",
    "okabe2008": "Okabe M, Ito K (2008) Color Universal Design (CUD): how to make figures and presentations that are "
                 "friendly to colorblind people. J*FLY, https://jfly.uni-koeln.de/color/ (palette of the figures).",
}


def options_words(model: dict, leaf_correlation: bool) -> str:
    parts = [OPTION_WORDS[k](v) for k, v in model.items() if k in OPTION_WORDS and k != "smooth_curvature"]
    if model.get("transition") == "smooth":
        parts.append(OPTION_WORDS["smooth_curvature"](model.get("smooth_curvature", 0.99)))
    parts.append("correlated leaf effects (LKJ prior)" if leaf_correlation else "independent leaf effects")
    return ", ".join(parts)


def priors_html(run: RunFolder, tables: Tables) -> str:
    lines = run.study.parameter_lines
    parts, rows = [], []
    for name, rec in run.manifest.get("structures", {}).items():
        origin = f" <span class=sub>[{esc(rec['origin'])}]</span>" if rec.get("origin") else ""
        parts.append(f"<h3>{esc(name)}{origin}</h3>")
        if lines.get(name):
            parts.append("<p>How each parameter varies:</p><ul>" + "".join(f"<li>{esc(x)}</li>" for x in lines[name])
                         + "</ul>")
        parts.append(f"<p>Model: {esc(options_words(rec.get('model', {}), bool(rec.get('leaf_correlation'))))}.</p>")
        parts.append("<p>Priors:</p><ul>" + "".join(f"<li>{esc(p)}</li>" for p in rec.get("priors", [])) + "</ul>")
        rows += [{"structure": name, "prior": p} for p in rec.get("priors", [])]
    if rows:
        tables.write("priors", pd.DataFrame(rows))
        parts.append('<p class="files">All priors also in tables/priors.csv.</p>')
    return "\n".join(parts)


def _shared_options(run: RunFolder) -> tuple[str, list[str]]:
    recs = run.manifest.get("structures", {})
    words = {n: options_words(r.get("model", {}), bool(r.get("leaf_correlation"))) for n, r in recs.items()}
    distinct = sorted(set(words.values()))
    if len(distinct) == 1:
        return distinct[0], []
    common = dict.fromkeys(distinct[0].split(", "))
    for w in distinct[1:]:
        common = {k: None for k in common if k in w.split(", ")}
    return ", ".join(common), [f"{n}: {w}" for n, w in words.items()]


def methods_html(run: RunFolder) -> str:
    """Methods paragraphs filled in from the manifest and results, then the references."""
    m = run.manifest
    settings = m.get("settings", {})
    sampler = settings.get("sampler", {})
    versions = m.get("versions", {})
    recs = m.get("structures", {})
    n_units = len(run.pointwise) if run.pointwise is not None else len(next(iter(run.results.values()), {}).get("leaves", []))
    units = units_word(run.unit)
    shared, per = _shared_options(run)
    peaked = any(r.get("model", {}).get("peaked") for r in recs.values())
    tpu = any(r.get("model", {}).get("tpu") for r in recs.values())
    method = settings.get("method", "auto")
    refits = sum(int(r.get("n_refits") or 0) for r in run.results.values())
    p1 = ("<p><b>Model.</b> Net CO2 assimilation (A) was modelled with the C3 photosynthesis model of Farquhar, "
          "von Caemmerer & Berry (1980): A = min(W<sub>c</sub>, W<sub>j</sub>"
          + (", W<sub>p</sub>" if tpu else "") + ") − R<sub>d</sub>, with the electron transport rate J the "
          "smaller root of θJ² − (αQ + J<sub>max</sub>)J + αQJ<sub>max</sub> = 0. K<sub>c</sub>, K<sub>o</sub>, "
          "Γ* and their temperature responses, and the activation energies of V<sub>cmax</sub> and R<sub>d</sub>, "
          "are those of Bernacchi et al. (2001); that of J<sub>max</sub> is from Bernacchi et al. (2003); "
          "parameters were scaled from 25 °C to leaf temperature by a normalised Arrhenius function"
          + (" (peaked, with deactivation terms of Leuning 2002, where stated)" if peaked else "") + ". "
          f"Each leaf's V<sub>cmax25</sub>, J<sub>max25</sub>, α, θ and R<sub>d25</sub> had a log link (rates, "
          "or ratios to V<sub>cmax25</sub>) or a logit link (α, θ) with a linear predictor of an intercept and, "
          f"depending on the structure, trait slopes, factor levels and random effects; {len(recs)} candidate "
          f"structures were compared (each structure's terms and priors are listed with this report, "
          f"tables/priors.csv). Model options: {esc(shared)}."
          + (" Options that differ: " + esc("; ".join(per)) + "." if per else "")
          + " Priors were weakly informative and are stated on the scale of each parameter. Each structure "
          f"was fitted in Stan through {_engine_words(m, versions)} with {sampler.get('chains', '?')} chains of "
          f"{sampler.get('warmup', '?')} warm-up and {sampler.get('draws', '?')} draws (adapt_delta "
          f"{sampler.get('adapt_delta', '?')}, maximum tree depth {sampler.get('max_treedepth', '?')}); fits "
          "short of the convergence thresholds were rerun with settings aimed at the cause (more draws, a "
          "higher adapt_delta), and every fit's diagnostics are reported.</p>")
    how = {
        "auto": ("From one fit to all data per structure, each leaf's leave-one-out elpd was estimated by Pareto "
                 "smoothed importance sampling (PSIS) of these integrated leaf likelihoods (Vehtari, Gelman & Gabry "
                 "2017; Vehtari et al. 2024). Leaves whose Pareto k̂ exceeded min(1 − 1/log<sub>10</sub> S, 0.7) "
                 f"were refitted without the leaf, and {settings.get('spot_checks', 'a few')} leaves per structure, "
                 "chosen at random with a fixed seed, were refitted as a check of the approximation "
                 f"({refits} refits in all)."),
        "exact": f"Every held-out unit was scored from a refit without it ({refits} refits in all).",
        "kfold": f"Units were split into {settings.get('folds', '?')} seeded folds and each fold scored from a refit "
                 "without it.",
    }.get(method, "")
    p2 = (f"<p><b>Scoring held-out {units}.</b> Each structure was scored by how well it predicts a new leaf: the "
          "log predictive density of each held-out unit's points jointly, with the unit's own random effects "
          "integrated over their population distribution by adaptive Gauss–Hermite quadrature (a quasi-Monte "
          "Carlo rule for more than three effects), placed at the unit's conditional posterior mode at every draw "
          "(found from several starts), averaged over posterior draws. Each cell (unit, draw) was checked by two "
          "rules placed either side of the mode, so that a kink of the hard minimum meets their nodes "
          "differently; cells whose rules disagreed were re-placed, moved to finer and wider rules and, if still "
          "unsettled, integrated by brute force (a tensor trapezoid on sinh-stretched axes reaching 14 population "
          "SDs beyond the mode and the population mean). A few draws of every unit were also integrated by brute "
          "force, to catch mass the rules miss (a second mode, a shoulder beyond the grid); a unit where they "
          "did was integrated by brute force throughout. A unit's quadrature bound is the draw-weighted sum of "
          "its cells' rule gaps (plus 0.003 nats for a cell whose rules differ beyond rounding), checked to cover "
          "the true error on a battery of known answers (closed forms, the kink, flat and two-mode likelihoods). "
          "A held-out species or month was integrated jointly, its shared effect by the same rules around the "
          "mode of the outer integrand, found by Newton steps from zero until they settle. "
          f"{how} Structures were ranked by the total elpd over the {n_units} {units}; the SE of "
          "the total and of the paired difference between two structures were computed from the per-unit values, "
          "SE = (G·var)<sup>1/2</sup> (Vehtari, Gelman & Gabry 2017), and the Monte Carlo SE of each total was "
          "computed from the chains. Stacking weights (Yao et al. 2018) are reported as the weights of the best "
          "predictive mix, not as model probabilities. Structures whose fits failed their diagnostics, or that "
          "could not be scored reliably, are listed without a rank.</p>")
    p3 = (f"<p><b>Uncertainty and caveats.</b> One decision rule serves the ranking and this report alike. "
          f"{esc(RULE_WORDS)} Such structures are not taken as preferred over one another; a structure that could "
          "not be ranked but scored higher than the best ranked one is named first, and the leader is then only "
          "the best among the reliably scored structures. The SE of a "
          "difference rests on a normal approximation that is rough with few units"
          + (f" (here {n_units} {units}, fewer than {FEW_LEAVES})" if n_units < FEW_LEAVES else "")
          + " and can be too small when two structures predict almost alike (Sivula et al. 2020). Monte Carlo "
          "errors and quadrature bounds are reported per structure and per unit in the diagnostics.</p>")
    refs = ["fvcb", "bernacchi2001", "bernacchi2003", *(["leuning2002"] if peaked else []), "vehtari2017",
            "vehtari2024", "yao2018", "sivula2020", "okabe2008"]
    return ('<div class="methods">' + p1 + p2 + p3 + "</div><h3>References</h3><ol>"
            + "".join(f"<li>{esc(REFERENCES[k])}</li>" for k in refs) + "</ol>")


def _engine_words(manifest: dict, versions: dict) -> str:
    """The engine that sampled, in words (runs written before engines could be chosen used PyStan)."""
    engine = manifest.get("engine") or {}
    if engine.get("name") == "cmdstan":
        return f"{esc(engine.get('version') or 'CmdStan')} (cmdstanpy {esc(versions.get('cmdstanpy', '?'))})"
    return f"PyStan {esc(versions.get('pystan', '?'))} (httpstan {esc(versions.get('httpstan', '?'))})"


def reproduction_html(run: RunFolder, tables: Tables) -> str:
    """Versions, inputs and their hashes, seeds, settings and the command, and hashes of the run's files."""
    m = run.manifest
    rows = [("command", m.get("command", "")), ("started", m.get("started", "")),
            ("finished", m.get("finished", "not finished")),
            ("comparison file", m.get("comparison", "")), ("comparison SHA-256", m.get("comparison_sha256", "")),
            ("data file", m.get("data", "")), ("data SHA-256", m.get("data_sha256", ""))]
    engine = m.get("engine") or {}
    if engine:
        rows.append(("engine", f"{engine.get('name', '')} ({engine.get('version', '')})"))
    rows += [(f"version: {k}", v) for k, v in m.get("versions", {}).items()]
    rows += [(f"seed: {k}", v) for k, v in m.get("seeds", {}).items()]
    settings = dict(m.get("settings", {}))
    sampler = settings.pop("sampler", {})
    rows += [(f"setting: {k}", v) for k, v in settings.items()]
    rows += [(f"sampler: {k}", v) for k, v in sampler.items()]
    paths = run.paths
    for folder in (paths.results, paths.fits):
        for path in sorted(folder.glob("*")) if folder.is_dir() else []:
            if path.is_file() and not path.name.startswith("."):
                rows.append((f"SHA-256 of {folder.name}/{path.name}", file_hash(path)))
    for path in (paths.ranking, paths.pointwise, paths.structures_text):
        if path.exists():
            rows.append((f"SHA-256 of {path.name}", file_hash(path)))
    table = pd.DataFrame(rows, columns=["item", "value"]).astype(str)
    comparison = Path(m.get("comparison", "comparison.toml"))
    again = (f"leafcv compare {comparison} --out {run.path} --method {settings.get('method', 'auto')}"
             + (f" --engine {engine['name']}" if engine.get("name", "pystan") != "pystan" else ""))
    return ("<p>The same inputs, versions and seeds give the same numbers. The run was started by the command "
            f"below (as recorded); from the command line the equivalent is <code>{esc(again)}</code>, which "
            "reuses every finished result whose inputs match.</p>"
            + tables.render("reproduction", table, [Column("item", "item"), Column("value", "value")],
                            "Versions, inputs, seeds, settings and file hashes."))
