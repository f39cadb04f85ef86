"""The annotated workbook read back as a spreadsheet program reads it (issue 19).

openpyxl reads the file's layout (frozen panes, filters, widths, row heights, cell types);
where LibreOffice is installed, it opens and converts the file as a user's copy would.
"""

from __future__ import annotations

import csv
import math
import shutil
import subprocess

import numpy as np
import pytest
from openpyxl import load_workbook

import audit
from audit import pipeline
from audit.read import read_table
from audit.resources import bundled_dir
from audit.workbook import SHEETS, WorkbookExport, row_heights, write_workbook

DEMO = bundled_dir("demo_data") / "demo_portfolio.csv"
SEVERITY = {"note": 0, "warning": 1, "serious": 2}


@pytest.fixture(scope="module")
def demo() -> audit.AuditResult:
    return audit.audit_file(DEMO)


@pytest.fixture(scope="module")
def book_path(demo, tmp_path_factory):
    out = tmp_path_factory.mktemp("wb") / "audit.xlsx"
    write_workbook(demo, out)
    return out


@pytest.fixture(scope="module")
def book(book_path):
    return load_workbook(book_path)


def _header(ws) -> dict[str, int]:
    return {c.value: c.column for c in ws[1]}


def test_sheets_in_reading_order(book):
    assert book.sheetnames == list(SHEETS)
    assert book.sheetnames[0] == "summary"


@pytest.mark.parametrize("sheet", ["summary", "audit", "portfolio", "rules", "invalid rows"])
def test_every_table_sheet_has_frozen_header_filter_and_widths(book, sheet):
    ws = book[sheet]
    # The header row stays in view (row 2 is the first scrolling row).
    assert ws.freeze_panes is not None and ws.freeze_panes.endswith("2")
    # The filter covers the header and every written row and column.
    assert ws.auto_filter.ref == f"A1:{ws.cell(1, ws.max_column).column_letter}{ws.max_row}"
    widths = [ws.column_dimensions[ws.cell(1, j).column_letter].width for j in (1, 2)]
    assert all(w and w > 5 for w in widths)


def test_wrapped_cells_get_rows_tall_enough_for_every_line(book):
    # A wrapped cell whose row keeps the default height shows one line in LibreOffice; every
    # line of every multi-line cell must fit (15 points a line of the default 11-point font,
    # up to the 409-point maximum of a row).
    checked = 0
    for name in ("summary", "audit", "rules", "invalid rows"):
        ws = book[name]
        for row in ws.iter_rows(min_row=2):
            for cell in row:
                if isinstance(cell.value, str) and cell.alignment.wrap_text:
                    lines = cell.value.count("\n") + 1
                    if lines > 1:
                        height = ws.row_dimensions[cell.row].height
                        assert height is not None, (name, cell.coordinate)
                        assert height >= min(15 * lines, 408), (name, cell.coordinate)
                        checked += 1
    assert checked > 50  # the demo's findings and notes run over several lines


def test_multiline_findings_are_wrapped_not_cut(book, demo):
    ws = book["audit"]
    col = _header(ws)["findings"]
    cells = [ws.cell(r, col) for r in range(2, ws.max_row + 1)]
    many = [c for c in cells if isinstance(c.value, str) and "\n" in c.value]
    assert many and all(c.alignment.wrap_text for c in many)
    # Every finding of the audit is in its row's cell, one per line.
    counts = np.bincount(demo.findings["pos"].to_numpy(int), minlength=len(demo.table))
    lines = [0 if c.value is None else c.value.count("\n") + 1 for c in cells]
    assert lines == counts.tolist()


def test_numbers_are_stored_as_numbers(book, demo):
    ws = book["audit"]
    col = _header(ws)
    for name in ("sides", "alpha", "planned_n1", "row", "power_at_planned_effect", "mde"):
        values = [ws.cell(r, col[name]).value for r in range(2, ws.max_row + 1)]
        filled = [v for v in values if v is not None]
        assert filled and all(isinstance(v, (int, float)) for v in filled), name
    # sides read from the CSV as the text "2" comes back as the number 2.
    sides = [ws.cell(r, col["sides"]).value for r in range(2, ws.max_row + 1)]
    assert set(sides) - {None} <= {1, 2}
    # Identifiers that are not a number's own spelling stay text.
    assert all(isinstance(ws.cell(r, col["study_id"]).value, str) for r in range(2, 6))


def test_summary_has_one_line_per_study_with_power_mde_and_worst_finding(book, demo):
    ws = book["summary"]
    col = _header(ws)
    assert list(col)[:3] == ["study_id", "title", "design"]
    rows = list(ws.iter_rows(min_row=2, values_only=True))
    assert len(rows) == len(demo.table)
    ids = demo.table["study_id"].tolist()
    assert [r[col["study_id"] - 1] for r in rows] == ids
    power = demo.metrics["power_at_planned_effect"].to_numpy(float)
    mde = demo.metrics["mde"].to_numpy(float)
    for i, r in enumerate(rows):
        got = r[col["power at planned effect"] - 1]
        if math.isfinite(power[i]):
            assert got == pytest.approx(power[i], rel=1e-12)
        else:
            assert got is None
        got = r[col["MDE"] - 1]
        assert (got is None) if not math.isfinite(mde[i]) else got == pytest.approx(mde[i])
    # The most severe finding: its severity is the row's highest (checked independently from
    # the findings table), and an invalid row says why it was not audited.
    findings = demo.findings
    for i, r in enumerate(rows):
        mine = findings[findings["pos"] == i]
        text = r[col["most severe finding"] - 1]
        if demo.status[i] != "audited":
            assert text.startswith("not audited: ")
        elif len(mine):
            worst = max(mine["severity"], key=SEVERITY.get)
            assert r[col["highest severity"] - 1] == worst
            assert text.split(" (", 1)[0] in set(mine.loc[mine["severity"] == worst, "rule"])
        else:
            assert text is None


def test_rules_sheet_rows_show_their_whole_rationale(book, demo):
    ws = book["rules"]
    col = _header(ws)
    width = ws.column_dimensions["D"].width
    assert col["why it matters"] == 4
    for r in range(2, ws.max_row + 1):
        text = ws.cell(r, 4).value
        # Characters per line about the column width: the row must hold every wrapped line.
        lines = sum(max(1, math.ceil(len(p) / width)) for p in text.split("\n"))
        assert ws.row_dimensions[r].height >= min(15 * lines, 408)


def test_row_heights_counts_wrapped_lines():
    heights = row_heights([(["", "a\nb\nc", "x" * 45], 10)], 3)
    # 45 characters in a 10-wide column (9 a line) take 5 lines.
    assert heights == [None, 45.0, 75.0]
    assert row_heights([(["\n" * 100], 10)], 1) == [409.0]


def test_parts_written_one_by_one_give_the_one_part_workbook(demo, tmp_path):
    # Streaming (constant memory): the command line adds the studies part by part.
    whole, parts = tmp_path / "whole.xlsx", tmp_path / "parts.xlsx"
    write_workbook(demo, whole)
    with WorkbookExport(parts, []) as export:
        result = pipeline.audit_stream(read_table(DEMO), chunk_rows=7, on_part=export.add)
        export.finish(result)
    a, b = load_workbook(whole), load_workbook(parts)
    for name in ("summary", "audit"):
        for x, y in zip(a[name].values, b[name].values, strict=True):
            # Parts agree with one pass to about 1e-11 (DEVELOPERS.md, "Chunks give one pass's
            # result"): numbers compared with that tolerance, text exactly.
            assert [
                v if v is None or isinstance(v, str) else pytest.approx(v, rel=1e-9) for v in x
            ] == list(y)
        assert a[name].auto_filter.ref == b[name].auto_filter.ref
        assert (
            dict(a[name].row_dimensions.items()).keys()
            == dict(b[name].row_dimensions.items()).keys()
        )


SOFFICE = shutil.which("soffice") or shutil.which("libreoffice")


@pytest.mark.skipif(SOFFICE is None, reason="LibreOffice (soffice) is not installed")
def test_libreoffice_opens_the_workbook_as_written(book_path, demo, tmp_path):
    profile = tmp_path / "profile"
    # Every sheet to CSV (the -1 of the filter options), then the file to xlsx again: what
    # LibreOffice keeps is what it read.
    for target in (
        "csv:Text - txt - csv (StarCalc):44,34,76,1,,0,false,true,true,false,false,-1",
        "xlsx",
    ):
        done = subprocess.run(
            [
                SOFFICE,
                f"-env:UserInstallation={profile.as_uri()}",
                "--headless",
                "--convert-to",
                target,
                "--outdir",
                str(tmp_path / "out"),
                str(book_path),
            ],
            capture_output=True,
            text=True,
            timeout=180,
            check=False,
        )
        assert done.returncode == 0, done.stderr
    with (tmp_path / "out" / "audit-summary.csv").open(newline="", encoding="utf-8") as handle:
        rows = list(csv.reader(handle))
    assert rows[0][:3] == ["study_id", "title", "design"]
    assert [r[0] for r in rows[1:]] == demo.table["study_id"].tolist()
    # The power is a number shown with its format (three decimals), not text.
    power = demo.metrics["power_at_planned_effect"].to_numpy(float)
    shown = [r[4] for r in rows[1:]]
    assert [s for s, p in zip(shown, power, strict=True) if math.isfinite(p)] == [
        f"{p:.3f}" for p in power if math.isfinite(p)
    ]
    again = load_workbook(tmp_path / "out" / "audit.xlsx")
    assert again.sheetnames == list(SHEETS)
    original = load_workbook(book_path)
    for name in ("summary", "audit", "rules"):
        ws, mine = again[name], original[name]
        # (Frozen panes are view settings, which a headless conversion does not write back.)
        assert ws.auto_filter.ref == mine.auto_filter.ref
        for r, dim in mine.row_dimensions.items():
            if dim.height:
                assert ws.row_dimensions[r].height == pytest.approx(dim.height, abs=1)
