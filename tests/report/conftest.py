"""Fixtures of the report's tests: an invented run folder (no sampler) and its report, written with every
engine made unusable, so that a report that tried to sample would fail."""
from __future__ import annotations

from html.parser import HTMLParser

import pytest

from .fake_run import build_run

# ArviZ 0.23's compare (stacking weights, used when the fake run's ranking is written) sorts in place,
# which pandas 3.1 deprecates
pytestmark = pytest.mark.filterwarnings("ignore:The inplace keyword")


class EngineUsed(AssertionError):
    pass


def _explode(*args, **kwargs):
    raise EngineUsed("the report tried to construct a sampling engine")


def disable_engines(mp: pytest.MonkeyPatch) -> None:
    """Make constructing a sampling engine raise: the PyStan engine's constructor and leafcv's default
    engine. (tests/conftest.py also fails any test that compiles or samples.)"""
    import leafcv.engines.pystan_engine as pystan_engine
    import leafcv.fitting as fitting

    mp.setattr(pystan_engine.PyStanEngine, "__init__", _explode)
    mp.setattr(fitting, "default_engine", _explode)


@pytest.fixture
def no_engine(monkeypatch):
    disable_engines(monkeypatch)


@pytest.fixture(scope="session")
def written(tmp_path_factory):
    """(run folder, report path, report text) of the fake run, written once with the engines disabled."""
    import warnings

    from leafcv.report import write_report

    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="The inplace keyword")
        run = build_run(tmp_path_factory.mktemp("fake-run"))
    with pytest.MonkeyPatch.context() as mp:
        disable_engines(mp)
        path = write_report(run)
    return run, path, path.read_text()


@pytest.fixture
def fresh_run(tmp_path):
    """A fake run folder of one's own (for tests that change it)."""
    import warnings

    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="The inplace keyword")
        return build_run(tmp_path)


class PageTables(HTMLParser):
    """Every <table data-csv> of a page: its CSV name and its rows as {data-col: cell text}."""

    def __init__(self):
        super().__init__()
        self.tables: list[dict] = []
        self._cell: str | None = None
        self._text: list[str] = []
        self._row: dict | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "table" and "data-csv" in a:
            self.tables.append({"csv": a["data-csv"], "rows": []})
        elif tag == "tr" and self.tables:
            self._row = {}
        elif tag == "td" and "data-col" in a:
            self._cell, self._text = a["data-col"], []

    def handle_endtag(self, tag):
        if tag == "td" and self._cell is not None:
            self._row[self._cell] = "".join(self._text).strip()
            self._cell = None
        elif tag == "tr" and self._row:
            self.tables[-1]["rows"].append(self._row)
            self._row = None

    def handle_data(self, data):
        if self._cell is not None:
            self._text.append(data)


def page_tables(html: str) -> dict[str, list[dict]]:
    parser = PageTables()
    parser.feed(html)
    return {t["csv"]: t["rows"] for t in parser.tables}
