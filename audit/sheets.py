"""Worksheets to rows of cells: openpyxl's worksheet parser (formulas, hidden rows, merged
ranges), or calamine for a large plain sheet, parsed in a thread while the archive is scanned.
"""

from __future__ import annotations

import contextlib
import warnings
import zipfile
import zlib
from collections.abc import Iterator
from pathlib import Path

from audit.archive import PartScan, check_sizes, scan_archive, scan_part
from audit.errors import InputError
from audit.rawtable import (
    HEADER_SEARCH_ROWS,
    MAX_CELL_CHARS,
    MAX_COLUMNS,
    MAX_ROWS,
    SHEET_ROWS,
    UNCACHED,
    Sheet,
    cell_too_long,
    column_letter,
    too_far_down,
    too_many_columns,
    too_many_rows,
)


def read_xlsx(path: Path, sheet: str | None) -> Sheet:
    """Cells of one worksheet, after the checks of :func:`check_sizes` and :func:`scan_archive`.

    A large worksheet is parsed by calamine in a thread (it releases the interpreter lock)
    while this thread scans the archive's XML; the parse is used only if the scan passes and
    finds the sheet plain (see :func:`_fast_worksheet`).
    """
    with path.open("rb") as handle:
        try:
            archive = zipfile.ZipFile(handle)
        except (zipfile.BadZipFile, OSError, ValueError, EOFError) as exc:
            raise InputError(
                f"{path}: the workbook is damaged or truncated ({exc}); save it again from the "
                "spreadsheet program."
            ) from exc
        with archive:
            early = _EarlyParse()
            try:
                check_sizes(path, archive)
                with early.start(path, archive, sheet):
                    special = scan_archive(path, archive, early.scans)
            except (
                zipfile.BadZipFile,
                zipfile.LargeZipFile,
                zlib.error,
                OSError,
                EOFError,
                ValueError,
                RuntimeError,  # a part encrypted with a zip password
                NotImplementedError,  # a compression method zipfile does not know
            ) as exc:
                raise InputError(
                    f"{path}: the workbook is damaged or truncated ({exc}); save it again."
                ) from exc
            fast = _fast_worksheet(path, archive, sheet, special, early)
        if fast is not None:
            return fast
        from openpyxl import load_workbook

        handle.seek(0)
        try:
            with warnings.catch_warnings():
                # openpyxl warns about features it drops (data validation, styles); reading
                # values does not need them.
                warnings.simplefilter("ignore")
                book = load_workbook(handle, read_only=True, data_only=True)
        except Exception as exc:  # a hostile or damaged file can fail anywhere in the parser
            raise InputError(_workbook_failure(path, exc)) from exc
        try:
            return _read_sheet(path, book, sheet)
        finally:
            book.close()


def _workbook_failure(path: Path, exc: Exception) -> str:
    from defusedxml import DefusedXmlException

    # openpyxl wraps parser errors in its own; defusedxml's refusal is found down the chain.
    cause: BaseException | None = exc
    while cause is not None:
        if isinstance(cause, DefusedXmlException):
            return (
                f"{path}: the workbook declares XML entities or external references; refused "
                "as unsafe."
            )
        cause = cause.__cause__ or cause.__context__
    detail = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    if len(detail) > 120:
        detail = detail[:117] + "..."
    return (
        f"{path}: the workbook could not be read ({detail}); it may be damaged: open and save it "
        "again in the spreadsheet program."
    )


def _read_sheet(path: Path, book: object, sheet: str | None) -> Sheet:
    from openpyxl.worksheet._read_only import ReadOnlyWorksheet

    worksheets = [ws for ws in book.worksheets if isinstance(ws, ReadOnlyWorksheet)]  # type: ignore[attr-defined]
    names = [ws.title for ws in worksheets]
    if not worksheets:
        raise InputError(f"{path}: the workbook has no worksheet with cells.")
    states = [getattr(ws, "sheet_state", "visible") for ws in worksheets]
    index, notes = _choose_sheet(path, names, states, sheet)
    ws = worksheets[index]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            found = _parse_worksheet(path, book, ws)
    except InputError:
        raise
    except Exception as exc:  # damaged sheet XML: any parser error means the same to the user
        raise InputError(_workbook_failure(path, exc)) from exc
    found.notes[:0] = notes
    found.name = ws.title
    return found


#: The first two sheets of the workbook ``check --xlsx`` writes (audit/workbook.py): a file
#: laid out so is read from its second sheet unless ``--sheet`` says otherwise.
EXPORT_FIRST_SHEETS = ("summary", "audit")


def _choose_sheet(
    path: Path, names: list[str], states: list[str], sheet: str | None
) -> tuple[int, list[str]]:
    """Index of the worksheet to read (``sheet``, or the first visible one) and notes."""
    notes: list[str] = []
    if sheet is None and names[:2] == list(EXPORT_FIRST_SHEETS) and states[1] == "visible":
        # A workbook this tool wrote (check --xlsx): its studies are on 'audit', after the
        # one-line-per-study summary a panel reads first. Re-auditing it reads them.
        notes.append(
            f"the workbook is a study-audit export; its '{names[1]}' sheet was read, not "
            + ", ".join(f"'{n}'" for i, n in enumerate(names) if i != 1)
            + " (use --sheet to choose)"
        )
        return 1, notes
    if sheet is None:
        visible = [i for i, state in enumerate(states) if state == "visible"]
        index = visible[0] if visible else 0
        if index != 0:
            notes.append(
                f"the first sheet '{names[0]}' is hidden; the first visible sheet "
                f"'{names[index]}' was read (use --sheet to choose)"
            )
        others = [n for i, n in enumerate(names) if i != index]
        if others:
            notes.append(
                f"the workbook has {len(names)} sheets; '{names[index]}' was read, not "
                + ", ".join(f"'{n}'" for n in others)
                + " (use --sheet to choose)"
            )
        return index, notes
    matches = [i for i, n in enumerate(names) if n == sheet] or [
        i for i, n in enumerate(names) if n.strip().lower() == sheet.strip().lower()
    ]
    if not matches:
        raise InputError(f"{path}: no sheet named '{sheet}'; the sheets are: {', '.join(names)}.")
    return matches[0], notes


def _parse_worksheet(path: Path, book: object, ws: object) -> Sheet:
    """Rows of a worksheet with hidden rows and merged ranges, in one pass over its XML.

    openpyxl's read-only worksheet trusts the sheet's declared dimensions (rows past a wrong
    ``<dimension>`` would be dropped, and a huge one pads every row) and does not report hidden
    rows or merged cells; its sheet parser does all of that, and is used directly here.
    """
    from openpyxl.worksheet._reader import FORMULA_TAG, WorkSheetParser

    class _Parser(WorkSheetParser):
        def parse_cell(self, element):  # type: ignore[no-untyped-def]
            cell = super().parse_cell(element)
            if cell["value"] is None and element.find(FORMULA_TAG) is not None:
                cell["value"] = UNCACHED
            return cell

    cells: list[list[object]] = []
    numbers: list[int] = []
    studies = 0
    with book._archive.open(ws._worksheet_path) as source:  # type: ignore[attr-defined]
        parser = _Parser(
            source,
            ws._shared_strings,  # type: ignore[attr-defined]
            data_only=True,
            epoch=book.epoch,  # type: ignore[attr-defined]
            date_formats=book._date_formats,  # type: ignore[attr-defined]
            timedelta_formats=book._timedelta_formats,  # type: ignore[attr-defined]
        )
        for number, row in parser.parse():
            if int(number) > SHEET_ROWS:
                # Refused before the rows in between are counted as blank (a run of two
                # billion blank rows would not fit in memory).
                raise InputError(too_far_down(path, int(number)))
            # Styled but empty cells (formatting applied to a whole column) are not data.
            filled = {c["column"]: c["value"] for c in row if c["value"] is not None}
            if not filled:
                continue
            width = max(filled)
            if width > MAX_COLUMNS:
                raise InputError(too_many_columns(path, width))
            for column, value in filled.items():
                if isinstance(value, str) and len(value) > MAX_CELL_CHARS:
                    where = f"cell {column_letter(column - 1)}{number}"
                    raise InputError(cell_too_long(path, where, len(value)))
            values: list[object] = [None] * width
            for column, value in filled.items():
                values[column - 1] = value
            studies += 1
            if studies > MAX_ROWS + HEADER_SEARCH_ROWS:
                raise InputError(too_many_rows(path))
            cells.append(values)
            numbers.append(int(number))
        hidden = {
            int(r)
            for r, attrs in parser.row_dimensions.items()
            if str(attrs.get("hidden", "0")).lower() in ("1", "true")
        }
        merges: list[tuple[int, int, int, int]] = []
        if parser.merged_cells is not None:
            for merged in parser.merged_cells.mergeCell:
                bounds = _range_bounds(merged.ref)
                if bounds is not None:
                    merges.append(bounds)
    return Sheet(cells, numbers, hidden, merges)


#: Worksheets whose XML is at least this large (some 3,000 rows) are read with calamine.
FAST_READ_MIN_BYTES = 2_000_000


def _sheet_parts(archive: zipfile.ZipFile) -> list[tuple[str, str, str]]:
    """(name, state, part path) of each worksheet, from workbook.xml and its relationships."""
    from defusedxml import ElementTree

    main = "{http://schemas.openxmlformats.org/spreadsheetml/2006/main}"
    rel = "{http://schemas.openxmlformats.org/officeDocument/2006/relationships}"
    pkg = "{http://schemas.openxmlformats.org/package/2006/relationships}"
    book = ElementTree.fromstring(archive.read("xl/workbook.xml"))
    rels = ElementTree.fromstring(archive.read("xl/_rels/workbook.xml.rels"))
    targets = {r.get("Id"): r.get("Target", "") for r in rels.iter(f"{pkg}Relationship")}
    out = []
    for element in book.iter(f"{main}sheet"):
        target = targets.get(element.get(f"{rel}id"), "")
        part = target.lstrip("/") if target.startswith("/") else f"xl/{target}"
        out.append((element.get("name", ""), element.get("state", "visible"), part))
    return out


def _large_sheet(
    path: Path, archive: zipfile.ZipFile, sheet: str | None
) -> tuple[str, str, list[str]] | None:
    """(name, part path, notes) of the worksheet to read if its XML is large enough for
    calamine (:data:`FAST_READ_MIN_BYTES`), else None."""
    parts = _sheet_parts(archive)
    names = [name for name, _, _ in parts]
    index, notes = _choose_sheet(path, names, [state for _, state, _ in parts], sheet)
    name, _, part = parts[index]
    if archive.getinfo(part).file_size < FAST_READ_MIN_BYTES:
        return None
    return name, part, notes


def _calamine_rows(path: Path, name: str) -> list[list[object]]:
    """All rows of the worksheet ``name``, as calamine reads them."""
    import python_calamine

    workbook = python_calamine.CalamineWorkbook.from_path(str(path))
    try:
        return workbook.get_sheet_by_name(name).to_python(skip_empty_area=False)
    finally:
        workbook.close()


class _EarlyParse:
    """calamine's parse of a large worksheet, run in a thread while the archive is scanned.

    Started only after the declared sizes passed (:func:`check_sizes`); calamine does not
    expand XML entities, so a part the scan then refuses has done no harm. Anything unusual
    (no calamine, a sheet that cannot be chosen) starts nothing, and :func:`_fast_worksheet`
    decides again after the scan, as it would without this.
    """

    def __init__(self) -> None:
        self.target: tuple[str, str, list[str]] | None = None
        self.ready = False  # target is the answer of _large_sheet
        self._rows: list[list[object]] | None = None
        self._error: BaseException | None = None
        self._thread: object = None
        self.scans: dict[str, PartScan] = {}  # parts scanned before the parse was started

    @contextlib.contextmanager
    def start(self, path: Path, archive: zipfile.ZipFile, sheet: str | None) -> Iterator[None]:
        """Scan the worksheet (and the shared strings) first; start the parse only where
        calamine reads the sheet as the careful reader would and its grid fits in memory
        (:meth:`PartScan.plain`); wait for it on exit."""
        import threading

        try:
            import python_calamine  # noqa: F401

            self.target, self.ready = _large_sheet(path, archive, sheet), True
        except Exception:  # decided again after the scan, with errors reported then
            self.target, self.ready = None, False
        if self.target is not None:
            self.scans = _first_scans(archive, self.target[1])
            if not _plain(self.scans, self.target[1]):
                self.target = None
        thread = None
        if self.target is not None:
            thread = threading.Thread(target=self._parse, args=(path, self.target[0]), daemon=True)
            thread.start()
        try:
            yield
        finally:
            if thread is not None:
                thread.join()

    def _parse(self, path: Path, name: str) -> None:
        try:
            self._rows = _calamine_rows(path, name)
        except BaseException as exc:  # reported as "no fast read" (the careful path decides)
            self._error = exc

    def rows(self) -> list[list[object]]:
        """The parsed rows; the parse's exception if it failed."""
        if self._error is not None:
            raise self._error
        assert self._rows is not None
        return self._rows


def _fast_worksheet(
    path: Path,
    archive: zipfile.ZipFile,
    sheet: str | None,
    special: dict[str, PartScan],
    early: _EarlyParse | None = None,
) -> Sheet | None:
    """Rows of a large, plain worksheet read by calamine (a Rust reader), or None.

    openpyxl's Python parser takes 20 s and more for 100,000 rows of 40 columns (it even parses
    a whole sheet to learn its size when the file does not declare it); calamine reads the same
    sheet in about a second. It is used only for a sheet of at least
    :data:`FAST_READ_MIN_BYTES` of XML with no formula, no hidden row and no merged range
    (checked on the XML first): those are what the openpyxl path reports on (a formula without
    a saved value, hidden rows, merges), so a sheet without them reads the same either way. The
    archive has passed the safety checks before (size, ratio, no DTD), and calamine does not
    expand XML entities in any case. ``early``: the parse already started during the checks
    (:class:`_EarlyParse`). Anything unexpected falls back on the openpyxl path.
    """
    try:
        import python_calamine  # noqa: F401
    except ImportError:  # an installation without it reads with openpyxl, only slower
        return None
    try:
        started = early is not None and early.ready
        target = early.target if started else _large_sheet(path, archive, sheet)
        if target is None or not _plain(special, target[1]):
            return None
        name, _, notes = target
        rows = early.rows() if started else _calamine_rows(path, name)
    except InputError:
        raise
    except Exception:  # an unusual workbook: the careful path reads it or says why not
        return None
    # calamine gives empty cells as "": blank text, as the rest of the reader takes it.
    width = max((len(r) for r in rows), default=0)
    if width > MAX_COLUMNS:
        raise InputError(too_many_columns(path, width))
    # Blank rows do not count (a value far down leaves a run of them), as on the careful path.
    most = MAX_ROWS + HEADER_SEARCH_ROWS
    if len(rows) > most and _filled_rows(rows) > most:
        raise InputError(too_many_rows(path))
    return Sheet(rows, list(range(1, len(rows) + 1)), notes=notes, name=name)


_SHARED_STRINGS = "xl/sharedStrings.xml"


def _first_scans(archive: zipfile.ZipFile, part: str) -> dict[str, PartScan]:
    """Scans of the worksheet ``part`` and the shared strings, before calamine may start."""
    scans = {}
    for name in (part, _SHARED_STRINGS):
        with contextlib.suppress(KeyError):
            scans[name] = scan_part(archive, archive.getinfo(name))
    return scans


def _plain(scans: dict[str, PartScan], part: str) -> bool:
    """The worksheet is plain (:meth:`PartScan.plain`) and no shared string is too long."""
    sheet = scans.get(part)
    strings = scans.get(_SHARED_STRINGS)
    if sheet is None or not isinstance(sheet, PartScan) or not sheet.plain():
        return False
    return strings is None or strings.longest_text <= MAX_CELL_CHARS


def _filled_rows(rows: list[list[object]]) -> int:
    from audit.tabulate import blank_mask

    return int((~blank_mask(rows)).sum())


def _range_bounds(ref: str) -> tuple[int, int, int, int] | None:
    from openpyxl.utils.cell import range_boundaries

    try:
        min_col, min_row, max_col, max_row = range_boundaries(ref)
    except (ValueError, TypeError):
        return None
    if None in (min_col, min_row, max_col, max_row):
        return None
    return int(min_row), int(min_col), int(max_row), int(max_col)
