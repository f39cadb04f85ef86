"""Rows of cells to a raw table: the header row found, blank rows skipped and counted, row
numbers kept, merged and hidden rows noted; a DataFrame given from Python wrapped the same way.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd

from audit.errors import InputError
from audit.rawtable import (
    HEADER_SEARCH_ROWS,
    MAX_COLUMNS,
    MAX_ROWS,
    UNICODE_DASHES,
    RawTable,
    Sheet,
    column_letter,
    normalise_header,
    sheet_text,
    too_many_columns,
    too_many_rows,
)


def _row_is_blank(values: list[object]) -> bool:
    """True when no cell of the row holds anything.

    Cell by cell, stopping at the first filled one: a study row's first cell (its study_id)
    usually decides, so a million rows cost a million short loops.
    """
    for value in values:
        if value is None or (isinstance(value, str) and not value.strip()):
            continue
        return False
    return True


def blank_mask(rows: list[list[object]]) -> np.ndarray:
    """For each row, True when no cell holds anything.

    Text rows (every row of a delimited file) are joined and tested by C-level maps, with no
    Python code per row; ``str.isspace`` and ``str.strip`` agree on what whitespace is.
    """
    out = np.zeros(len(rows), dtype=bool)
    # In slices of rows, so that the joined texts never take much memory at once.
    for start in range(0, len(rows), 10_000):
        part = rows[start : start + 10_000]
        try:
            joined = list(map("".join, part))  # type: ignore[arg-type]
        except TypeError:  # numbers, None or other cell values from a workbook
            return np.fromiter(map(_row_is_blank, rows), dtype=bool, count=len(rows))
        empty = np.fromiter(map(len, joined), dtype=np.int64, count=len(part)) == 0
        out[start : start + len(part)] = empty | np.fromiter(
            map(str.isspace, joined), dtype=bool, count=len(part)
        )
    return out


def _blank_numbers(numbers: list[int], blank_row: np.ndarray, last: int) -> list[int]:
    """Spreadsheet numbers of the blank rows, in order: the rows found blank and the rows the
    sheet does not store at all (a gap in an .xlsx), which are blank rows too."""
    at = np.fromiter(numbers, dtype=np.int64, count=len(numbers))
    before = np.concatenate(([last], at[:-1]))
    # Only rows that are blank or follow a gap need a look (none, in most files).
    out: list[int] = []
    for i in np.flatnonzero(blank_row | (at - before > 1)):
        out.extend(range(int(before[i]) + 1, numbers[i]))
        if blank_row[i]:
            out.append(numbers[i])
    return out


def _frame(rows: list[list[object]], width: int) -> pd.DataFrame:
    """Rows as an object frame of ``width`` columns (0..width-1), short rows padded with None."""
    lengths = np.fromiter(map(len, rows), dtype=np.int64, count=len(rows))
    short = np.flatnonzero(lengths < width)
    if len(short):  # few rows in a usual file: only they are copied
        rows = list(rows)
        for i in short.tolist():
            rows[i] = [*rows[i], *([None] * (width - len(rows[i])))]
    # One 2-D object array filled from the rows in one step (numpy's C loop), then a frame on
    # it without a copy: a quarter of the time DataFrame(rows) takes.
    cells = np.empty((len(rows), width), dtype=object)
    if len(rows) and width:
        cells[:] = rows
    return pd.DataFrame(cells, columns=range(width), dtype=object, copy=False)


def _has_data(values: np.ndarray) -> bool:
    """True when any cell of a column is not blank; looked at per distinct value."""
    try:
        codes, uniques = pd.factorize(values)
    except TypeError:  # an unhashable cell (a list in a DataFrame given from Python)
        return not all(_is_blank(v) for v in values)
    if not all(_is_blank(v) for v in uniques):
        return True
    # factorize sets every missing-value marker aside; only None is a blank cell.
    return any(v is not None for v in values[codes < 0])


def _is_blank(value: object) -> bool:
    return value is None or (isinstance(value, str) and not value.strip())


def _find_header(sheet: Sheet) -> int | None:
    """Index in ``sheet.cells`` of the header row.

    The header is the first row naming both ``study_id`` and ``design`` among the first
    ``HEADER_SEARCH_ROWS`` non-blank rows (title lines may stand above it); failing that, the
    first non-blank row (the validation then says which required column is missing).
    """
    first = None
    seen = 0
    for i, row in enumerate(sheet.cells):
        if all(_is_blank(v) for v in row):
            continue
        if first is None:
            first = i
        names = {normalise_header(v) for v in row if not _is_blank(v)}
        if {"study_id", "design"} <= names:
            return i
        seen += 1
        if seen >= HEADER_SEARCH_ROWS:
            break
    return first


def _header_texts(sheet: Sheet, h: int, width: int) -> tuple[list[object], int, list[str]]:
    """Header text per column, the number of header rows (1 or 2), and notes.

    A header cell merged across several columns names a group. When the row below holds text
    only under such groups, the two rows form one header ("Planned" over "n1" gives
    "Planned n1"); otherwise the columns a merged header cell covers have no header of their own.
    """
    number = sheet.numbers[h]
    header = list(sheet.cells[h]) + [None] * (width - len(sheet.cells[h]))
    across = [m for m in sheet.merges if m[0] == number and m[3] > m[1]]
    if not across:
        return header, 1, []
    notes: list[str] = []
    group = {}
    for _r0, c0, _r1, c1 in across:
        for c in range(c0, c1 + 1):
            group[c - 1] = header[c0 - 1] if c0 - 1 < len(header) else None
    below_index = h + 1
    below = (
        list(sheet.cells[below_index]) + [None] * width
        if below_index < len(sheet.cells) and sheet.numbers[below_index] == number + 1
        else None
    )
    if below is not None:
        filled = [j for j in range(width) if not _is_blank(below[j])]
        keys = {j for j in range(width) if normalise_header(header[j]) in ("study_id", "design")}
        # Sub-headings are text, and stand where no study could: a study row always fills its
        # study_id and design cells.
        if filled and all(isinstance(below[j], str) for j in filled) and not keys & set(filled):
            names = []
            for j in range(width):
                top = group.get(j, header[j])
                bottom = below[j]
                parts = [str(p).strip() for p in (top, bottom) if not _is_blank(p)]
                names.append(" ".join(parts) if parts else None)
            notes.append(
                f"rows {number} and {number + 1} form the header: a merged group title over "
                "sub-headings (e.g. "
                + ", ".join(f"'{names[j]}'" for j in filled[:2] if names[j] is not None)
                + ")"
            )
            return names, 2, notes
    for _r0, c0, _r1, c1 in across:
        letters = f"{column_letter(c0 - 1)}{number}:{column_letter(c1 - 1)}{number}"
        notes.append(
            f"the header cell {letters} is merged across {c1 - c0 + 1} columns; only its first "
            f"column is named '{header[c0 - 1]}', the others have no header of their own"
        )
    return header, 1, notes


def to_raw(
    sheet: Sheet,
    source: str,
    sheet_name: str | None,
    *,
    decimal_comma: bool,
    header_index: int | None = None,
) -> RawTable:
    cells = sheet.cells
    h = _find_header(sheet) if header_index is None else header_index
    if h is None:
        raise InputError(
            f"{source}{sheet_text(sheet_name)}: the file is empty (no cell holds anything)."
        )
    width = max(map(len, cells[h:]), default=0)
    header, header_rows, notes = _header_texts(sheet, h, width)
    notes = list(sheet.notes) + notes
    header_number = sheet.numbers[h]
    titles = [sheet.numbers[i] for i in range(h) if not all(_is_blank(v) for v in cells[i])]
    if titles:
        notes.append(
            f"the header is on row {header_number}; "
            + ("row " if len(titles) == 1 else "rows ")
            + ", ".join(str(t) for t in titles)
            + " above it "
            + ("was" if len(titles) == 1 else "were")
            + " read as a title, not as studies"
        )
    body = cells[h + header_rows :]
    body_numbers = sheet.numbers[h + header_rows :]
    blank_row = blank_mask(body)
    data_rows, numbers = body, body_numbers
    if blank_row.any():
        data_rows = list(itertools.compress(body, ~blank_row))
        numbers = list(itertools.compress(body_numbers, ~blank_row))
    blank = _blank_numbers(body_numbers, blank_row, header_number + header_rows - 1)
    # One frame of every column, rows padded to the width with None; the columns kept are
    # taken from it below.
    full = _frame(data_rows, width)
    # Columns with neither header nor data (stray empty columns) are dropped; a column with data
    # but no header gets a name from its letter so that nothing is lost. (Blank rows have no
    # data, so the rows of the frame are all that need looking at.)
    names: list[str] = []
    written: list[str] = []
    keep: list[int] = []
    for j in range(width):
        text = header[j] if j < len(header) else None
        if _is_blank(text):
            if not _has_data(full[j].to_numpy()):
                continue
            text = f"column {column_letter(j)}"
        keep.append(j)
        written.append(str(text).strip())
        names.append(normalise_header(text) or f"column_{column_letter(j).lower()}")
        dashes = sorted({ch for ch in str(text) if ch in UNICODE_DASHES})
        if dashes:
            codes = ", ".join(f"U+{ord(ch):04X}" for ch in dashes)
            notes.append(
                f"the header '{str(text).strip()}' (column {column_letter(j)}) holds a dash "
                f"other than '-' ({codes}); it was read like '-', as {names[-1]}"
            )
    if len(keep) > MAX_COLUMNS:
        raise InputError(too_many_columns(source, len(keep)))
    seen: dict[str, int] = {}
    duplicates: dict[str, list[str]] = {}
    for k, name in enumerate(names):
        if name in seen:
            # Two headers that mean the same column: the second is carried under a unique name
            # and the validation compares it with the first (see RawTable.duplicates).
            first = written[seen[name]]
            names[k] = f"{name}__{k + 1}"
            written[k] = f"{written[k]} (duplicate of '{first}')"
            duplicates.setdefault(name, []).append(names[k])
        else:
            seen[name] = k
    if len(data_rows) > MAX_ROWS:
        raise InputError(too_many_rows(source))
    frame = full if keep == list(range(width)) else full.iloc[:, keep]
    frame.columns = names
    if not len(data_rows):
        frame = pd.DataFrame({name: pd.Series(dtype=object) for name in names})
    table = RawTable(
        data=frame,
        rows=np.asarray(numbers, dtype=int),
        headers=dict(zip(names, written, strict=True)),
        source=source,
        sheet=sheet_name,
        decimal_comma=decimal_comma,
        blank_rows=blank,
        header_row=header_number,
        duplicates=duplicates,
        notes=notes,
        source_columns=keep,
    )
    table.row_notes.extend(_sheet_row_notes(sheet, numbers, keep, names, header_number))
    return table


def _sheet_row_notes(
    sheet: Sheet, numbers: list[int], keep: list[int], names: list[str], header_number: int
) -> list[tuple[int, str]]:
    """Notes on data rows that are hidden, or hold cells covered by a merged range."""
    if not sheet.hidden and not sheet.merges:
        return []
    pos_of_row = {r: i for i, r in enumerate(numbers)}
    out: list[tuple[int, str]] = []
    for r in sorted(sheet.hidden):
        if r in pos_of_row:
            out.append(
                (pos_of_row[r], "the row is hidden in the workbook; it was audited like any other")
            )
    column_of = {j + 1: names[k] for k, j in enumerate(keep)}
    for r0, c0, r1, c1 in sheet.merges:
        anchor = f"{column_letter(c0 - 1)}{r0}"
        span = f"{anchor}:{column_letter(c1 - 1)}{r1}"
        for r in range(max(r0, header_number + 1), r1 + 1):
            if r not in pos_of_row:
                continue
            covered = [
                column_of[c] for c in range(c0, c1 + 1) if c in column_of and (r, c) != (r0, c0)
            ]
            if covered:
                out.append(
                    (
                        pos_of_row[r],
                        f"{', '.join(covered)}: covered by the merged cell {span}, so blank in "
                        f"the file (a merged range keeps only the value of {anchor})",
                    )
                )
    return out


def raw_from_frame(df: pd.DataFrame, source: str = "<DataFrame>") -> RawTable:
    """Wrap a DataFrame built in Python (a notebook) as a raw table; rows numbered as if the
    frame were a sheet with its header on row 1."""
    cells: list[list[object]] = [list(df.columns)]
    values = df.astype(object).where(df.notna(), None).to_numpy().tolist()
    cells.extend(values)
    numbers = list(range(1, len(cells) + 1))
    return to_raw(Sheet(cells, numbers), source, None, decimal_comma=False, header_index=0)
