"""Outputs people use: annotated workbook, input template, referee text, plots, the demo."""

from __future__ import annotations

import csv
import json

import numpy as np
import pandas as pd
import pytest
from openpyxl import load_workbook

import audit
from audit.cli import main
from audit.metrics import TEXT_METRICS
from audit.report import key_numbers
from audit.resources import bundled_dir
from audit.respond import format_p, respond_text
from audit.schema import COLUMNS
from audit.template import EXAMPLES, write_template
from audit.workbook import write_workbook

DEMO = bundled_dir("demo_data") / "demo_portfolio.csv"
DEMO_XLSX = bundled_dir("demo_data") / "demo_portfolio.xlsx"
FORMULA_LIKE = [
    '=HYPERLINK("http://example.org","x")',
    "@SUM(A1:A3)",
    "+1 booster arm",
    "-minus arm first",
]


def _same_metrics(a: audit.AuditResult, b: audit.AuditResult) -> None:
    assert list(a.status) == list(b.status)
    for name in a.metrics.columns:
        x, y = a.metrics[name], b.metrics[name]
        if name in TEXT_METRICS:
            assert x.fillna("").tolist() == y.fillna("").tolist()
        else:
            np.testing.assert_array_equal(x.to_numpy(float), y.to_numpy(float), err_msg=name)


@pytest.fixture(scope="module")
def demo() -> audit.AuditResult:
    return audit.audit_file(DEMO)


# -- workbook -----------------------------------------------------------------------------------


def test_workbook_reaudits_to_identical_metrics(demo, tmp_path):
    out = tmp_path / "audit.xlsx"
    write_workbook(demo, out)
    again = audit.audit_file(out, sheet="audit")
    _same_metrics(demo, again)
    book = load_workbook(out, read_only=True)
    assert book.sheetnames == ["summary", "audit", "portfolio", "rules", "invalid rows", "read me"]


def test_workbook_keeps_user_columns_first_and_numbers_as_numbers(demo, tmp_path):
    out = tmp_path / "audit.xlsx"
    write_workbook(demo, out)
    ws = load_workbook(out)["audit"]
    header = [c.value for c in ws[1]]
    with DEMO.open() as handle:
        user = next(csv.reader(handle))
    assert header[: len(user)] == user
    col = {name: i for i, name in enumerate(header)}
    first = [c for c in ws[2]]
    assert isinstance(first[col["planned_n1"]].value, (int, float))
    assert isinstance(first[col["power_at_planned_effect"]].value, float)
    assert first[col["power_at_planned_effect"]].number_format == "0.000"
    # Severity is written as text and shown by fill, so it survives black-and-white printing.
    severities = {
        ws.cell(row=r, column=col["highest severity"] + 1).value for r in range(2, ws.max_row + 1)
    }
    assert {"serious", "warning"} <= severities
    serious_row = next(
        r
        for r in range(2, ws.max_row + 1)
        if ws.cell(row=r, column=col["highest severity"] + 1).value == "serious"
    )
    assert ws.cell(row=serious_row, column=col["highest severity"] + 1).fill.fgColor.rgb.endswith(
        "E8A0A0"
    )


def test_workbook_and_csv_neutralise_formula_like_text(tmp_path):
    # OWASP's CSV-injection guidance: cells starting with = + - @ must not be executable.
    frame = pd.DataFrame(
        {
            "study_id": ["A", "B", "C", "D"],
            "design": "estimate",
            "realized_se": [1.0, 1.0, 1.0, 1.0],
            "title": FORMULA_LIKE,
        }
    )
    result = audit.audit_table(frame)
    out = tmp_path / "a.xlsx"
    write_workbook(result, out)
    ws = load_workbook(out)["audit"]
    titles = [ws.cell(row=r, column=4) for r in range(2, 6)]
    assert [c.value for c in titles] == FORMULA_LIKE  # text kept exactly
    assert all(c.data_type == "s" for c in titles)  # stored as text, not as formulas
    assert all(c.quotePrefix for c in titles if c.value.startswith(("=", "+", "-", "@")))
    _same_metrics(result, audit.audit_file(out))
    from audit.export import write_csv

    write_csv(result, tmp_path / "a.csv")
    with (tmp_path / "a.csv").open() as handle:
        rows = list(csv.DictReader(handle))
    assert all(r["title"].startswith("'") for r in rows)


def test_workbook_lists_rules_and_invalid_rows(demo, tmp_path):
    out = tmp_path / "audit.xlsx"
    write_workbook(demo, out)
    book = load_workbook(out)
    rules = [r[0] for r in book["rules"].iter_rows(min_row=2, values_only=True)]
    assert set(rules) == {r.id for r in demo.rules}
    rationale = [r[3] for r in book["rules"].iter_rows(min_row=2, values_only=True)]
    assert all(isinstance(t, str) and len(t) > 80 for t in rationale)
    invalid = list(book["invalid rows"].iter_rows(min_row=2, values_only=True))
    assert len(invalid) == len(demo.errors) and len(invalid) >= 2


# -- template -----------------------------------------------------------------------------------


def test_template_has_validations_guide_and_clean_examples(tmp_path):
    out = tmp_path / "template.xlsx"
    write_template(out)
    book = load_workbook(out)
    assert book.sheetnames[0] == "studies"
    ws = book["studies"]
    header = [c.value for c in ws[1]]
    assert set(header) == {c.name for c in COLUMNS}
    lists = {dv.formula1 for dv in ws.data_validations.dataValidation if dv.type == "list"}
    assert any("two_means" in f and "survival" in f for f in lists)  # design
    assert '"1,2"' in lists  # sides
    assert '"raw,d"' in lists  # effect_scale
    ranges = [dv for dv in ws.data_validations.dataValidation if dv.type in ("decimal", "whole")]
    assert len(ranges) >= 10
    guide = [r[0] for r in book["guide"].iter_rows(min_row=2, values_only=True) if r[0]]
    assert {c.name for c in COLUMNS} <= set(guide)
    # The blank input sheet has the header and nothing to audit yet; the examples audit cleanly.
    with pytest.raises(audit.InputError, match="no study rows"):
        audit.audit_file(out)
    examples = audit.audit_file(out, sheet="examples")
    assert list(examples.status) == ["audited"] * len(EXAMPLES)
    assert set(examples.table["design"]) == set(audit.DESIGNS)


# -- referee text -------------------------------------------------------------------------------


def test_format_p_as_journals_print_it():
    # APA style (Publication Manual, 7th ed.): no leading zero, exact to 2-3 decimals, < .001.
    assert format_p(0.2) == "P = .20"
    assert format_p(0.0312) == "P = .031"
    assert format_p(0.0004) == "P < .001"


@pytest.mark.parametrize("study", ["KF-101", "KF-105", "KF-117", "KF-111", "KF-114", "KF-107"])
def test_respond_quotes_the_numbers_of_the_report(demo, study):
    text = respond_text(demo, study)
    pos = demo.positions_of(study)[0]
    for phrase in key_numbers(demo, pos):
        if phrase.startswith("power "):
            assert phrase.split()[1] in text  # power at the planned effect, as printed
        if phrase.startswith("MDE "):
            # the MDE at the study's target (80 % here) as printed, with a true minus sign
            assert phrase.split()[1].replace("-", "−") in text
    assert "Hoenig & Heisey, 2001" in text
    assert "90% power" in text
    assert "References" in text and "does not replace" in text


def test_respond_with_an_effect_and_unknown_study(demo, capsys):
    text = respond_text(demo, "KF-105", effect=4.0)
    assert "for an effect of 4 it was" in text
    assert main(["respond", str(DEMO), "NOPE"]) == 2
    assert "no such study_id" in capsys.readouterr().err


# -- plots ----------------------------------------------------------------------------------------


def test_plots_are_written_and_not_empty(demo, tmp_path):
    from audit.plots import write_plots

    files = write_plots(demo, tmp_path / "png")
    names = {f.name for f in files}
    assert {"portfolio_power.png", "portfolio_mde.png"} <= names
    # At most 60 study figures (write_plots(max_studies=60)), the most flagged first.
    assert sum(n.startswith("study_") for n in names) == min(60, int(demo.valid.sum()))
    for f in files:
        data = f.read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 5000
    svg = write_plots(demo, tmp_path / "svg", fmt="svg", study="KF-117")
    assert [f.name for f in svg] == ["study_KF-117.svg"]
    assert svg[0].read_text().lstrip().startswith("<?xml")


def test_power_curves_pass_through_the_reported_power(demo):
    # The curve of the realized design evaluated at the planned effect is the reported power.
    from audit.plots import power_curves

    pos = np.flatnonzero(demo.valid)
    curves = power_curves(demo, pos, grid=5)
    for p in pos:
        c = curves[int(p)]
        assert np.all(np.diff(c["effect"]) != 0)
        assert np.nanmin(c["realized"]) >= 0 and np.nanmax(c["realized"]) <= 1


# -- demo ---------------------------------------------------------------------------------------


def test_demo_triggers_every_default_rule_and_covers_every_design(demo):
    assert set(demo.portfolio["flag_counts"]) == {r.id for r in demo.rules}
    assert set(demo.table.loc[demo.valid, "design"]) == set(audit.DESIGNS)
    # A portfolio a reviewer can read through, with a study of every design and feature.
    assert 30 <= len(demo.table) <= 80
    assert demo.portfolio["excess_significance"] is not None


def test_demo_csv_and_xlsx_audit_alike(demo):
    _same_metrics(demo, audit.audit_file(DEMO_XLSX))


def test_demo_command_writes_every_export(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--quiet"]) == 0
    for name in ("report.txt", "report.html", "audit.json", "audit.csv", "audit.xlsx"):
        assert (out / name).stat().st_size > 1000, name
    assert any((out / "plots").glob("study_*.png"))
    assert list(out.glob("response_*.md"))
    assert "Reading these results" in (out / "report.txt").read_text()
    assert str(out.resolve()) in capsys.readouterr().out


def test_template_command(tmp_path, capsys):
    assert main(["template", str(tmp_path / "t.xlsx")]) == 0
    assert (tmp_path / "t.xlsx").exists()
    assert "guide" in capsys.readouterr().out


def test_check_writes_workbook_and_plots(tmp_path):
    code = main(
        [
            "check",
            str(DEMO),
            "--xlsx",
            str(tmp_path / "w.xlsx"),
            "--plots",
            str(tmp_path / "p"),
            "--quiet",
        ]
    )
    assert code == 0
    assert (tmp_path / "w.xlsx").stat().st_size > 0
    assert (tmp_path / "p" / "portfolio_power.png").exists()


def test_demo_files_are_built_from_the_studies_source():
    # demo_data/studies.toml is the source; the CSV and workbook must be rebuilt after an edit
    # (python demo_data/make_demo.py).
    import importlib.util

    spec = importlib.util.spec_from_file_location("make_demo", DEMO.parent / "make_demo.py")
    make_demo = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(make_demo)
    rows = make_demo.studies()
    assert DEMO.read_text(encoding="utf-8") == make_demo.csv_text(rows)
    book = load_workbook(DEMO_XLSX, read_only=True)
    cells = [list(r) for r in book.active.iter_rows(values_only=True)]
    names = make_demo.header(rows)
    assert cells[0] == names
    assert [dict(zip(names, r, strict=True)) for r in cells[1:]] == [
        {n: row.get(n) for n in names} for row in rows
    ]


def test_a_lone_carriage_return_cannot_start_a_csv_row(tmp_path):
    # Issue 13: a quoted cell holding a carriage return alone was written unquoted; a
    # spreadsheet program then read a new row starting with the live formula after it. The
    # csv module reads like one here: a carriage return outside quotes ends a row.
    source = tmp_path / "in.csv"
    source.write_bytes(
        b"study_id,title,design,realized_se\n"
        b"A,\"harmless\r=cmd|' /C calc'!A0\",estimate,1\n"
        b'B,"two\r\nlines",estimate,2\n'
        b"C,plain,estimate,3\n"
    )
    out = tmp_path / "out.csv"
    assert main(["check", str(source), "--quiet", "--csv", str(out)]) == 0
    with out.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.reader(handle))
    assert [r[0] for r in rows] == ["study_id", "A", "B", "C"]
    assert rows[1][1] == "harmless\r=cmd|' /C calc'!A0"
    assert rows[2][1] == "two\r\nlines"
    assert not any(cell.startswith("=") for row in rows for cell in row)
    # Rows without a carriage return are written as before: unquoted where plain.
    assert out.read_bytes().splitlines()[-1].startswith(b"C,plain,estimate,3")


# -- input columns named like output columns (issue 13, DESIGN.md 9.6) ----------------------


def test_user_columns_named_like_output_columns_are_renamed(tmp_path):
    # A user's own status, row, mde, notes and flags columns made --csv stop with exit 3.
    source = tmp_path / "in.csv"
    source.write_text(
        "study_id,design,realized_se,status,row,MDE,notes,flags\n"
        "A,estimate,1,done,7,big,see protocol,none\n"
        "B,estimate,2,open,8,small,,\n",
        encoding="utf-8",
    )
    out_csv, out_json, out_xlsx = tmp_path / "o.csv", tmp_path / "o.json", tmp_path / "o.xlsx"
    args = ["check", str(source), "--quiet", "--csv", str(out_csv), "--json", str(out_json)]
    assert main([*args, "--xlsx", str(out_xlsx)]) == 0
    with out_csv.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    header = list(rows[0])
    assert len(header) == len(set(header))
    assert [r["status (input)"] for r in rows] == ["done", "open"]
    assert [r["MDE (input)"] for r in rows] == ["big", "small"]
    assert [r["status"] for r in rows] == ["audited", "audited"]
    assert [r["row"] for r in rows] == ["2", "3"]
    assert float(rows[0]["mde"]) == pytest.approx(2.8, abs=0.01)  # Bloom's multiplier x SE 1
    notes = json.loads(out_json.read_text("utf-8"))["settings"]["input_notes"]
    assert any("'status' has the name of an output column" in n for n in notes)
    sheet = load_workbook(out_xlsx, read_only=True)["audit"]
    names = [c.value for c in next(sheet.iter_rows(max_row=1))]
    assert len(names) == len(set(names)) and "notes (input)" in names


@pytest.mark.parametrize("export", ["audit.csv", "audit.xlsx"])
def test_re_auditing_an_export_replaces_its_output_columns(tmp_path, export):
    first = tmp_path / "first"
    assert main(["demo", "--out", str(first), "--quiet"]) == 0
    again = tmp_path / "again.csv"
    doc = tmp_path / "again.json"
    assert (
        main(["check", str(first / export), "--quiet", "--csv", str(again), "--json", str(doc)])
        == 0
    )
    with again.open(newline="", encoding="utf-8") as handle:
        header = next(csv.reader(handle))
    with (first / "audit.csv").open(newline="", encoding="utf-8") as handle:
        original = next(csv.reader(handle))
    assert header == original  # each column once, as in the first export
    before = json.loads((first / "audit.json").read_text("utf-8"))
    after = json.loads(doc.read_text("utf-8"))
    assert [s["metrics"] for s in after["studies"]] == [s["metrics"] for s in before["studies"]]
    assert any("output of an earlier audit" in n for n in after["settings"]["input_notes"])
