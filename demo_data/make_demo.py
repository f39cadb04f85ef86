"""Rebuild demo_portfolio.csv and demo_portfolio.xlsx from studies.toml (run after editing it).

    python demo_data/make_demo.py

``studies.toml`` holds one ``[[study]]`` table per invented study with only the columns it fills;
adding a study or a column touches only the studies concerned. The CSV lists every contract
column (in the order of the input template, after the study's identity and its ``field``), so
that it also shows the whole layout; the workbook carries the same cells, numbers as numbers,
with a styled header. ``tests/test_outputs.py`` checks that both files are up to date and audit
alike.
"""

from __future__ import annotations

import csv
import io
import sys
import tomllib
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from audit.schema import COLUMNS  # noqa: E402  (the checkout's package, not an installed one)

FIRST = ("study_id", "title", "field", "design")


def studies() -> list[dict[str, object]]:
    with (HERE / "studies.toml").open("rb") as handle:
        return tomllib.load(handle)["study"]


def header(rows: list[dict[str, object]]) -> list[str]:
    names = [*FIRST, *(c.name for c in COLUMNS if c.name not in FIRST)]
    for row in rows:
        names.extend(k for k in row if k not in names)
    return names


def _text(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value)
    return str(value)


def csv_text(rows: list[dict[str, object]]) -> str:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    names = header(rows)
    writer.writerow(names)
    for row in rows:
        writer.writerow([_text(row.get(name)) for name in names])
    return out.getvalue()


def write_workbook(rows: list[dict[str, object]], path: Path) -> None:
    from openpyxl import Workbook
    from openpyxl.styles import Font, PatternFill

    names = header(rows)
    wb = Workbook()
    ws = wb.active
    ws.title = "studies"
    ws.append(names)
    for cell in ws[1]:
        cell.font = Font(bold=True)
        cell.fill = PatternFill("solid", fgColor="E8EEF4")
    for row in rows:
        ws.append([row.get(name) for name in names])
    ws.freeze_panes = "C2"
    ws.column_dimensions["B"].width = 60
    wb.save(path)


def main() -> None:
    rows = studies()
    (HERE / "demo_portfolio.csv").write_text(csv_text(rows), encoding="utf-8")
    write_workbook(rows, HERE / "demo_portfolio.xlsx")


if __name__ == "__main__":
    main()
