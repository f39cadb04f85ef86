"""Read a spreadsheet or delimited text file into a raw table: headers normalised, cells as given.

Only the header and the row bookkeeping are interpreted here; cell values stay as the file wrote
them (text, or numbers for spreadsheet cells) so that :mod:`audit.schema` can report any value it
rejects exactly as the user typed it.
"""

from __future__ import annotations

import csv
import io
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from audit.errors import InputError

__all__ = ["RawTable", "normalise_header", "read_table"]

#: Text files are read with the first encoding that decodes them.
_ENCODINGS = ("utf-8-sig", "utf-16", "cp1252", "latin-1")
_DELIMITERS = ",;\t|"


@dataclass
class RawTable:
    """A table as read from a file, before any validation.

    Attributes
    ----------
    data : one column per header, cells as written (str, int, float, or None for empty).
        Columns are named by :func:`normalise_header` of the header text.
    rows : the spreadsheet row number of each data row (the header is row 1).
    headers : normalised name -> header text as written in the file.
    source : the path read, or a description of the object given.
    sheet : the worksheet read, for spreadsheets.
    decimal_comma : True when numbers in the file use a decimal comma (``;``-separated text).
    blank_rows : spreadsheet numbers of rows skipped because every cell was empty.
    """

    data: pd.DataFrame
    rows: np.ndarray
    headers: dict[str, str]
    source: str
    sheet: str | None = None
    decimal_comma: bool = False
    blank_rows: list[int] = field(default_factory=list)


def normalise_header(text: object) -> str:
    """Header text -> column name: case-insensitive, spaces, dashes and underscores alike.

    >>> normalise_header("  Planned-N1 ")
    'planned_n1'
    >>> normalise_header("Study ID")
    'study_id'
    """
    s = str(text).strip().lower()
    return re.sub(r"[\s\-_]+", "_", s).strip("_")


def read_table(path: str | Path, sheet: str | None = None) -> RawTable:
    """Read ``path`` (.xlsx, .csv, .tsv or .txt) into a :class:`RawTable`.

    Raises
    ------
    InputError
        The file is missing, unreadable, empty or has no header.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such file.")
    if path.is_dir():
        raise InputError(f"{path} is a folder; give a .xlsx, .csv or .tsv file.")
    suffix = path.suffix.lower()
    if suffix in (".xlsx", ".xlsm"):
        cells, sheet_name = _read_xlsx(path, sheet)
        return _to_raw(cells, str(path), sheet_name, decimal_comma=False)
    if suffix == ".xls":
        raise InputError(
            f"{path}: legacy .xls workbooks are not read; save it as .xlsx or .csv and try again."
        )
    if suffix in (".csv", ".tsv", ".txt", ""):
        if sheet is not None:
            raise InputError(f"{path}: --sheet applies to .xlsx workbooks, not to text files.")
        text = _decode(path)
        delimiter = "\t" if suffix == ".tsv" else _sniff_delimiter(text)
        cells = _parse_delimited(text, delimiter)
        return _to_raw(cells, str(path), None, decimal_comma=delimiter == ";")
    raise InputError(f"{path}: unsupported file type '{suffix}'; expected .xlsx, .csv or .tsv.")


def _decode(path: Path) -> str:
    data = path.read_bytes()
    if data[:2] in (b"\xff\xfe", b"\xfe\xff"):
        return data.decode("utf-16")
    for encoding in _ENCODINGS:
        if encoding == "utf-16":
            continue  # only with a byte-order mark (above); otherwise it decodes anything
        try:
            return data.decode(encoding)
        except UnicodeDecodeError:
            continue
    raise InputError(f"{path}: the text encoding could not be recognised; save it as UTF-8.")


def _sniff_delimiter(text: str) -> str:
    sample = "\n".join(text.splitlines()[:50])
    try:
        return csv.Sniffer().sniff(sample, delimiters=_DELIMITERS).delimiter
    except csv.Error:
        header = sample.splitlines()[0] if sample else ""
        counts = {d: header.count(d) for d in _DELIMITERS}
        best = max(counts, key=counts.get)
        return best if counts[best] else ","


def _parse_delimited(text: str, delimiter: str) -> list[list[object]]:
    # The csv module keeps quoted fields intact and, unlike pandas' default, keeps blank lines, so
    # the record number is the row number a spreadsheet program shows for the same file.
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    try:
        return [list(record) for record in reader]
    except csv.Error as exc:
        raise InputError(f"the file could not be parsed as delimited text: {exc}.") from exc


def _read_xlsx(path: Path, sheet: str | None) -> tuple[list[list[object]], str]:
    import zipfile

    from openpyxl import load_workbook

    try:
        book = load_workbook(path, read_only=True, data_only=False)
    except (zipfile.BadZipFile, KeyError, OSError, ValueError) as exc:
        raise InputError(f"{path}: not a readable .xlsx workbook ({exc}).") from exc
    try:
        names = book.sheetnames
        if sheet is None:
            sheet_name = names[0]
        elif sheet in names:
            sheet_name = sheet
        else:
            raise InputError(
                f"{path}: no sheet named '{sheet}'; the sheets are: {', '.join(names)}."
            )
        ws = book[sheet_name]
        cells: list[list[object]] = []
        formulas: list[tuple[int, int]] = []
        for i, row in enumerate(ws.iter_rows()):
            values = []
            for j, cell in enumerate(row):
                if getattr(cell, "data_type", None) == "f":
                    formulas.append((i, j))
                    values.append(None)
                else:
                    values.append(cell.value)
            cells.append(values)
    finally:
        book.close()
    if formulas:
        _fill_cached_values(path, sheet_name, cells, formulas)
    return cells, sheet_name


class _Uncached:
    """Marker for a formula cell that has no cached value (the schema reports it)."""

    def __repr__(self) -> str:
        return "formula without a saved value"


UNCACHED = _Uncached()


def _fill_cached_values(
    path: Path, sheet_name: str, cells: list[list[object]], formulas: list[tuple[int, int]]
) -> None:
    """Replace formula cells by the value the spreadsheet program last computed and saved."""
    from openpyxl import load_workbook

    book = load_workbook(path, read_only=True, data_only=True)
    try:
        wanted = set(formulas)
        for i, row in enumerate(book[sheet_name].iter_rows(values_only=True)):
            for j, value in enumerate(row):
                if (i, j) in wanted:
                    cells[i][j] = UNCACHED if value is None else value
    finally:
        book.close()


def _is_blank(value: object) -> bool:
    return value is None or (isinstance(value, str) and not value.strip())


def _to_raw(
    cells: list[list[object]], source: str, sheet: str | None, *, decimal_comma: bool
) -> RawTable:
    # The header is the first row with anything in it; rows above it are not part of the table.
    header_index = next(
        (i for i, row in enumerate(cells) if any(not _is_blank(v) for v in row)), None
    )
    if header_index is None:
        raise InputError(f"{source}: the file is empty.")
    header = cells[header_index]
    width = max(len(r) for r in cells[header_index:])
    # Columns with neither header nor data (stray empty columns) are dropped; a column with data
    # but no header gets a name from its letter so that nothing is lost.
    names: list[str] = []
    written: list[str] = []
    keep: list[int] = []
    body = cells[header_index + 1 :]
    for j in range(width):
        text = header[j] if j < len(header) else None
        if _is_blank(text):
            if all(j >= len(r) or _is_blank(r[j]) for r in body):
                continue
            text = f"column {_column_letter(j)}"
        keep.append(j)
        written.append(str(text).strip())
        names.append(normalise_header(text))
    seen: dict[str, int] = {}
    for k, name in enumerate(names):
        if name in seen:
            # Two headers that mean the same column: the second keeps its written form, made
            # unique, so it is carried through but never read as the contract column.
            first = written[seen[name]]
            names[k] = f"{name}__{k + 1}"
            written[k] = f"{written[k]} (duplicate of '{first}')"
        else:
            seen[name] = k
    data_rows: list[list[object]] = []
    numbers: list[int] = []
    blank: list[int] = []
    for offset, row in enumerate(body):
        spreadsheet_row = header_index + 2 + offset
        values = [row[j] if j < len(row) else None for j in keep]
        if all(_is_blank(v) for v in values):
            blank.append(spreadsheet_row)
            continue
        data_rows.append(values)
        numbers.append(spreadsheet_row)
    frame = pd.DataFrame(data_rows, columns=names, dtype=object)
    if not len(data_rows):
        frame = pd.DataFrame({name: pd.Series(dtype=object) for name in names})
    return RawTable(
        data=frame,
        rows=np.asarray(numbers, dtype=int),
        headers=dict(zip(names, written, strict=True)),
        source=source,
        sheet=sheet,
        decimal_comma=decimal_comma,
        blank_rows=blank,
    )


def _column_letter(index: int) -> str:
    letters = ""
    index += 1
    while index:
        index, rem = divmod(index - 1, 26)
        letters = chr(65 + rem) + letters
    return letters


def raw_from_frame(df: pd.DataFrame, source: str = "<DataFrame>") -> RawTable:
    """Wrap a DataFrame built in Python (a notebook) as a raw table; rows numbered as if the
    frame were a sheet with its header on row 1."""
    cells: list[list[object]] = [list(df.columns)]
    values = df.astype(object).where(df.notna(), None).to_numpy().tolist()
    cells.extend(values)
    return _to_raw(cells, source, None, decimal_comma=False)
