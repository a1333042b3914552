"""Read the user's observation CSV (or a pandas DataFrame) into a validated :class:`~leafcv.data.dataset.Dataset`.

The file is read as text first, so every cell that is not a number can be reported with its line; a
DataFrame is turned into the same text cells, so it goes through exactly the same checks. All problems
found are collected and raised together as one :class:`~leafcv.errors.DataError`.
"""
from __future__ import annotations

import difflib
import io
import re
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import DataError, Problem
from ..spec import OPTIONAL_COLUMNS, REQUIRED_COLUMNS, DataSpec
from .curves import find_curves, indices_by
from .dataset import LEAF_TERM, Dataset
from .delimiters import DECIMAL_COMMA, decimal_mark, describe, detect_delimiter
from .mapping import check_mapping
from .messages import MAX_LISTED
from .messages import label as _label
from .messages import rows as _rows
from .messages import rows_values as _rows_values
from .messages import show as _show
from .roles import ROLE_OF
from .traits import trait_warnings
from .units import column_problems, convert_ci

#: Leaf temperature (deg C) used when no column is mapped: the reference temperature to which FvCB
#: parameters are normalised (Bernacchi et al. 2001, Plant Cell Environ 24:253-259).
DEFAULT_T_LEAF = 25.0
#: O2 (mmol mol-1) used when no column is mapped: 21 kPa in air (REFERENCES.md, common practice).
DEFAULT_O2 = 210.0

# Plausibility limits (ranges and unit mistakes: leafcv.data.units). Common practice, no source.
MIN_POINTS_PER_LEAF = 5
#: Cell texts read as a missing number (compared in lower case).
MISSING_TOKENS = frozenset({"", "na", "nan", "n/a", "null", "none"})

_NUMERIC_VARIABLES = ("a_net", "ci", "ppfd", "t_leaf", "o2")
_TEXT_VARIABLES = (LEAF_TERM, "curve")
#: How messages name a DataFrame given in place of the file, when no name is given.
TABLE_LABEL = "the table"


@dataclass(frozen=True)
class _Table:
    """The file (or DataFrame) as stripped text: header names, cells by position, each record's line
    number, the field delimiter ('' for a DataFrame), the decimal mark of its numbers, and how messages
    name it ("the file", or the DataFrame's label)."""

    header: list[str]
    cells: pd.DataFrame
    rows: np.ndarray
    delimiter: str = ","
    decimal: str = "."
    label: str = "the file"

    def has(self, name: str) -> bool:
        return name in self.header

    def text(self, name: str) -> pd.Series:
        """Cells of the first column called ``name``."""
        return self.cells[self.header.index(name)]


def load_dataset(spec: DataSpec, table: pd.DataFrame | None = None, *, name: str | None = None) -> Dataset:
    """Read, check and convert the observation table described by ``spec``.

    Parameters
    ----------
    spec
        Where the file is, how its columns map to leafcv's observation variables (``spec.columns``
        is keyed by variable: ``a_net``, ``ci``, ...; messages name each by its data role, the key
        the user wrote under [data.columns]), the Ci unit, and the leaf-level group and trait columns.
        The mapping is checked by `leafcv.data.mapping.check_mapping`, as a comparison file's is.
    table
        A pandas DataFrame read in place of ``spec.file`` (which is then not opened): one column per
        variable, group or trait under the names ``spec`` gives, one row per point. Its cells are
        written as text (a missing value as an empty cell) and go through exactly the checks a file's
        cells do.
    name
        How messages, the `DataError` and ``Dataset.source`` name ``table`` (default: "the table").

    Returns
    -------
    Dataset
        Observations in leafcv's variables and units (Ci in umol/mol) and the leaf table, with
        notes on every default and inference used, warnings that do not stop a comparison (traits
        constant across leaves or with outlying leaves, oxygen that may be in percent: see
        `leafcv.data.traits` and `leafcv.data.units`), and the file's delimiter and decimal mark.

    Raises
    ------
    DataError
        With every problem found in one pass: missing or unreadable file (including one whose fields
        are not separated by comma, semicolon or tab), unknown or missing columns, cells that are not
        numbers, missing values, implausible values or likely unit mistakes, leaf-level columns that
        vary within a leaf, leaves with too few points, duplicated rows, curves that do not vary.

    Notes
    -----
    Rows are cited by their line in the file (the header is line 1); blank lines are skipped but
    keep their place in the count. A DataFrame's rows are cited as in a CSV file written from it: its
    first row is row 2 (its position + 2); a row with no values is skipped but keeps its number.

    Delimiter and decimal mark. Fields may be separated by commas, semicolons or tabs, found by the
    rule in `leafcv.data.delimiters`; a file that is not comma-separated may write its numbers with
    a decimal comma (``12,5``), but then every number must use it.

    Curves. With a ``curve`` column, a curve is one (leaf, curve id) pair. Without one, each leaf's
    points are split by light level: PPFD values that agree within 2 % (or 1 umol m-2 s-1 near
    darkness) form a level; every level with at least 4 points is one curve, and the leaf's
    remaining points form one more curve. A light-curve point measured at the A-Ci curve's PPFD
    therefore joins the A-Ci curve. Curve ids are then the curve type, numbered from the second
    curve of a type in a leaf on ("aci", "aq", "aci-2", ...), in order of first appearance.

    Curve type. Each curve is "aci" when the coefficient of variation (population SD over
    max(|mean|, 1)) of its Ci exceeds that of its PPFD, else "aq". A curve whose Ci and PPFD
    both vary by less than 2 % is reported as a problem.

    Examples
    --------
    >>> spec = DataSpec(file=Path("/data/obs.csv"), columns={"a_net": "Anet", "ci": "Ci_in",
    ...                 "ppfd": "Light", "leaf": "LeafID"}, traits=("N_area",))
    >>> dataset = load_dataset(spec)  # doctest: +SKIP
    >>> frame = pd.read_excel("obs.xlsx")  # doctest: +SKIP
    >>> dataset = load_dataset(spec, frame, name="obs.xlsx")  # doctest: +SKIP
    """
    checked = check_mapping(spec.columns, spec.groups, spec.traits, spec.ci_unit, spec.pressure_kpa)
    problems, notes = list(checked.problems), list(checked.notes)
    source = str(spec.file) if table is None else (name or TABLE_LABEL)
    if table is None:
        cells, read_problems = _read_table(Path(spec.file))
    else:
        cells, read_problems = _frame_table(table, source)
    problems += read_problems
    if cells is None:
        raise DataError(source, problems)
    table = cells
    groups, traits = _names(spec.groups), _names(spec.traits)
    problems += _check_header(table, spec, groups, traits)
    present = {var: name for var, name in _valid_mapping(spec).items() if table.has(name)}
    if table.delimiter:
        table = _with_decimal_mark(table, [present[v] for v in _NUMERIC_VARIABLES if v in present]
                                   + [t for t in traits if table.has(t)])
    notes = _file_notes(table) + notes
    numbers, texts, found = _parse_cells(table, present, _NUMERIC_VARIABLES, _TEXT_VARIABLES)
    problems += found
    trait_values, _, found = _parse_cells(table, {t: t for t in traits if table.has(t)}, traits, (), "trait")
    problems += found
    _, group_values, found = _parse_cells(table, {g: g for g in groups if table.has(g)}, (), groups, "group")
    problems += found

    found, note, warnings = _units_and_ranges(numbers, table.rows, present, spec)
    problems += found
    notes += note

    n = len(table.rows)
    leaf = texts.get("leaf", np.full(n, "", dtype=object))
    problems += _leaf_problems(table, leaf, present.get("leaf", ""), trait_values, group_values)

    curve, curve_type, found, note = find_curves(leaf, texts.get("curve"), numbers.get("ci"),
                                             numbers.get("ppfd"), table.rows, present.get("curve"))
    problems += found
    notes += note
    if problems:
        raise DataError(source, problems)

    for var, default, unit in (("t_leaf", DEFAULT_T_LEAF, "deg C"), ("o2", DEFAULT_O2, "mmol/mol")):
        if var not in numbers:
            numbers[var] = np.full(n, default)
            notes.append(f"no {ROLE_OF[var]} column mapped: {ROLE_OF[var]} set to {default:g} {unit} "
                         f"for every point")
    leaves, leaf_index = _leaf_table(leaf, group_values, trait_values)
    warnings += trait_warnings(leaves, spec.traits)
    obs = pd.DataFrame({
        "leaf": pd.Series(leaf, dtype=str), "leaf_index": leaf_index,
        "curve": pd.Series(curve, dtype=str), "curve_type": pd.Series(curve_type, dtype=str),
        "a_net": numbers["a_net"], "ci": numbers["ci"], "ppfd": numbers["ppfd"],
        "t_leaf": numbers["t_leaf"], "o2": numbers["o2"], "row": table.rows.astype(np.int64),
    })
    return Dataset(obs=obs, leaves=leaves, groups=tuple(spec.groups), traits=tuple(spec.traits),
                   source=Path(source), notes=tuple(notes), warnings=tuple(warnings),
                   delimiter=table.delimiter, decimal_mark=table.decimal)


# ---------------------------------------------------------------- the specification

def _valid_mapping(spec: DataSpec) -> dict[str, str]:
    """Mapped leafcv variables that are known and have a column name (`check_mapping` reports the rest)."""
    known = REQUIRED_COLUMNS + OPTIONAL_COLUMNS
    return {var: name for var, name in spec.columns.items() if var in known and _is_name(name)}


def _names(names) -> list[str]:
    """The group or trait names that are names, each once (`check_mapping` reports the rest)."""
    return list(dict.fromkeys(n for n in names if _is_name(n)))


def _is_name(name: object) -> bool:
    return isinstance(name, str) and bool(name.strip())


# ---------------------------------------------------------------- the file

#: How the observation file is named in messages, and what to do when its path is wrong.
OBSERVATION_FILE = "the observation file"
_OBSERVATION_PATH = ("check [data] file (a relative path is relative to the comparison file)",
                     "point [data] file at the CSV")


def _read_table(path: Path, label: str = OBSERVATION_FILE, path_advice: tuple[str, str] = _OBSERVATION_PATH,
                rows_word: str = "point") -> tuple[_Table | None, list[str]]:
    """The file as stripped text with line numbers, or None and the reason it cannot be read. ``label``
    names the file in messages; ``path_advice`` says what to do when the path is missing or not a file;
    ``rows_word`` is what one line of the file holds."""
    if not path.exists():
        return None, [f"{label} {str(path)!r} does not exist; {path_advice[0]}"]
    if not path.is_file():
        return None, [f"{label} {str(path)!r} is not a file; {path_advice[1]}"]
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        return None, [f"{label} is not UTF-8 text (byte {exc.start}); save it as UTF-8 CSV"]
    if not text.strip():
        return None, [f"{label} is empty; it needs a header line and one line per {rows_word}"]
    delimiter, problem = detect_delimiter(text)
    if delimiter is None:
        return None, [problem]
    try:
        grid = pd.read_csv(io.StringIO(text), sep=delimiter, header=None, dtype=str, keep_default_na=False,
                           skip_blank_lines=False)
    except pd.errors.ParserError as exc:
        return None, [_parser_problem(exc, delimiter, label)]
    return _table(grid.fillna(""), delimiter, f"{label} has a header line but no data rows; add one line per {rows_word}")


def read_text_table(path: Path, label: str, path_advice: tuple[str, str], rows_word: str,
                    numeric: Sequence[str] = ()) -> tuple[pd.DataFrame, np.ndarray]:
    """A delimited text file other than the observations (e.g. new leaves for ``leafcv predict``), read
    exactly as the observation file is: comma, semicolon or tab detected, stripped text cells, blank lines
    dropped. Returns the cells under the header's names, the ``numeric`` columns present as floats (decimal
    commas read; a missing token or a cell that is not a number is NaN), and each row's line number.

    Raises
    ------
    DataError
        Naming ``path`` when it cannot be read.
    """
    table, problems = _read_table(path, label, path_advice, rows_word)
    if table is None:
        raise DataError(str(path), problems)
    present = [n for n in numeric if table.has(n)]
    if present:
        table = _with_decimal_mark(table, present)
    frame = pd.DataFrame({name: table.text(name).to_numpy() for name in table.header})
    for name in present:
        text = frame[name].where(~frame[name].str.lower().isin(MISSING_TOKENS))
        if table.decimal == ",":
            text = text.str.replace(",", ".", regex=False)
        frame[name] = pd.to_numeric(text, errors="coerce")
    return frame, table.rows


def _table(grid: pd.DataFrame, delimiter: str, no_rows: str) -> tuple[_Table | None, list[str]]:
    """Stripped cells with the file line of each record (quoted line breaks and blank lines counted)."""
    breaks = np.array([grid[c].str.count("\n").to_numpy() for c in grid.columns]).sum(axis=0)
    starts = 1 + np.arange(len(grid)) + np.concatenate([[0], np.cumsum(breaks)[:-1]])
    grid = grid.apply(lambda column: column.str.strip())
    return _filled(_Table(header=[str(h) for h in grid.iloc[0]], cells=grid.iloc[1:], rows=starts[1:],
                          delimiter=delimiter), no_rows)


def _frame_table(frame: object, label: str) -> tuple[_Table | None, list[str]]:
    """A DataFrame as the stripped text cells a file would give (a missing value as an empty cell), its
    rows numbered as in a CSV file written from it (the first row is row 2)."""
    if not isinstance(frame, pd.DataFrame):
        return None, [f"{label} must be a pandas DataFrame, got a {type(frame).__name__}"]
    if frame.shape[1] == 0:
        return None, [f"{label} has no columns; it needs one column per variable, group and trait"]
    cells = pd.DataFrame({i: _cell_texts(frame.iloc[:, i]) for i in range(frame.shape[1])}, index=range(len(frame)))
    table = _Table(header=[str(h).strip() for h in frame.columns], cells=cells, rows=np.arange(len(frame)) + 2,
                   delimiter="", label=label)
    return _filled(table, f"{label} has no rows with values; add one row per point")


def _cell_texts(column: pd.Series) -> list[str]:
    """Each value written as text (as a CSV file would hold it), stripped; '' where missing."""
    missing = column.isna().to_numpy()
    return ["" if gone else str(value).strip() for value, gone in zip(column.astype(object).to_numpy(), missing)]


def _filled(table: _Table, no_rows: str) -> tuple[_Table | None, list[str]]:
    """The table without its rows of empty cells (they keep their numbers), or None and ``no_rows``."""
    filled = ~(table.cells == "").all(axis=1).to_numpy()
    cells = table.cells[filled].reset_index(drop=True)
    if cells.empty:
        return None, [no_rows]
    return replace(table, cells=cells, rows=table.rows[filled]), []


def _parser_problem(exc: Exception, delimiter: str, label: str = OBSERVATION_FILE) -> str:
    match = re.search(r"Expected (\d+) fields in line (\d+), saw (\d+)", str(exc))
    stray = "an unquoted comma (a decimal comma?)" if delimiter == "," else f"a stray {describe(delimiter)}"
    if match:
        expected, line, seen = match.groups()
        return (f"line {line} of {label} has {seen} fields but the header has {expected} "
                f"(fields separated by {describe(delimiter)}); check for {stray} or a missing header name")
    return (f"{label} is not readable as delimited text with {describe(delimiter)} between fields "
            f"({exc}); save it as CSV")


def _with_decimal_mark(table: _Table, numeric: list[str]) -> _Table:
    """The table with the decimal mark its numeric columns (the user's names) use."""
    cells = [c for name in numeric for c in table.text(name)]
    return replace(table, decimal=decimal_mark(table.delimiter, cells))


def _file_notes(table: _Table) -> list[str]:
    if table.delimiter in (",", "") and table.decimal == ".":
        return []
    return [f"the observation file's fields are separated by {describe(table.delimiter)} and its numbers "
            f"use {table.decimal!r} as the decimal mark"]


def _check_header(table: _Table, spec: DataSpec, groups: list[str], traits: list[str]) -> list[str]:
    wanted = [(name, ROLE_OF[var], f"[data.columns] {ROLE_OF[var]}") for var, name in _valid_mapping(spec).items()]
    wanted += [(name, "group", "[data.leaf] groups") for name in groups]
    wanted += [(name, "trait", "[data.leaf] traits") for name in traits]
    header = "the header" if table.delimiter else f"the column names of {table.label}"
    problems = []
    for name, role, section in wanted:
        count = table.header.count(name)
        if count == 0:
            problems.append(_missing_column(name, role, section, table))
        elif count > 1:
            places = [str(i + 1) for i, h in enumerate(table.header) if h == name]
            problems.append(f"{_label(name, role)} appears {count} times in {header} (columns "
                            f"{', '.join(places)}); rename the copies so each name is unique")
    return problems


def _missing_column(name: str, role: str, section: str, table: _Table) -> str:
    header = table.header
    lowered = {h.lower(): h for h in header}
    close = [lowered[m] for m in difflib.get_close_matches(name.lower(), list(lowered), n=3, cutoff=0.6)]
    hint = f"; did you mean {' or '.join(map(repr, close))}?" if close else ""
    listed = ", ".join(map(repr, header[:30])) + (f" and {len(header) - 30} more" if len(header) > 30 else "")
    return (f"{_label(name, role)} is not in {table.label}{hint}; {table.label} has columns: {listed}. "
            f"Correct the name under {section}.")


# ---------------------------------------------------------------- cells

def _parse_cells(table: _Table, names: dict[str, str], numeric: Sequence[str], text: Sequence[str],
                 role: str | None = None) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray], list[str]]:
    """Numbers and texts of the columns ``names`` (key -> user's name), with problems found.

    ``role`` names the columns in messages; by default the key's data role does.
    """
    numbers: dict[str, np.ndarray] = {}
    texts: dict[str, np.ndarray] = {}
    problems: list[str] = []
    for key, name in names.items():
        if key in numeric:
            numbers[key], found = _numeric_column(table, name, role or ROLE_OF.get(key, key))
        elif key in text:
            texts[key], found = _text_column(table, name, role or ROLE_OF.get(key, key))
        else:
            continue
        problems += found
    return numbers, texts, problems


def _numeric_column(table: _Table, name: str, role: str) -> tuple[np.ndarray, list[str]]:
    """Values (NaN where missing or not a finite number) and the problems found."""
    text = table.text(name)
    missing = text.str.lower().isin(MISSING_TOKENS).to_numpy()
    readable = text.where(~missing)
    mixed = np.zeros(len(text), dtype=bool)
    if table.decimal == ",":
        mixed = ~missing & text.str.contains(".", regex=False).to_numpy()
        readable = readable.str.replace(",", ".", regex=False)
    values = pd.to_numeric(readable, errors="coerce").to_numpy(dtype=float, copy=True)
    values[mixed | ~np.isfinite(values)] = np.nan
    bad = ~missing & ~mixed & ~np.isfinite(values)
    problems = []
    if mixed.any():
        problems.append(f"{_label(name, role)} has '.' in {_rows_values(table.rows[mixed], list(text[mixed]))}, "
                        f"but {table.label}'s numbers use ',' as the decimal mark; use one decimal mark throughout "
                        f"(remove a '.' that separates thousands)")
    if bad.any():
        shown = list(text[bad])
        comma = table.decimal == "." and any(DECIMAL_COMMA.fullmatch(v) for v in shown)
        decimal = " with '.' as the decimal mark" if comma else ""
        problems.append(f"{_label(name, role)} has values that are not finite numbers in "
                        f"{_rows_values(table.rows[bad], shown)}; write plain numbers{decimal}")
    if missing.any():
        problems.append(f"{_label(name, role)} has missing values in {_rows(table.rows[missing])}; "
                        f"{_missing_advice(role)}")
    return values, problems


def _text_column(table: _Table, name: str, role: str) -> tuple[np.ndarray, list[str]]:
    """Cell texts ('' where empty) and the problems found."""
    text = table.text(name).to_numpy(dtype=object)
    empty = text == ""
    problems = []
    if empty.any():
        what = "no leaf id" if role == "leaf" else "empty cells"
        problems.append(f"{_label(name, role)} has {what} in {_rows(table.rows[empty])}; {_missing_advice(role)}")
    return text, problems


def _missing_advice(role: str) -> str:
    if role in ("trait", "group"):
        return "repeat the leaf's value on every row of the leaf"
    if role == "leaf":
        return "give every point the id of its leaf"
    if role == "curve":
        return "give every point the id of its curve, or remove the curve mapping to infer curves"
    default = {ROLE_OF["t_leaf"]: f"{DEFAULT_T_LEAF:g} deg C", ROLE_OF["o2"]: f"{DEFAULT_O2:g} mmol/mol"}.get(role)
    tail = f" (or remove the {role} mapping to use {default} for every point)" if default else ""
    return f"every point needs a value: fill them in or delete those rows{tail}"


# ---------------------------------------------------------------- units and ranges

def _units_and_ranges(numbers: dict[str, np.ndarray], rows: np.ndarray, present: dict[str, str],
                      spec: DataSpec) -> tuple[list[str], list[str], list[str]]:
    """Problems, notes and warnings on the numeric columns' units and ranges; Ci is converted in ``numbers``."""
    problems, notes, warnings = [], [], []
    if "ci" in numbers:
        numbers["ci"], found, notes = convert_ci(numbers["ci"], rows, present["ci"], spec)
        problems += found
    for var in ("a_net", "ppfd", "t_leaf", "o2"):
        if var in numbers:
            found, warned = column_problems(numbers[var], rows, present[var], var)
            problems += found
            warnings += warned
    return problems, notes, warnings


# ---------------------------------------------------------------- leaves

def _leaf_problems(table: _Table, leaf: np.ndarray, leaf_name: str, traits: dict[str, np.ndarray],
                   groups: dict[str, np.ndarray]) -> list[str]:
    """Leaves with too few points, leaf-level columns that vary within a leaf, and repeated rows."""
    problems = _leaf_size_problems(leaf, table.rows, leaf_name)
    for role, columns in (("trait", traits), ("group", groups)):
        for name, values in columns.items():
            problems += _constancy_problems(leaf, values, table.rows, name, role)
    return problems + _duplicate_problems(table)


def _leaf_size_problems(leaf: np.ndarray, rows: np.ndarray, name: str) -> list[str]:
    problems = []
    for leaf_id, index in indices_by(leaf).items():
        if len(index) < MIN_POINTS_PER_LEAF:
            problems.append(f"leaf {leaf_id!r} (column {name!r}) has only {len(index)} point(s) "
                            f"({_rows(rows[index])}); a leaf needs at least {MIN_POINTS_PER_LEAF}: check its "
                            f"id or remove it")
    return problems


def _constancy_problems(leaf: np.ndarray, values: np.ndarray, rows: np.ndarray, name: str, role: str) -> list[str]:
    """One problem naming every leaf in which a leaf-level column takes more than one value."""
    details = []
    for leaf_id, index in indices_by(leaf).items():
        vals = values[index]
        keep = np.isfinite(vals) if role == "trait" else vals != ""
        distinct = list(dict.fromkeys(vals[keep].tolist()))
        if len(distinct) > 1:
            parts = [f"{_show(v)} in {_rows(rows[index][keep][vals[keep] == v], limit=3)}" for v in distinct[:4]]
            details.append(f"leaf {leaf_id!r} has " + "; ".join(parts))
    if not details:
        return []
    more = f"; and {len(details) - MAX_LISTED} more leaves" if len(details) > MAX_LISTED else ""
    return [Problem(f"{_label(name, role)} must be constant within a leaf but varies in {len(details)} leaf/leaves: "
                    f"{'. '.join(details[:MAX_LISTED])}{more}. Give each leaf one value", "varies-within-leaf", name)]


def _duplicate_problems(table: _Table) -> list[str]:
    repeated = table.cells.duplicated(keep=False).to_numpy()
    if not repeated.any():
        return []
    first: dict[tuple, int] = {}
    pairs = []
    for key, row in zip(table.cells[repeated].itertuples(index=False, name=None), table.rows[repeated]):
        if key in first:
            pairs.append(f"row {row} repeats row {first[key]}")
        else:
            first[key] = int(row)
    more = f" and {len(pairs) - MAX_LISTED} more" if len(pairs) > MAX_LISTED else ""
    return [f"{len(pairs)} row(s) repeat an earlier row exactly: {', '.join(pairs[:MAX_LISTED])}{more}; "
            f"remove the copies (a point logged twice?)"]


def _leaf_table(leaf: np.ndarray, groups: dict[str, np.ndarray],
                traits: dict[str, np.ndarray]) -> tuple[pd.DataFrame, np.ndarray]:
    """One row per leaf in order of first appearance, and each point's leaf index."""
    by_leaf = indices_by(leaf)
    firsts = [index[0] for index in by_leaf.values()]
    columns: dict[str, pd.Series] = {"leaf": pd.Series(list(by_leaf), dtype=str)}
    for name, values in groups.items():
        columns[name] = pd.Series(values[firsts].tolist(), dtype=str)
    for name, values in traits.items():
        columns[name] = pd.Series(values[firsts], dtype=float)
    leaf_index = np.empty(len(leaf), dtype=np.int64)
    for i, index in enumerate(by_leaf.values()):
        leaf_index[index] = i
    return pd.DataFrame(columns), leaf_index
