"""Delimited text files: encoding, separator, records (with the checks on quotes and limits)."""

from __future__ import annotations

import csv
import io
import itertools
import re
from collections.abc import Iterable, Iterator
from pathlib import Path

import numpy as np

from audit.errors import InputError
from audit.rawtable import (
    HEADER_SEARCH_ROWS,
    MAX_CELL_CHARS,
    MAX_COLUMNS,
    MAX_ROWS,
    RawTable,
    cell_too_long,
    column_letter,
    too_many_columns,
    too_many_rows,
)

_DELIMITERS = ",;\t|"


def looks_like_text(path: Path) -> bool:
    with path.open("rb") as handle:
        sample = handle.read(65536)
    if sample[:2] in (b"\xff\xfe", b"\xfe\xff") or sample.startswith(b"\xef\xbb\xbf"):
        return True
    return _control_share(sample.decode("latin-1")) < 0.01


def _control_share(text: str) -> float:
    """Share of control characters other than tab, line feed, carriage return and form feed."""
    if not text:
        return 0.0
    return len(_CONTROL.findall(text)) / len(text)


_CONTROL = re.compile(r"[\x00-\x08\x0b\x0e-\x1f]")


def decode(path: Path) -> tuple[str, str | None]:
    """The file's text and, when it was not UTF-8, a note naming the encoding assumed."""
    data = path.read_bytes()
    text: str | None = None
    note: str | None = None
    sample = data[:4096]
    even, odd = sample[0::2], sample[1::2]
    if data[:2] in (b"\xff\xfe", b"\xfe\xff"):
        text = _try(data, "utf-16")
    elif odd and odd.count(0) > 0.4 * len(odd) and even.count(0) < 0.1 * len(even):
        # UTF-16 without a byte-order mark: every other byte of ASCII text is zero.
        text, note = _try(data, "utf-16-le"), "read as UTF-16 text (no byte-order mark)"
    elif even and even.count(0) > 0.4 * len(even) and odd.count(0) < 0.1 * len(odd):
        text, note = _try(data, "utf-16-be"), "read as UTF-16 text (no byte-order mark)"
    elif data.startswith(b"\xef\xbb\xbf"):
        text = _try(data, "utf-8-sig")
    elif (utf8 := _try(data, "utf-8")) is not None:
        text = utf8
    else:
        for encoding, label in (("cp1252", "Windows-1252"), ("latin-1", "Latin-1")):
            text = _try(data, encoding)
            if text is not None:
                note = (
                    f"the file is not UTF-8; it was read as {label} text (check accented "
                    "letters in the exports)"
                )
                break
    if text is None:
        raise InputError(f"{path}: the text encoding could not be recognised; save it as UTF-8.")
    if _control_share(text[:65536]) >= 0.01:
        raise InputError(
            f"{path}: the file is not a text table (it holds binary data); give an .xlsx, "
            ".csv or .tsv file."
        )
    return text, note


def _try(data: bytes, encoding: str) -> str | None:
    try:
        return data.decode(encoding)
    except UnicodeDecodeError:
        return None


def sniff_delimiter(text: str) -> str:
    lines = _first_lines(text, 50)
    # The header line names study_id and design: its separator is the file's, whatever title
    # lines (with their own commas or colons) stand above it.
    for line in lines[:HEADER_SEARCH_ROWS]:
        low = line.lower()
        if "study" in low and "design" in low:
            counts = {d: line.count(d) for d in _DELIMITERS}
            best = max(counts, key=lambda d: counts[d])
            if counts[best]:
                return best
    sample = "\n".join(lines[:50])
    try:
        return csv.Sniffer().sniff(sample, delimiters=_DELIMITERS).delimiter
    except csv.Error:
        header = sample.splitlines()[0] if sample else ""
        counts = {d: header.count(d) for d in _DELIMITERS}
        best = max(counts, key=lambda d: counts[d])
        return best if counts[best] else ","


def _first_lines(text: str, count: int) -> list[str]:
    """``text.splitlines()[:count]`` without splitting the whole text."""
    size = 8192
    while size < len(text):
        lines = text[:size].splitlines()
        # The last line of a prefix may be cut short; the ones before it are whole.
        if len(lines) > count + 1:
            return lines[:count]
        size *= 4
    return text.splitlines()[:count]


def parse_delimited(
    text: str, delimiter: str, source: object
) -> tuple[list[list[object]], list[tuple[int, int, str]]]:
    """Records of the text, and ``(record index, field index, reason)`` for suspect fields.

    The csv module keeps quoted fields intact and, unlike pandas' default, keeps blank lines, so
    the record number is the row number a spreadsheet program shows for the same file.
    """
    quoted = '"' in text
    records: list[list[object]] = []
    problems: list[tuple[int, int, str]] = []
    failure: csv.Error | None = None
    split = None if quoted else _split_lines(text, delimiter)
    if split is not None:
        records = split
    else:
        try:
            # extend keeps the records read before a parse error.
            records.extend(_shared_texts(csv.reader(_lines(text), delimiter=delimiter)))
        except csv.Error as exc:
            failure = exc
    if not quoted:
        # Without quote marks no cell can swallow lines: check the limits on the whole.
        if failure is not None:
            raise InputError(
                f"{source}: the file could not be read as delimited text ({failure})."
            ) from failure
        if len(records) > MAX_ROWS + HEADER_SEARCH_ROWS:
            filled = sum(1 for r in records if any(r))
            if filled > MAX_ROWS + HEADER_SEARCH_ROWS:
                raise InputError(too_many_rows(source))
        widest = max(map(len, records), default=0)
        if widest > MAX_COLUMNS:
            for r in records:
                if len(r) > MAX_COLUMNS and any(r[MAX_COLUMNS:]):
                    raise InputError(too_many_columns(source, len(r)))
        if len(text) > MAX_CELL_CHARS:
            _check_cell_lengths(records, source)
        return records, problems
    _check_limits_in_order(records, source)
    if len(text) > MAX_CELL_CHARS:
        _check_cell_lengths(records, source)
    if failure is not None:
        raise InputError(
            f"{source}: the file could not be read as delimited text near record "
            f"{len(records) + 1} ({failure}); check quote marks there."
        ) from failure
    # A line break plus the separator inside one cell is what an unbalanced quote mark
    # produces: the lines up to the next quote mark are swallowed into the cell. Each record
    # takes one line unless a cell holds a line break, so equal counts clear every record but
    # the last (a quote left open to the end of the text takes in the last line break).
    first = 0 if len(records) != _line_count(text) else max(len(records) - 1, 0)
    suspects = [
        index
        for index in range(first, len(records))
        if "\n" in (joined := "".join(records[index])) or "\r" in joined  # type: ignore[arg-type]
    ]
    if suspects:
        # A properly quoted cell may hold line breaks and the separator ("Effect of X, Y" on
        # two lines). A quote that swallowed lines closes somewhere a quote cannot close (not
        # before a separator or a line end) or never: the strict reader stops in that record.
        # Records before it are well formed.
        well_formed = _well_formed_records(text, delimiter)
        for index in suspects:
            if index >= well_formed:
                problems.extend(_swallowed(records[index], delimiter, index))  # type: ignore[arg-type]
    return records, problems


def _check_cell_lengths(records: list[list[object]], source: object) -> None:
    """Refuse the first cell longer than :data:`MAX_CELL_CHARS`, as a workbook cell would be
    (the lengths of all cells at C speed; the record is found only when one is too long)."""
    lengths = np.fromiter(
        map(len, itertools.chain.from_iterable(records)),  # type: ignore[arg-type]
        dtype=np.int64,
    )
    if lengths.max(initial=0) <= MAX_CELL_CHARS:
        return
    at = int(np.argmax(lengths > MAX_CELL_CHARS))
    ends = np.cumsum(np.fromiter(map(len, records), dtype=np.int64, count=len(records)))
    record = int(np.searchsorted(ends, at, side="right"))
    field = at - (int(ends[record - 1]) if record else 0)
    where = f"cell {column_letter(field)}{record + 1}"
    raise InputError(cell_too_long(source, where, int(lengths[at])))


def _lines(text: str) -> Iterator[str]:
    """The lines of ``text`` with their line ends, as ``io.StringIO(text, newline="")`` gives
    them to the csv module. Without a carriage return in the text they are cut with
    ``str.split``: a StringIO holds four bytes a character, so for a large file that saves three
    times the text's size."""
    if "\r" in text:
        return iter(io.StringIO(text, newline=""))
    lines = text.split("\n")
    last = lines.pop()  # the piece after the last line end ('' when the text ends with one)
    ended = map(str.__add__, lines, itertools.repeat("\n"))
    return itertools.chain(ended, [last] if last else [])


def _well_formed_records(text: str, delimiter: str) -> int:
    """How many records from the start the csv module reads in strict mode, where every quoted
    field must close right before a separator or a line end (all of them: a large number)."""
    count = 0
    try:
        for _ in csv.reader(_lines(text), delimiter=delimiter, strict=True):
            count += 1
    except csv.Error:
        return count
    return 2**62


#: Lines split at a time (the lines split are let go before the next block).
_SPLIT_BLOCK = 50_000


def _shared_texts(
    records: Iterable[list[str]], seen: dict[str, str] | None = None
) -> Iterator[list[object]]:
    """``records`` with each distinct text one object (``seen``: the texts met so far).

    One object for the many cells that read "0.05" or "two_means": a million studies' cells
    take a fraction of the memory, and the hashes that validation's distinct-value look-ups need
    are computed once per text."""
    seen = {} if seen is None else seen
    return (list(map(seen.setdefault, r, r)) for r in records)


def _split_lines(text: str, delimiter: str) -> list[list[object]] | None:
    """The records of text without quote marks, as the csv module reads them, or None where
    only the csv module can say what it makes of the text.

    Without quote marks a record is a line (ending at \\n, \\r or \\r\\n, as io.StringIO splits
    them) cut at each separator, and an empty line is an empty record; str.split does that
    in a third less time. The csv module is left what it may refuse: a line longer than its
    field size limit (it stops at the first field over the limit), and NUL characters (which
    it refused before Python 3.11).
    """
    if not text or "\x00" in text:
        return None
    if "\r" in text:
        lines = text.replace("\r\n", "\n").replace("\r", "\n").split("\n")
    else:
        lines = text.split("\n")
    if text.endswith(("\n", "\r")):
        lines.pop()  # the empty piece after the last line break is no line
    lengths = np.fromiter(map(len, lines), dtype=np.int64, count=len(lines))
    if lengths.max(initial=0) > csv.field_size_limit():
        return None
    records: list[list[object]] = []
    seen: dict[str, str] = {}
    while lines:  # a block of lines at a time, each let go once split
        block = lines[:_SPLIT_BLOCK]
        del lines[:_SPLIT_BLOCK]
        records.extend(_shared_texts(map(str.split, block, itertools.repeat(delimiter)), seen))
    for i in np.flatnonzero(lengths == 0):
        records[i] = []
    return records


def _line_count(text: str) -> int:
    """Lines as io.StringIO(newline="") splits them: at \\n, \\r and \\r\\n."""
    breaks = text.count("\n") + text.count("\r") - text.count("\r\n")
    return breaks + (not text.endswith(("\n", "\r")) if text else 0)


def _check_limits_in_order(records: list[list[object]], source: object) -> None:
    """Raise for the first record past the row limit or the column limit, whichever comes first
    (a quoted file is checked record by record, as it would be read)."""
    first_row = None
    if len(records) > MAX_ROWS + HEADER_SEARCH_ROWS + 1:
        start = MAX_ROWS + HEADER_SEARCH_ROWS + 1
        first_row = next((i for i in range(start, len(records)) if any(records[i])), None)
    first_column = None
    if max(map(len, records), default=0) > MAX_COLUMNS:
        first_column = next(
            (i for i, r in enumerate(records) if len(r) > MAX_COLUMNS and any(r[MAX_COLUMNS:])),
            None,
        )
    if first_row is not None and (first_column is None or first_row <= first_column):
        raise InputError(too_many_rows(source))
    if first_column is not None:
        raise InputError(too_many_columns(source, len(records[first_column])))


def _swallowed(record: list[str], delimiter: str, index: int) -> list[tuple[int, int, str]]:
    out = []
    for j, value in enumerate(record):
        if ("\n" in value or "\r" in value) and delimiter in value:
            lines = len(value.splitlines())
            out.append(
                (
                    index,
                    j,
                    f"the cell runs over {lines} lines and contains the separator "
                    f"'{delimiter}': a quote mark is probably unbalanced, and the lines "
                    "after it were read into this cell; fix the quotes in the file",
                )
            )
    return out


def map_problems(
    problems: list[tuple[int, int, str]], table: RawTable
) -> list[tuple[int, str, str]]:
    """Reader problems by record -> (position, column name, reason) for data rows."""
    if not problems:
        return []
    pos_of_row = {int(r): i for i, r in enumerate(table.rows)}
    column_of = {j: k for k, j in enumerate(table.source_columns)}
    names = list(table.data.columns)
    out = []
    for record, j, reason in problems:
        pos = pos_of_row.get(record + 1)
        k = column_of.get(j)
        if pos is not None and k is not None:
            out.append((pos, names[k], reason))
        elif record + 1 == table.header_row:
            table.notes.append(f"header cell {column_letter(j)}: {reason}")
    return out
