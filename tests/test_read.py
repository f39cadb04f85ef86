"""Reading files: formats, header matching, number formats, row numbers."""

from __future__ import annotations

import pandas as pd
import pytest
from openpyxl import Workbook

import audit
from audit.errors import InputError
from audit.read import normalise_header, read_table

HEADER = "study_id,design,planned_n1,realized_n1,planned_sd,planned_effect\n"


def _write(tmp_path, name, text, encoding="utf-8"):
    path = tmp_path / name
    path.write_text(text, encoding=encoding)
    return path


def test_header_matching_ignores_case_spaces_dashes():
    # DESIGN.md section 3: headers matched case-insensitively, spaces, dashes and underscores
    # treated alike.
    assert normalise_header("Planned N1") == "planned_n1"
    assert normalise_header("planned-n1") == "planned_n1"
    assert normalise_header(" PLANNED__N1 ") == "planned_n1"


def test_csv_rows_keep_spreadsheet_numbers_across_blank_lines(tmp_path):
    body = "A,one_mean,30,28,5,2\n\n,,,,,\nB,one_mean,40,40,5,2\n"
    path = _write(tmp_path, "p.csv", HEADER + body)
    raw = read_table(path)
    assert raw.rows.tolist() == [2, 5]
    assert raw.blank_rows == [3, 4]
    result = audit.audit_file(path)
    doc = result.to_dict()
    assert [s["row"] for s in doc["studies"]] == [2, 5]
    assert doc["portfolio"]["blank_rows_skipped"] == 2


def test_semicolon_file_with_decimal_comma(tmp_path):
    text = (
        "Study ID;Design;Alpha;Planned N1;Realized N1;Planned SD;Planned effect\n"
        "A;one_mean;5%;1.234;1.200;2,5;0,4\n"
    )
    result = audit.audit_file(_write(tmp_path, "p.csv", text))
    t = result.table
    assert t.loc[0, "alpha"] == pytest.approx(0.05)
    assert t.loc[0, "planned_n1"] == 1234
    assert t.loc[0, "planned_sd"] == pytest.approx(2.5)
    assert t.loc[0, "planned_effect"] == pytest.approx(0.4)
    assert result.status[0] == "audited"


def test_thousands_separator_and_percent_in_comma_file(tmp_path):
    text = HEADER.strip() + ",target_power\n" + 'A,one_mean,"1,234","1,100",5,1,90%\n'
    result = audit.audit_file(_write(tmp_path, "p.csv", text))
    assert result.table.loc[0, "planned_n1"] == 1234
    assert result.table.loc[0, "target_power"] == pytest.approx(0.9)


def test_tsv_and_unknown_columns_carried(tmp_path):
    text = "study_id\tdesign\trealized_se\tReviewer note\nX\testimate\t0.5\tcheck appendix\n"
    result = audit.audit_file(_write(tmp_path, "p.tsv", text))
    assert result.table.loc[0, "reviewer_note"] == "check appendix"
    assert result.raw.headers["reviewer_note"] == "Reviewer note"
    assert result.metrics.loc[0, "mde"] == pytest.approx(2.8016 * 0.5, rel=1e-4)


def _xlsx(tmp_path, rows, sheet_title="Studies", extra_sheet=None):
    wb = Workbook()
    ws = wb.active
    ws.title = sheet_title
    for r in rows:
        ws.append(r)
    if extra_sheet:
        ws2 = wb.create_sheet(extra_sheet[0])
        for r in extra_sheet[1]:
            ws2.append(r)
    path = tmp_path / "p.xlsx"
    wb.save(path)
    return path


def test_xlsx_first_sheet_and_named_sheet(tmp_path):
    header = ["Study ID", "Design", "Realized SE"]
    path = _xlsx(
        tmp_path,
        [header, ["A", "estimate", 1.0]],
        extra_sheet=("Other", [header, ["B", "estimate", 2.0], ["C", "estimate", 3.0]]),
    )
    first = audit.audit_file(path)
    assert first.table["study_id"].tolist() == ["A"]
    other = audit.audit_file(path, sheet="Other")
    assert other.table["study_id"].tolist() == ["B", "C"]
    assert other.table["_row"].tolist() == [2, 3]
    with pytest.raises(InputError, match=r"no sheet named 'Nope'.*Studies, Other"):
        read_table(path, sheet="Nope")


@pytest.mark.parametrize("fast_reader_size", [None, 0])
def test_xlsx_formula_cached_and_uncached(tmp_path, monkeypatch, fast_reader_size):
    # A formula cell is read by its cached value; openpyxl writes no cached value, so the cell
    # is reported as a formula without a saved value and that row only is invalid. A sheet
    # with a formula goes to openpyxl even when it is large enough for the fast reader
    # (fast_reader_size 0), which would read the cell as blank.
    if fast_reader_size is not None:
        from audit import sheets

        monkeypatch.setattr(sheets, "FAST_READ_MIN_BYTES", fast_reader_size)
    path = _xlsx(
        tmp_path,
        [["study_id", "design", "realized_se"], ["A", "estimate", "=1/2"], ["B", "estimate", 0.5]],
    )
    result = audit.audit_file(path)
    assert result.status.tolist() == ["invalid", "audited"]
    assert "formula without a saved value" in result.errors.loc[0, "reason"]


def test_missing_required_column_is_input_error(tmp_path):
    path = _write(tmp_path, "p.csv", "study_id,planned_n1\nA,3\n")
    with pytest.raises(InputError, match="design not found"):
        audit.audit_file(path)


def test_empty_file_is_input_error(tmp_path):
    with pytest.raises(InputError, match="empty"):
        read_table(_write(tmp_path, "p.csv", ""))


def test_header_only_is_input_error(tmp_path):
    # Nothing to audit is "nothing usable" (DESIGN.md section 7: exit 2); a DataFrame with no
    # rows, given from Python, is still an empty audit.
    with pytest.raises(InputError, match="no study rows"):
        audit.audit_file(_write(tmp_path, "p.csv", HEADER))
    empty = pd.DataFrame({"study_id": [], "design": []})
    assert audit.audit_table(empty).to_dict()["studies"] == []


def test_dataframe_api_numbers_rows_from_two():
    df = pd.DataFrame(
        {"study_id": ["a", "b"], "design": ["estimate", "estimate"], "realized_se": [1.0, 2.0]}
    )
    assert audit.audit_table(df).table["_row"].tolist() == [2, 3]


def test_large_plain_sheets_read_the_same_with_the_fast_reader(monkeypatch):
    # The demo workbook read by calamine (threshold lowered to 0) and by openpyxl gives the same
    # typed table: the fast reader is an implementation detail, not a different reading.
    import numpy as np

    from audit import sheets
    from audit.resources import bundled_dir
    from audit.validate import validate

    path = bundled_dir("demo_data") / "demo_portfolio.xlsx"
    careful = validate(read_table(path))
    calls = []
    original = sheets._fast_worksheet

    def spy(*args, **kwargs):
        sheet = original(*args, **kwargs)
        calls.append(sheet is not None)
        return sheet

    monkeypatch.setattr(sheets, "FAST_READ_MIN_BYTES", 0)
    monkeypatch.setattr(sheets, "_fast_worksheet", spy)
    fast = validate(read_table(path))
    assert calls == [True]
    assert list(fast.valid) == list(careful.valid)
    for column in careful.table.columns:
        a, b = fast.table[column], careful.table[column]
        if a.dtype == object or b.dtype == object:
            assert a.fillna("").astype(str).tolist() == b.fillna("").astype(str).tolist(), column
        else:
            np.testing.assert_array_equal(a.to_numpy(), b.to_numpy(), err_msg=column)


def test_a_quoted_cell_may_span_lines_and_hold_the_separator(tmp_path):
    # Issue 13: "Effect of X, Y" over two lines is a properly quoted cell, not a quote that
    # swallowed lines; the row is audited.
    path = _write(
        tmp_path,
        "multi.csv",
        'study_id,title,design,realized_se\nA,"Effect of X, Y\non Z",estimate,1\n'
        'B,"a ""quoted"" word,\r\nand more",estimate,2\nC,plain,estimate,3\n',
    )
    result = audit.audit_file(path)
    assert list(result.status) == ["audited"] * 3
    assert result.raw.data["title"].tolist()[:2] == [
        "Effect of X, Y\non Z",
        'a "quoted" word,\r\nand more',
    ]


def test_a_quote_that_swallows_lines_up_to_a_later_quote_is_still_reported(tmp_path):
    # The stray quote of U-2 closes at the quote of U-4's first cell: the lines between were
    # read into one cell, which says so. A proper multi-line cell before it stays audited.
    path = _write(
        tmp_path,
        "stray.csv",
        'study_id,title,design,realized_se\nU-1,"fine, and\nmultiline",estimate,1\n'
        'U-2,"stray,estimate,1\nU-3,x,estimate,1\n"U-4",y,estimate,1\n',
    )
    result = audit.audit_file(path)
    status = dict(zip(result.table["study_id"], result.status, strict=True))
    assert status["U-1"] == "audited"
    assert status["U-2"] == "invalid"
    assert any("quote mark is probably unbalanced" in e for e in result.error_sentences())


@pytest.mark.parametrize("quoted", [False, True])
def test_equal_cell_texts_are_one_object(tmp_path, quoted):
    # A large file's cells repeat ("two_means", "0.05"): each distinct text is stored once, on
    # the plain path (str.split) and on the quoted one (the csv module) alike.
    title = '"a, b"' if quoted else "a b"
    lines = ["study_id,design,alpha,title"]
    lines += [f"S{i},two_means,{0.05 if i % 2 else 0.025},{title}" for i in range(6)]
    path = tmp_path / "t.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    data = read_table(path).data
    assert data["design"].iat[0] is data["design"].iat[5]
    assert data["alpha"].iat[1] is data["alpha"].iat[3] and data["alpha"].iat[1] == "0.05"
    assert data["title"].iat[0] == ("a, b" if quoted else "a b")
    assert len({id(v) for v in data["study_id"]}) == 6
