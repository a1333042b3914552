"""Which character separates the fields of the observation file, and which marks decimals.

The rule, stated once. Each candidate delimiter (comma, semicolon, tab) splits the first
`SNIFFED_RECORDS` non-blank records of the file (quotes respected, as Python's csv module reads
them). A candidate is *consistent* when the header splits into at least two fields and every other
record into as many. The consistent candidate with the most header fields wins (ties go to comma,
then semicolon, then tab). When none is consistent, the candidate giving the header the most fields
(at least two) is used, and the row with a wrong number of fields is reported when the file is read.
A header that no candidate splits is refused.

Decimal mark: a comma-separated file uses '.'. Any other file uses ',' when a cell of a numeric
column reads as a number with one decimal comma (``12,5``); it then cannot also use '.'.
"""
from __future__ import annotations

import csv
import io
import re

#: Delimiters recognised, in order of preference, with their names in messages.
DELIMITERS: dict[str, str] = {",": "comma", ";": "semicolon", "\t": "tab"}
SNIFFED_RECORDS = 50
#: A number written with a decimal comma: optional sign, digits, one comma, digits, optional exponent.
DECIMAL_COMMA = re.compile(r"[-+]?\d*,\d+(?:[eE][-+]?\d+)?")
_SHOWN_CHARACTERS = 80


def detect_delimiter(text: str) -> tuple[str | None, str]:
    """The delimiter of ``text`` (the whole file), or None and the reason none was found."""
    counts = {d: _field_counts(text, d) for d in DELIMITERS}
    header = {d: c[0] for d, c in counts.items() if c and c[0] >= 2}
    if not header:
        return None, _one_column(text)
    consistent = [d for d in header if all(n == header[d] for n in counts[d])]
    pool = consistent or list(header)
    return max(pool, key=lambda d: header[d]), ""    # max keeps the first of equals: DELIMITERS' order


def describe(delimiter: str) -> str:
    """'semicolon (';')' or 'tab'."""
    return "tab" if delimiter == "\t" else f"{DELIMITERS[delimiter]} ({delimiter!r})"


def decimal_mark(delimiter: str, cells: list[str]) -> str:
    """',' when the file is not comma-separated and a numeric cell has a decimal comma, else '.'."""
    if delimiter == ",":
        return "."
    return "," if any(DECIMAL_COMMA.fullmatch(c) for c in cells) else "."


def _field_counts(text: str, delimiter: str) -> list[int]:
    """Fields in each of the first non-blank records; empty when the csv module cannot split the text."""
    counts: list[int] = []
    try:
        for record in csv.reader(io.StringIO(text), delimiter=delimiter):
            if any(cell.strip() for cell in record):
                counts.append(len(record))
            if len(counts) == SNIFFED_RECORDS:
                break
    except csv.Error:
        return []
    return counts


def _one_column(text: str) -> str:
    first = next((line for line in text.splitlines() if line.strip()), "")
    shown = first if len(first) <= _SHOWN_CHARACTERS else first[:_SHOWN_CHARACTERS] + "..."
    return (f"the observation file has one column only: its fields are not separated by a comma, a semicolon "
            f"or a tab; its first line reads {shown!r}. Save it as CSV with one of these between fields")
