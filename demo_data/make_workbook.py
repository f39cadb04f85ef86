"""Rebuild demo_portfolio.xlsx from demo_portfolio.csv (run after editing the CSV).

    python demo_data/make_workbook.py

The CSV is the source; the workbook carries the same cells (numbers as numbers, text as text)
with a styled header, so that the demo can be opened in a spreadsheet program. A test checks
that both audit to the same metrics.
"""

from __future__ import annotations

import csv
from pathlib import Path

from openpyxl import Workbook
from openpyxl.styles import Font, PatternFill

HERE = Path(__file__).resolve().parent


def _cell(text: str) -> object:
    if text == "":
        return None
    try:
        number = float(text)
    except ValueError:
        return text
    return int(number) if number.is_integer() and "." not in text else number


def main() -> None:
    with (HERE / "demo_portfolio.csv").open(newline="", encoding="utf-8") as handle:
        rows = list(csv.reader(handle))
    wb = Workbook()
    ws = wb.active
    ws.title = "studies"
    ws.append(rows[0])
    for cell in ws[1]:
        cell.font = Font(bold=True)
        cell.fill = PatternFill("solid", fgColor="E8EEF4")
    for row in rows[1:]:
        ws.append([_cell(v) for v in row])
    ws.freeze_panes = "C2"
    ws.column_dimensions["B"].width = 60
    wb.save(HERE / "demo_portfolio.xlsx")


if __name__ == "__main__":
    main()
