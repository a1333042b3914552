"""Section "How reliable is this choice?": the chosen structure's prior sensitivity (power-scaling,
`leafcv.sensitivity`), the simulation-based calibration status of the generic program (read from
docs/validation.md, written by bench/sbc.py), and what the run does not tell (selection reliability by
simulated replicate studies) with the cost of one replicate from the run's own task times
(tasks/journal.jsonl), or what `leafcv simulate` found (`leafcv.report.simulation`). No sampler runs."""
from __future__ import annotations

import json
import re
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from ..errors import UserInputError
from ..runfolder import RunPaths
from .html import Column, Tables, esc
from .run import RunFolder

#: Where bench/sbc.py writes its summary, in a source checkout (src/leafcv/report -> repository root).
VALIDATION_DOC = Path(__file__).resolve().parents[3] / "docs" / "validation.md"
#: Header of the pass/fail table in docs/validation.md (written by bench/sbc.py, read here).
VALIDATION_HEADER = "| structure | quantity | replicates | ranks inside the 99 % band | result |"
SBC_COMMAND = "python3 bench/sbc.py"


@dataclass
class Validation:
    """What docs/validation.md states: date, leafcv version (and commit), replicates, one row per
    (structure, quantity) with pass/fail."""

    date: str = ""
    version: str = ""
    settings: str = ""
    replicates: str = ""
    rows: list[dict] = field(default_factory=list)


def read_validation(path: Path = VALIDATION_DOC) -> Validation | None:
    """docs/validation.md as written by bench/sbc.py, or None when it is not there."""
    if not path.is_file():
        return None
    text = path.read_text(encoding="utf-8")
    out = Validation()
    keys = {"Date": "date", "leafcv version": "version", "Settings": "settings", "Replicates": "replicates"}
    for line in text.splitlines():
        m = re.match(r"^- ([^:]+): (.*)$", line.strip())
        if m and m.group(1) in keys and not getattr(out, keys[m.group(1)]):
            setattr(out, keys[m.group(1)], m.group(2).strip())
    lines = text.splitlines()
    if VALIDATION_HEADER in lines:
        for line in lines[lines.index(VALIDATION_HEADER) + 2:]:
            if not line.startswith("|"):
                break
            cells = [c.strip() for c in line.strip().strip("|").split("|")]
            if len(cells) == 5:
                out.rows.append(dict(zip(("structure", "quantity", "replicates", "inside", "result"), cells)))
    return out


def replicate_cost(rundir: Path) -> dict | None:
    """Seconds summed over the run's finished tasks (the last finish of each task, its own timing), how
    many tasks, the wall time from the first start to the last finish and the workers of the last run;
    None without a journal."""
    path = RunPaths(rundir).journal
    if not path.is_file():
        return None
    events = []
    for line in path.read_text().splitlines():
        try:
            events.append(json.loads(line))
        except ValueError:
            continue
    starts, done, workers = {}, {}, None
    for e in events:
        if e.get("event") == "run":
            workers = e.get("workers", workers)
        elif e.get("event") == "start" and "key" in e:
            starts.setdefault(e["key"], pd.Timestamp(e["time"]))
        elif e.get("event") == "done" and "key" in e:
            done[e["key"]] = e
    if not done:
        return None
    seconds = 0.0
    for key, e in done.items():
        s = e.get("seconds")
        if s is None and key in starts:
            s = (pd.Timestamp(e["time"]) - starts[key]).total_seconds()
        seconds += float(s or 0.0)
    first = min(starts.values()) if starts else None
    last = max(pd.Timestamp(e["time"]) for e in done.values())
    wall = (last - first).total_seconds() if first is not None else float("nan")
    return {"seconds": seconds, "tasks": len(done), "wall": wall, "workers": workers}


def _duration(seconds: float) -> str:
    if seconds != seconds:
        return "unknown"
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.1f} h"


def sensitivity_html(run: RunFolder, tables: Tables, chosen: str | None, why: str) -> str:
    from ..sensitivity import CONFLICT, DELTA, KHAT_LIMIT, NONE, THRESHOLD, WEAK, run_sensitivity, sentence

    if chosen is None:
        return "<p>No structure is ranked and none was chosen: no prior sensitivity.</p>"
    if not run.paths.fit(chosen).exists():
        return f"<p>{esc(chosen)} ({why}) has no saved fit (fits/{esc(chosen)}.nc): no prior sensitivity.</p>"
    try:
        table = run_sensitivity(run.path, chosen)
    except UserInputError as exc:
        return f"<p>The prior sensitivity of {esc(chosen)} could not be computed: {esc('; '.join(exc.problems))}</p>"
    parts = [f"<p>Prior sensitivity of {esc(chosen)} ({why}) by power-scaling (Kallioinen et al. 2023): the prior "
             "of the population quantities (intercepts, coefficients, SDs of group and leaf effects, residual SDs"
             + (", degrees of freedom" if "Student-t degrees of freedom" in set(table["quantity"]) else "")
             + ") and, separately, the likelihood of all points were raised to powers slightly above and below 1 "
             f"(2<sup>±{DELTA:g}</sup>), by Pareto-smoothed importance weights on the saved draws, without refitting. "
             "Each number is how fast that quantity's posterior moves (cumulative Jensen–Shannon distance per unit "
             f"of log<sub>2</sub> of the power); {THRESHOLD:g} or more is flagged (the paper's threshold). The "
             "distributions of the leaf and level effects given their SDs are part of the model, not of the "
             "prior, and were not scaled. Sensitivity to the likelihood alone is what data-informed estimates "
             "should show; it matters together with sensitivity to the prior: both at once suggest the prior "
             "and the data disagree, the prior alone that the data say little.</p>"]
    parts.append(tables.render("prior_sensitivity", table, [
        Column("quantity", "quantity"), Column("prior", "prior", ".3f"), Column("likelihood", "likelihood", ".3f"),
        Column("diagnosis", "diagnosis"), Column("prior_khat", "k̂ (prior)", ".2f"),
        Column("likelihood_khat", "k̂ (likelihood)", ".2f")],
        "Power-scaling sensitivity of each population quantity to the prior and to the likelihood."))
    flagged = table[table["diagnosis"] != NONE]
    if flagged.empty:
        parts.append(f"<p class=box>No population quantity of {esc(chosen)} is sensitive to its prior by this "
                     "check: none of its estimates is driven by the prior rather than the data.</p>")
    else:
        kinds = {CONFLICT: "possible prior–data conflict", WEAK: "the prior dominates"}
        parts.append("<div class=warn><p>" + f"{len(flagged)} of {len(table)} quantities are sensitive to the prior ("
                     + ", ".join(f"{(flagged['diagnosis'] == k).sum()} {w}" for k, w in kinds.items()
                                 if (flagged["diagnosis"] == k).any())
                     + "):</p><ul>" + "".join(f"<li>{esc(sentence(r))}</li>" for _, r in flagged.iterrows())
                     + "</ul></div>")
    k = float(max(table["prior_khat"].max(), table["likelihood_khat"].max()))
    if k > KHAT_LIMIT:
        parts.append(f"<p class=warn>The importance weights have Pareto k̂ up to {k:.2f} (above {KHAT_LIMIT:g}): "
                     "these sensitivities are unreliable; more draws would be needed.</p>")
    return "\n".join(parts)


def sbc_html(run: RunFolder, validation: Validation | None) -> str:
    head = ("<p>Simulation-based calibration (Talts et al. 2018; Modrák et al. 2023) checks the generic Stan "
            "program and its sampler: parameters drawn from the prior, data simulated from them, the model "
            "fitted, and the rank of each true value among the posterior draws recorded; the ranks are uniform "
            "when program and sampler are right. The joint log-likelihood is checked too, which catches a "
            "wrong or missing likelihood term that per-parameter ranks miss.</p>")
    if validation is None or not validation.rows:
        return head + ("<p class=warn>Not yet run for this installation: docs/validation.md is not there. In a "
                       f"leafcv source folder, <code>{esc(SBC_COMMAND)}</code> runs it and writes that file.</p>")
    failed = [r for r in validation.rows if r["result"].lower() != "pass"]
    run_version = run.manifest.get("versions", {}).get("leafcv", "")
    version_note = ""
    if run_version and not validation.version.startswith(run_version):
        version_note = (f" It was run with leafcv {esc(validation.version)}; this run used leafcv "
                        f"{esc(run_version)}.")
    verdict = (f"<p class=box>All {len(validation.rows)} checked quantities passed." if not failed else
               f"<p class=warn>{len(failed)} of {len(validation.rows)} checked quantities FAILED: "
               + ", ".join(f"{esc(r['quantity'])} ({esc(r['structure'])})" for r in failed) + ". Each check "
               f"alone fails 1 % of the time for a correct program: among {len(validation.rows)} checks at least "
               f"one such false failure has probability {1 - 0.99 ** len(validation.rows):.0%}; see "
               "docs/validation.md for what was found.")
    rows = "".join(f"<tr><td>{esc(r['structure'])}</td><td>{esc(r['quantity'])}</td>"
                   f"<td class=n>{esc(r['replicates'])}</td><td>{esc(r['inside'])}</td><td>{esc(r['result'])}</td></tr>"
                   for r in validation.rows)
    return (head + verdict + version_note + "</p>"
            + f"<p>From docs/validation.md: {esc(validation.date)}, leafcv {esc(validation.version)}; "
              f"{esc(validation.replicates)}; {esc(validation.settings)}.</p>"
            + '<div class="wide"><table><caption>Simulation-based calibration of the generic program '
              "(docs/validation.md): pass when each quantity's rank ECDF stays inside its 99 % simultaneous "
              "band.</caption><thead><tr><th>structure</th><th>quantity</th><th>replicates</th>"
              f"<th>ranks inside the band</th><th>result</th></tr></thead><tbody>{rows}</tbody></table></div>")


def selection_html(run: RunFolder, tables: Tables) -> str:
    from .simulation import simulation_html

    found = simulation_html(run.path, tables, run.paths.figures)
    if found is not None:
        return found
    parts = ["<p>How often this comparison would pick the same structure in a new study of the same design has "
             "not been estimated for this run: that needs replicate studies simulated from the fitted structures, "
             "each compared like this one. The ranking above says which structure predicted these leaves best and "
             "by how much, not how often a study like this one gets that answer. "
             f"<code>leafcv simulate {esc(run.path)}</code> estimates it (20 replicate studies by default, drawn "
             "from the best ranked structure; <code>--chains</code>, <code>--warmup</code> and "
             "<code>--draws</code> lower their sampler settings, <code>--leaves-per-level</code> asks how many "
             "leaves per level would settle the choice); then <code>leafcv report</code> shows it here.</p>"]
    cost = replicate_cost(run.path)
    if cost is None:
        parts.append("<p>The run folder has no task journal (tasks/journal.jsonl), so the cost of one replicate "
                     "comparison is unknown.</p>")
    else:
        workers = f" with {cost['workers']} worker(s)" if cost["workers"] else ""
        parts.append(f"<p>Cost of one replicate comparison, from this run's own task times "
                     f"(tasks/journal.jsonl): its {cost['tasks']} tasks took {_duration(cost['seconds'])} summed "
                     f"(each task's own time: fits, scoring, refits), and {_duration(cost['wall'])} from the first "
                     f"task's start to the last one's finish{esc(workers)}. 20 replicates at the run's settings cost "
                     f"about 20 times that ({_duration(20 * cost['wall'])} of wall time on the same workers); fewer "
                     "draws cost proportionally less.</p>")
    return "\n".join(parts)


#: References of this section (keys of report.methods.REFERENCES).
SECTION_REFERENCES = ("kallioinen2023", "nguyen2015", "vehtari2024", "talts2018", "modrak2023", "sailynoja2022")


def reliability_html(run: RunFolder, tables: Tables, structure: str | None) -> str:
    from .methods import REFERENCES

    chosen = structure or run.best
    why = "chosen with --structure" if structure else "the best ranked structure"
    return "\n".join([
        "<h3>How reliable is this choice on a study like this one?</h3>", selection_html(run, tables),
        "<h3>Calibration of the program (simulation-based calibration)</h3>", sbc_html(run, read_validation()),
        "<h3>Prior sensitivity of the chosen structure</h3>", sensitivity_html(run, tables, chosen, why),
        "<p class=files>References of this section:</p><ol class=files>"
        + "".join(f"<li>{esc(REFERENCES[k])}</li>" for k in SECTION_REFERENCES) + "</ol>",
    ])
