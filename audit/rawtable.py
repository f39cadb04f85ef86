"""The raw table a file is read into, and the limits on what a file may hold.

Cells stay as the file wrote them (text, or numbers for spreadsheet cells) so that validation can
report any value it rejects exactly as the user typed it.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

__all__ = [
    "HEADER_SEARCH_ROWS",
    "MAX_ARCHIVE_MEMBERS",
    "MAX_CELL_CHARS",
    "MAX_COLUMNS",
    "MAX_FILE_BYTES",
    "MAX_PACKING_RATIO",
    "MAX_ROWS",
    "MAX_UNPACKED_BYTES",
    "SHEET_ROWS",
    "UNCACHED",
    "UNICODE_DASHES",
    "RawTable",
    "Sheet",
    "normalise_header",
]

#: Most study rows a file may hold (blank rows are not counted).
MAX_ROWS = 1_000_000
#: Most columns a table may have (a column counts when its header or any cell is filled).
MAX_COLUMNS = 1_000
#: Largest file read, in bytes (text files and workbooks alike).
MAX_FILE_BYTES = 512 * 2**20
#: Largest total uncompressed size a workbook's zip directory may declare.
MAX_UNPACKED_BYTES = 2**30
#: Largest uncompressed / compressed ratio of a workbook part larger than 1 MiB. Spreadsheet
#: programs' sheets pack about 5-20 to 1 (even a sheet of one repeated value: 17 to 1); a zip bomb
#: packs about 1000 to 1.
MAX_PACKING_RATIO = 100
#: Most parts (files) a workbook archive may hold.
MAX_ARCHIVE_MEMBERS = 10_000
#: Most rows a worksheet can have (Excel's own limit): a row number beyond it is a crafted file.
SHEET_ROWS = 1_048_576
#: Longest text one cell may hold, in characters (Excel's limit for a cell). A longer cell is
#: refused with the file: no spreadsheet program writes one, and a long text repeated by
#: reference (a shared string) would multiply in every export.
MAX_CELL_CHARS = 32_767

#: The header row is looked for among this many non-blank rows at the top of a sheet.
HEADER_SEARCH_ROWS = 20

# Markup that starts a document type declaration (entity definitions, external references).
# Spreadsheet programs never write one in a workbook part, and text in cells is escaped (&lt;),
# so finding one means the file was crafted.


@dataclass
class RawTable:
    """A table as read from a file, before any validation.

    Attributes
    ----------
    data : one column per header, cells as written (str, int, float, or None for empty).
        Columns are named by :func:`normalise_header` of the header text; a second column whose
        header means the same gets the name ``<name>__<position>`` (see ``duplicates``).
    rows : the spreadsheet row number of each data row (the header is row 1 unless title rows
        stand above it).
    headers : column name -> header text as written in the file.
    source : the path read, or a description of the object given.
    sheet : the worksheet read, for spreadsheets.
    decimal_comma : True when numbers in the file use a decimal comma (``;``-separated text).
    blank_rows : spreadsheet numbers of rows skipped because every cell was empty.
    header_row : spreadsheet number of the header row.
    duplicates : column name -> the names of later columns whose header means the same.
    notes : sentences about the file as a whole (encoding assumed, title rows, merged headers).
    row_notes : ``(position, text)`` about one data row (a hidden row, a merged cell).
    cell_problems : ``(position, column, reason)`` for cells the reader found damaged; the
        validation turns them into row errors.
    source_columns : for each column of ``data``, its 0-based column index in the file.
    """

    data: pd.DataFrame
    rows: np.ndarray
    headers: dict[str, str]
    source: str
    sheet: str | None = None
    decimal_comma: bool = False
    blank_rows: list[int] = field(default_factory=list)
    header_row: int = 1
    duplicates: dict[str, list[str]] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    row_notes: list[tuple[int, str]] = field(default_factory=list)
    cell_problems: list[tuple[int, str, str]] = field(default_factory=list)
    source_columns: list[int] = field(default_factory=list)


def normalise_header(text: object) -> str:
    """Header text -> column name: case-insensitive, spaces, dashes and underscores alike.

    >>> normalise_header("  Planned-N1 ")
    'planned_n1'
    >>> normalise_header("Study ID")
    'study_id'
    """
    s = str(text).strip().lower()
    # Control characters (invisible in a spreadsheet) count as spaces.
    return re.sub(rf"[\s\-_{UNICODE_DASHES}\x00-\x1f\x7f-\x9f]+", "_", s).strip("_")


#: Dashes other than the ASCII hyphen-minus that a header may hold (word processors and
#: spreadsheet autocorrect write them): hyphen, non-breaking hyphen, figure dash, en and em
#: dashes, horizontal bar, minus sign, small and full-width hyphen-minus. Read like '-'.
UNICODE_DASHES = "\u2010\u2011\u2012\u2013\u2014\u2015\u2212\ufe63\uff0d"


@dataclass
class Sheet:
    """Cells of one sheet as rows of values, with what the file says about rows and merges."""

    cells: list[list[object]]
    #: Spreadsheet row number (1-based) of each entry of ``cells``.
    numbers: list[int]
    hidden: set[int] = field(default_factory=set)
    #: Merged ranges as (first row, first column, last row, last column), 1-based, inclusive.
    merges: list[tuple[int, int, int, int]] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    name: str | None = None


def too_many_rows(source: object) -> str:
    return (
        f"{source}: the table has more than {MAX_ROWS:,} study rows, the most one run reads; "
        "split the portfolio into smaller files."
    )


def too_many_columns(source: object, count: int) -> str:
    return (
        f"{source}: the table has {count:,} columns, more than the limit of {MAX_COLUMNS:,}; "
        "remove unused columns."
    )


def too_far_down(source: object, number: int) -> str:
    return (
        f"{source}: the worksheet has a row numbered {number:,}, beyond the {SHEET_ROWS:,} rows "
        "a worksheet can have; the file is damaged or was not written by a spreadsheet program."
    )


def cell_too_long(source: object, where: str, length: int) -> str:
    return (
        f"{source}: {where} holds {length:,} characters, more than the limit of "
        f"{MAX_CELL_CHARS:,} (a spreadsheet cell's maximum); shorten that cell."
    )


def column_letter(index: int) -> str:
    letters = ""
    index += 1
    while index:
        index, rem = divmod(index - 1, 26)
        letters = chr(65 + rem) + letters
    return letters


def sheet_text(sheet: str | None) -> str:
    return f" (sheet '{sheet}')" if sheet else ""


class _Uncached:
    """Marker for a formula cell that has no cached value (the schema reports it)."""

    def __repr__(self) -> str:
        return "formula without a saved value"


UNCACHED = _Uncached()
