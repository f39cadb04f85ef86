"""Read a spreadsheet or delimited text file into a raw table: headers normalised, cells as given.

This module decides the format and hands over to one module per job: :mod:`audit.textfile`
(delimited text), :mod:`audit.archive` (workbook safety), :mod:`audit.sheets` (worksheet
parsing), :mod:`audit.tabulate` (rows of cells to a table) and :mod:`audit.rawtable` (the table
and the limits).

Only the header and the row bookkeeping are interpreted here; cell values stay as the file wrote
them (text, or numbers for spreadsheet cells) so that :mod:`audit.validate` can report any value it
rejects exactly as the user typed it.

Files are untrusted: reviewers audit whatever spreadsheets they were sent. The format is decided
by the file's content, not its name; workbooks are inspected as zip archives before any XML is
parsed (declared sizes, packing ratio, document type declarations), and every size has a
documented limit (the ``MAX_*`` constants of :mod:`audit.rawtable`). A file that cannot be used
at all raises :class:`~audit.errors.InputError` with one sentence; a problem confined to some
cells is kept as data (``RawTable.cell_problems``) for the validation to report as row errors.
"""

from __future__ import annotations

import contextlib
import gc
from collections.abc import Iterator
from pathlib import Path

from audit.archive import EMPTY_ZIP_MAGIC, OLE_MAGIC, ZIP_MAGIC, ole_message
from audit.errors import InputError
from audit.rawtable import (
    MAX_COLUMNS,
    MAX_FILE_BYTES,
    MAX_PACKING_RATIO,
    MAX_ROWS,
    MAX_UNPACKED_BYTES,
    UNCACHED,
    RawTable,
    Sheet,
    normalise_header,
    sheet_text,
)
from audit.sheets import read_xlsx
from audit.tabulate import raw_from_frame, to_raw
from audit.textfile import decode, looks_like_text, map_problems, parse_delimited, sniff_delimiter

__all__ = [
    "MAX_COLUMNS",
    "MAX_FILE_BYTES",
    "MAX_PACKING_RATIO",
    "MAX_ROWS",
    "MAX_UNPACKED_BYTES",
    "UNCACHED",
    "RawTable",
    "normalise_header",
    "raw_from_frame",
    "read_table",
]


def read_table(path: str | Path, sheet: str | None = None) -> RawTable:
    """Read ``path`` (an .xlsx workbook, or .csv/.tsv/.txt text) into a :class:`RawTable`.

    The format is recognised from the content: a workbook named ``.csv`` is read as a workbook,
    and a text file named ``.xlsx`` as text (with a note). ``sheet`` names the worksheet; by
    default the first visible one is read.

    Raises
    ------
    InputError
        The file is missing, unreadable, empty, has no study rows, exceeds a documented limit
        or is refused as unsafe.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such file.")
    if path.is_dir():
        raise InputError(f"{path} is a folder; give a .xlsx, .csv or .tsv file.")
    if not path.is_file():
        # A named pipe would block the read until a writer comes (and could be read once).
        raise InputError(
            f"{path} is not a regular file (a named pipe, socket or device); save the table to "
            "a .xlsx, .csv or .tsv file and give that."
        )
    try:
        size = path.stat().st_size
        if size > MAX_FILE_BYTES:
            raise InputError(
                f"{path}: the file is {size / 2**20:.0f} MiB, more than the limit of "
                f"{MAX_FILE_BYTES // 2**20} MiB; split the portfolio into smaller files."
            )
        with path.open("rb") as handle:
            head = handle.read(8)
    except OSError as exc:
        raise InputError(f"{path}: the file could not be opened ({exc.strerror or exc}).") from exc
    suffix = path.suffix.lower()
    if not size:
        raise InputError(f"{path}: the file is empty.")
    if head.startswith(OLE_MAGIC):
        raise InputError(ole_message(path))
    if head.startswith((ZIP_MAGIC, EMPTY_ZIP_MAGIC)):
        found = read_xlsx(path, sheet)
        table = to_raw(found, str(path), found.name, decimal_comma=False)
        if suffix not in (".xlsx", ".xlsm", ".xltx", ".xltm"):
            table.notes.insert(
                0, f"the file is named '{path.name}' but is an .xlsx workbook; it was read as one"
            )
        return _require_rows(table)
    if suffix in (".xlsx", ".xlsm", ".xls", ".ods", ".xlsb"):
        if not looks_like_text(path):
            raise InputError(
                f"{path}: named '{suffix}' but neither an .xlsx workbook nor text: the file "
                "is damaged or truncated (a workbook is a zip archive; this one has no zip "
                "signature); save it again from the spreadsheet program."
            )
    if sheet is not None:
        raise InputError(f"{path}: --sheet applies to .xlsx workbooks, not to text files.")
    text, note = decode(path)
    delimiter = "\t" if suffix == ".tsv" else sniff_delimiter(text)
    with _collector_paused():
        cells, problems = parse_delimited(text, delimiter, path)
        del text  # no longer needed: the records hold the cells
        table = to_raw(
            Sheet(cells, list(range(1, len(cells) + 1))),
            str(path),
            None,
            decimal_comma=delimiter == ";",
        )
        del cells  # the records, freed while the collector is paused
    if suffix in (".xlsx", ".xlsm", ".xls", ".ods", ".xlsb"):
        table.notes.insert(
            0, f"the file is named '{suffix}' but is plain text; it was read as delimited text"
        )
    if note:
        table.notes.insert(0, note)
    table.cell_problems.extend(map_problems(problems, table))
    return _require_rows(table)


@contextlib.contextmanager
def _collector_paused() -> Iterator[None]:
    """Pause Python's cycle collector while a file becomes a table.

    Every record is a new list; at 100,000 records the collector would run hundreds of times
    and walk all the records read so far each time it reaches the oldest generation, which
    costs more than parsing them. Cycles made meanwhile are collected later, not missed.
    """
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()


def _require_rows(table: RawTable) -> RawTable:
    if not len(table.data):
        blank = f" ({len(table.blank_rows)} blank)" if table.blank_rows else ""
        raise InputError(
            f"{table.source}{sheet_text(table.sheet)}: a header row (row {table.header_row}) "
            f"but no study rows below it{blank}; nothing to audit."
        )
    return table
