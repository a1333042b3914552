"""The question a comparison asks: its ``question`` key, else a comment line starting "Question"
(`leafcv.comparison.question`), from a file's text and from a loaded comparison."""
from __future__ import annotations

from dataclasses import replace

from leafcv.comparison import load_comparison
from leafcv.comparison.question import question_in_comments, question_of, stated_question


def test_the_question_of_a_comparison_file():
    key = 'question = "Does leaf N act alike within and across species?"\n# Question: not this one?\nformat = 2\n'
    assert question_of(key) == "Does leaf N act alike within and across species?"
    two_lines = "# intro\n# Question: which traits shift Vcmax25, and is month better\n# fixed or random? Read on.\n"
    assert question_of(two_lines) == "which traits shift Vcmax25, and is month better fixed or random?"
    assert question_of("# Question: is month needed?\n# next line\n") == "is month needed?"
    assert question_of("# Questions are welcome\nformat = 2\n") is None          # "Question" as a word only
    assert question_of("format = 2\n# no question here\n") is None
    assert question_in_comments(key) == "not this one?"                        # the comments alone


def test_the_question_of_a_loaded_comparison(quick_demo, tmp_path):
    comparison, _, _ = quick_demo
    text = comparison.path.read_text()
    # the demo states its question in a comment, which the TOML reader drops: read from the file again
    assert comparison.question == "" and stated_question(comparison) == question_of(text)
    assert stated_question(comparison).endswith("?") and "\n" not in stated_question(comparison)
    keyed = tmp_path / "keyed.toml"
    keyed.write_text('question = """Is month\n  needed?"""\n' + text)
    loaded = load_comparison(keyed)
    assert loaded.question.startswith("Is month") and stated_question(loaded) == "Is month needed?"
    gone = replace(comparison, path=tmp_path / "not-there.toml")
    assert stated_question(gone) is None
