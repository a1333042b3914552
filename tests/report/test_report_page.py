"""report.html of an invented run folder, written with every engine disabled: sections in order, a page
that needs nothing outside itself, numbers equal to ranking.csv and the tables after rounding to the
digits shown, the decision's sentences, unfinished runs, options and the command line."""
from __future__ import annotations

import base64
import io
import json
import re
from decimal import Decimal

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from leafcv.errors import UserInputError
from leafcv.report import write_report
from leafcv.runfolder import RunPaths

from .conftest import page_tables
from .fake_run import CAMPAIGN, LEAVES, QUESTION, TAXON

pytestmark = pytest.mark.filterwarnings("ignore:The inplace keyword")

SECTIONS = ["decision", "ranking", "leaves", "predictions", "estimates", "reliability", "diagnostics", "priors", "methods", "reproduction"]


def shown_equals(cell: str, value: float) -> bool:
    """Whether the text of a cell is ``value`` rounded to the digits the cell shows (a dash for NaN)."""
    if cell == "–":
        return bool(np.isnan(value))
    text = cell.replace("−", "-").replace("+", "")
    digits = Decimal(text)
    quantum = Decimal(1).scaleb(digits.as_tuple().exponent)        # 0.1 for "−233.5", 1 for "3", 10 for "1.2e+03"
    return abs(Decimal(repr(float(value))) - digits) <= quantum / 2 + Decimal("1e-12")


def test_shown_equals_is_strict_enough():
    assert shown_equals("−233.5", -233.54) and not shown_equals("−233.5", -233.56)
    assert shown_equals("0.00", 5.4e-14) and shown_equals("3", 2.9997) and not shown_equals("3", 3.6)
    assert shown_equals("–", float("nan")) and not shown_equals("–", 1.0)


def test_every_section_in_order_and_every_file_written(written):
    run, path, html = written
    assert path == run / "report.html"
    positions = [html.index(f'<section id="{s}">') for s in SECTIONS]
    assert positions == sorted(positions)
    figures = ("ranking", "leaves", "predicted_observed", "predictive_curves", "khat")
    for name in figures:
        for ext in ("png", "svg", "csv"):
            assert (run / "figures" / f"{name}.{ext}").stat().st_size > 0
    for name in ("ranking", "contrasts", "leaves_by_group", "prediction_scores", "population_estimates",
                 "leaf_estimates", "scoring_fits",
                 "scoring_accuracy", "fits", "spot_checks", "priors", "reproduction"):
        assert (run / "tables" / f"{name}.csv").exists(), name
    assert html.count("<figure") == len(figures)


def test_page_needs_nothing_outside_itself(written):
    _, _, html = written
    assert "<script" not in html.lower()
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:|//|file:)""", html, re.IGNORECASE)
    assert "<link" not in html.lower()
    sources = re.findall(r'<img src="([^"]+)"', html)
    assert len(sources) == 5                 # ranking, leaves, predicted-observed, curves, k-hat
    for src in sources:
        assert src.startswith("data:image/png;base64,")
        image = Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1])))
        image.verify()                                          # a PNG that decodes
        assert image.size[0] >= 1200                            # 6.7 in at 200 dpi: sharp at A4 width


def test_every_table_on_the_page_equals_its_csv_after_rounding(written):
    run, _, html = written
    tables = page_tables(html)
    assert set(tables) >= {"tables/ranking.csv", "tables/contrasts.csv", "tables/population_estimates.csv",
                           "tables/leaf_estimates.csv", "tables/fits.csv"}
    for name, rows in tables.items():
        csv = pd.read_csv(run / name, dtype=str, keep_default_na=False)       # every cell as written
        assert len(rows) == len(csv), name
        for row, (_, expected) in zip(rows, csv.iterrows()):
            for col, cell in row.items():
                value = expected[col]
                if value == "":                                    # NaN or an empty text
                    assert cell in ("", "–"), (name, col, cell)
                elif re.fullmatch(r"[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?|nan|inf|-inf", value):
                    assert shown_equals(cell, float(value)), (name, col, cell, value)
                else:
                    assert cell == value, (name, col, cell, value)


def test_ranking_on_the_page_is_ranking_csv(written):
    run, _, html = written
    rows = page_tables(html)["tables/ranking.csv"]
    ranking = pd.read_csv(run / "ranking.csv")
    assert [r["structure"] for r in rows] == list(ranking["structure"])
    for row, (_, r) in zip(rows, ranking.iterrows()):
        for col in ("elpd", "se", "elpd_diff", "se_diff"):
            assert len(row[col].split(".")[1]) == 1                       # shown to 0.1 nats
            assert shown_equals(row[col], r[col])
        assert shown_equals(row["weight"], r["weight"])
        assert row["rank"] == ("–" if pd.isna(r["rank"]) else str(int(r["rank"])))


def test_the_decision_names_best_close_structures_weights_and_the_question(written):
    run, _, html = written
    ranking = pd.read_csv(run / "ranking.csv")
    decision = html[html.index('<section id="decision">'):html.index('<section id="ranking">')]
    # the failed traits-month-fixed-t scores higher, so the leader is only the best among the reliably scored
    assert "traits-month-fixed is the best among the reliably scored structures</b>" in decision
    assert "The best structure is" not in decision
    close = ranking.set_index("structure").loc["traits-month-random"]
    diff = f"{close['elpd_diff']:.1f}".replace("-", "−")
    assert (f"Not told apart from it (leafcv's decision rule, see Methods): traits-month-random "
            f"(Δelpd {diff} ± {close['se_diff']:.1f}: smaller than 4 nats") in decision
    assert "leaf-vcmax (Δelpd" not in decision                         # 20 nats behind: told apart
    assert "are <b>not</b> posterior probabilities that a structure is true" in decision
    assert f"<i>{QUESTION}</i>" in decision                            # two comment lines, cut at the "?"


def test_a_failed_structure_that_scores_higher_is_announced_before_the_best(written):
    run, _, html = written
    ranking = pd.read_csv(run / "ranking.csv")
    d = ranking.set_index("structure").loc["traits-month-fixed-t", "elpd_diff"]
    sentence = (f"traits-month-fixed-t&#x27;s fits did not pass their diagnostics; its score, {d:.1f} nats higher, "
                "would make it the best; see Diagnostics.")
    announced = html.index(f"<b>Announced first:</b> {sentence}")
    assert announced < html.index("is the best among the reliably scored structures</b>")
    assert html.index('<div class="box">') < announced                 # in the decision box
    assert "traits-month-fixed-t (fits did not converge)" in html
    # ranking.txt (the terminal's summary) names it in the same words
    assert sentence.replace("&#x27;", "'") in (run / "ranking.txt").read_text()


def test_contrasts_are_the_one_term_pairs_with_paired_differences(written):
    run, _, _ = written
    contrasts = pd.read_csv(run / "tables" / "contrasts.csv")
    pointwise = pd.read_csv(run / "pointwise.csv")
    ranking = pd.read_csv(run / "ranking.csv").set_index("structure")
    assert set(zip(contrasts["first"], contrasts["second"])) == {("traits-month-fixed", "traits-month-random"),
                                                                 ("leaf-vcmax", "pooled")}
    for _, c in contrasts.iterrows():
        d = pointwise[f"elpd:{c['first']}"] - pointwise[f"elpd:{c['second']}"]
        assert c["elpd_diff"] == pytest.approx(d.sum())
        # paired SE over leaves, sqrt(G var(d, ddof=1)) (Vehtari, Gelman & Gabry 2017, sec. 5.2)
        assert c["se_diff"] == pytest.approx(np.sqrt(len(d) * d.var(ddof=1)))
    first = contrasts[contrasts["first"] == "traits-month-fixed"].iloc[0]
    assert first["elpd_diff"] == pytest.approx(-ranking.loc["traits-month-random", "elpd_diff"])
    assert first["se_diff"] == pytest.approx(ranking.loc["traits-month-random", "se_diff"])
    assert first["told_apart"] == "no" and "campaign" in first["difference"]
    other = contrasts[contrasts["first"] == "leaf-vcmax"].iloc[0]
    assert other["told_apart"] == "yes" and other["difference"] == "leaf-vcmax adds leaf effects on vcmax25"


def test_diagnostics_list_every_fit_of_every_structure(written):
    run, _, html = written
    fits = pd.read_csv(run / "tables" / "fits.csv", keep_default_na=False)
    for name in [p.stem for p in (run / "results").glob("*.json")]:
        stored = json.loads((run / "results" / f"{name}.json").read_text())["details"]["fits"]
        mine = fits[fits["structure"] == name]
        assert list(mine["role"]) == [f["role"] for f in stored]
        assert list(mine["seed"]) == [f["seed"] for f in stored]
        assert list(mine["used"]) == ["retried", "yes", "yes", "spot check"]
    assert "attempt 1 marginal (R-hat 1.080 &gt; 1.05); mixing" in html     # the retry's cause
    accuracy = pd.read_csv(run / "tables" / "scoring_accuracy.csv").set_index("structure")
    result = json.loads((run / "results" / "pooled.json").read_text())
    assert accuracy.loc["pooled", "max_quad_bound"] == pytest.approx(max(result["quad_bound_i"]))
    assert accuracy.loc["pooled", "max_mcse_i"] == pytest.approx(max(result["mcse_i"]))


def test_methods_text_cites_its_sources_and_reproduction_lists_hashes(written):
    run, _, html = written
    methods = html[html.index('<section id="methods">'):html.index('<section id="reproduction">')]
    for ref in ("Farquhar GD, von Caemmerer S, Berry JA (1980)", "Bernacchi CJ, Singsaas EL", "Vehtari A, Gelman A, "
                "Gabry J (2017)", "Pareto smoothed importance sampling. Journal of Machine Learning Research 25(72)",
                "Yao Y, Vehtari A, Simpson D, Gelman A (2018)", "Sivula T, Magnusson M"):
        assert ref in methods
    assert "here 12 leaves, fewer than 100" in methods
    repro = pd.read_csv(run / "tables" / "reproduction.csv").set_index("item")["value"]
    manifest = json.loads((run / "manifest.json").read_text())
    assert repro["data SHA-256"] == manifest["data_sha256"]
    assert repro["command"] == manifest["command"]
    assert len(repro["SHA-256 of results/pooled.json"]) == 64
    priors = html[html.index('<section id="priors">'):html.index('<section id="methods">')]
    assert "vcmax25 slope on n_area (per 0.5 units, centred at 2)" in priors
    assert "Student-t likelihood" in priors                             # traits-month-fixed-t's option


def test_an_unfinished_run_names_the_structures_it_lacks(fresh_run, no_engine, capsys):
    manifest = json.loads((fresh_run / "manifest.json").read_text())
    del manifest["finished"], manifest["results"]
    (fresh_run / "manifest.json").write_text(json.dumps(manifest))
    for name in ("pooled", "traits-month-random"):
        (fresh_run / "results" / f"{name}.json").unlink()
    html = write_report(fresh_run).read_text()
    assert "<b>Unfinished run.</b>" in html
    assert "structures without a result: pooled, traits-month-random." in html
    assert "it lists pooled, traits-month-random, which have no result" in html     # ranking.csv is older
    assert "3 of 5 structures scored; NOT FINISHED" in html
    from leafcv.cli import main

    assert main(["report", str(fresh_run)]) == 0            # the ranking is left alone, the page is written
    assert "the run has not finished; its ranking is not rewritten" in capsys.readouterr().out


def test_options_choose_the_structure_and_the_group(fresh_run, no_engine):
    html = write_report(fresh_run, structure="traits-month-random", group="campaign").read_text()
    assert "What traits-month-random estimates" in html and "has no saved fit" in html
    leaves = pd.read_csv(fresh_run / "figures" / "leaves.csv")
    assert set(leaves["group"]) == {"2026-05", "2026-06"}
    with pytest.raises(UserInputError, match="valid: taxon, campaign"):
        write_report(fresh_run, group="site")
    with pytest.raises(UserInputError, match="no structure 'nope'"):
        write_report(fresh_run, structure="nope")


def test_tables_and_figures_of_an_earlier_report_do_not_stay(fresh_run, no_engine):
    write_report(fresh_run)
    assert (fresh_run / "tables" / "population_estimates.csv").exists()
    (fresh_run / "figures" / "old-figure.png").write_bytes(b"left by an earlier version")
    write_report(fresh_run, structure="traits-month-random")         # it has no saved fit
    assert not (fresh_run / "tables" / "population_estimates.csv").exists()
    assert not (fresh_run / "tables" / "leaf_estimates.csv").exists()
    assert not (fresh_run / "figures" / "old-figure.png").exists()
    assert (fresh_run / "tables" / "ranking.csv").exists() and (fresh_run / "figures" / "khat.svg").exists()


def test_groups_of_a_changed_data_file_are_not_used(fresh_run, no_engine):
    data = fresh_run.parent.parent / "observations.csv"
    data.write_text(data.read_text().replace("SP-A", "SP-Z"))
    # with study.json the groups are the run's own, whatever became of the data file since
    write_report(fresh_run)
    assert set(pd.read_csv(fresh_run / "figures" / "leaves.csv")["group"]) == {"SP-A", "SP-B", "SP-C"}
    # a folder of an earlier leafcv (no study.json) reads them from the data file, only while it is unchanged
    RunPaths(fresh_run).study.unlink()
    html = write_report(fresh_run).read_text()
    assert "has changed since the run" in html
    assert set(pd.read_csv(fresh_run / "figures" / "leaves.csv")["group"]) == {"all"}


#: The prior sensitivity's paragraph when it cannot be computed (it needs the comparison and the data: it
#: weighs the saved draws by the likelihood of the points).
NO_SENSITIVITY = re.compile(r"<p>The prior sensitivity of [^<]* could not be computed: [^<]*</p>")


def _report_files(run) -> dict[str, bytes]:
    return {f"{d}/{p.name}": p.read_bytes() for d in ("tables", "figures") for p in sorted((run / d).glob("*.csv"))}


def test_the_report_needs_neither_the_comparison_file_nor_the_data(fresh_run, no_engine):
    html = write_report(fresh_run).read_text()
    files = _report_files(fresh_run)
    (fresh_run.parent.parent / "demo.toml").unlink()
    (fresh_run.parent.parent / "observations.csv").unlink()
    again = write_report(fresh_run).read_text()
    assert NO_SENSITIVITY.search(again)
    assert NO_SENSITIVITY.sub("", again) == NO_SENSITIVITY.sub("", html)        # the same page otherwise
    assert _report_files(fresh_run) == files                                    # and the same tables
    assert f"<i>{QUESTION}</i>" in again
    leaves = pd.read_csv(fresh_run / "tables" / "leaf_estimates.csv", dtype=str)
    data = pd.DataFrame({"leaf": LEAVES, "taxon": TAXON, "campaign": CAMPAIGN})     # what the data file held
    pd.testing.assert_frame_equal(leaves[["leaf", "taxon", "campaign"]], data)


def test_a_folder_without_study_json_gives_the_same_report(fresh_run, no_engine):
    """A run folder of an earlier leafcv: the question and the groups from the input files
    (`leafcv.runfolder.legacy_study`), the parameter lines from the manifest's records."""
    html = write_report(fresh_run).read_text()
    files = _report_files(fresh_run)
    RunPaths(fresh_run).study.unlink()
    assert write_report(fresh_run).read_text() == html
    assert _report_files(fresh_run) == files
    (fresh_run.parent.parent / "demo.toml").unlink()                # and then says what it cannot show
    gone = write_report(fresh_run).read_text()
    assert "named in the manifest is not there: the question is not shown" in gone
    assert "Not grouped: the comparison file is not available, so the leaves&#x27; groups are unknown." in gone


def test_the_report_modules_leave_the_input_files_to_the_schema():
    """Besides the behaviour above, a look at the code: no module of the report imports a TOML reader or the
    readers of the input files, nor reads a CSV the way a user's data file is read; the study record comes through
    `leafcv.runfolder.read_study`."""
    import ast
    from pathlib import Path

    import leafcv.report as report

    folder = Path(report.__file__).parent
    imported: dict[str, set[str]] = {}
    for path in folder.glob("*.py"):
        names = set()
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Import):
                names |= {a.name for a in node.names}
            elif isinstance(node, ast.ImportFrom):
                names |= {node.module or ""} | {a.name for a in node.names}
            elif isinstance(node, ast.keyword) and node.arg == "sep":
                names.add("a CSV read with a guessed delimiter")            # how a user's data file is read
        imported[path.name] = names
    forbidden = {"tomllib", "question_of", "legacy_study", "load_comparison", "load_dataset",
                 "a CSV read with a guessed delimiter"}
    assert {name: names & forbidden for name, names in imported.items() if names & forbidden} == {}
    assert "read_study" in imported["run.py"]
