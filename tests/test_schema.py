"""Row validation: every bad value is a clear row error, and the good rows are still audited."""

from __future__ import annotations

import pandas as pd
import pytest

import audit

GOOD = {
    "study_id": "OK",
    "design": "two_means",
    "planned_n1": 64,
    "planned_n2": 64,
    "realized_n1": 60,
    "realized_n2": 58,
    "planned_sd": 10,
    "realized_sd": 11,
    "planned_effect": 5,
}

# (column, bad value, words the reason must contain)
BAD_VALUES = [
    ("alpha", "1.5", "percentage"),
    ("alpha", "0", "(0, 1)"),
    ("alpha", "abc", "not a number"),
    ("sides", "3", "one of 1, 2"),
    ("target_power", "80", "looks like a percentage"),
    ("target_power", "1", "(0, 1)"),
    ("planned_n1", "12.5", "whole number"),
    ("realized_n1", "-3", ">= 1"),
    ("realized_n2", "0", ">= 1"),
    ("planned_sd", "0", "> 0"),
    ("realized_sd", "inf", "not a finite number"),
    ("design", "three_means", "unknown design"),
    ("effect_scale", "z", "one of raw, d"),
    ("comparisons", "0", ">= 1"),
    ("covariate_r2", "1", "[0, 1)"),
    ("planned_effect", "5,5", "decimal comma"),
    ("study_id", "", "blank"),
    ("realized_n2", "1", "groups too small"),
]


@pytest.mark.parametrize("column,value,words", BAD_VALUES)
def test_bad_value_is_a_row_error_and_others_are_audited(column, value, words):
    bad = {**GOOD, "study_id": "BAD", column: value}
    if column == "realized_n2" and value == "1":
        bad["realized_n1"] = 1  # n1 + n2 - 2 = 0 df
    df = pd.DataFrame([GOOD, bad, {**GOOD, "study_id": "OK2"}]).astype(object)
    result = audit.audit_table(df)
    assert result.status.tolist() == ["audited", "invalid", "audited"]
    errors = result.errors
    assert (errors["pos"] == 1).all()
    hit = errors[errors["column"] == column] if column != "realized_n2" or value != "1" else errors
    assert len(hit), errors
    assert any(words in r for r in hit["reason"]), hit["reason"].tolist()
    assert all(str(r) == "3" for r in errors["row"])
    # The good rows have their metrics; the invalid row has none.
    assert result.metrics.loc[[0, 2], "power_at_planned_effect"].notna().all()
    assert result.metrics.loc[1].isna().all()
    doc = result.to_dict()
    assert [s["status"] for s in doc["studies"]] == ["audited", "invalid", "audited"]
    assert doc["studies"][1]["errors"] and column in doc["studies"][1]["errors"][0]


def test_all_errors_of_a_row_are_collected():
    bad = {**GOOD, "alpha": "2", "planned_sd": "-1", "sides": "0"}
    result = audit.audit_table(pd.DataFrame([bad]).astype(object))
    assert sorted(result.errors["column"]) == ["alpha", "planned_sd", "sides"]


def test_missing_markers_mean_not_reported():
    row = {**GOOD, "realized_sd": "n/a", "sesoi": "NA"}
    result = audit.audit_table(pd.DataFrame([row]).astype(object))
    assert result.status[0] == "audited"
    notes = result.to_dict()["studies"][0]["notes"]
    assert any("realized_sd not reported" in n for n in notes)
    assert any(n.startswith("power_at_sesoi: not computed, missing sesoi") for n in notes)


def test_duplicate_study_ids_are_kept_and_noted():
    result = audit.audit_table(pd.DataFrame([GOOD, GOOD]).astype(object))
    assert result.status.tolist() == ["audited", "audited"]
    notes = result.to_dict()["studies"]
    assert all(any("more than one row (rows 2, 3)" in n for n in s["notes"]) for s in notes)


def test_null_metrics_name_the_missing_inputs():
    row = {k: v for k, v in GOOD.items() if k not in ("realized_n2", "planned_effect")}
    result = audit.audit_table(pd.DataFrame([row]).astype(object))
    notes = result.to_dict()["studies"][0]["notes"]
    assert "mde: not computed, missing realized_n2" in notes
    assert any(n.startswith("plan_power: not computed, missing planned_effect") for n in notes)
    # Every null metric has a note.
    metrics = result.to_dict()["studies"][0]["metrics"]
    for name, value in metrics.items():
        if value is None:
            explained = [n for n in notes if n.startswith(name + ":") or name in n.split(": ")[-1]]
            assert explained, name


@pytest.mark.parametrize(
    ("written", "value"),
    [("٦٠", 60.0), ("６０", 60.0), ("۶۰", 60.0), ("६०", 60.0)],  # Arabic-Indic, full-width, ...
)
def test_digits_of_other_scripts_are_read_as_the_digits_they_are(written, value):
    # Issue 13: such a cell was read as blank, and the row audited with a missing value.
    row = {**GOOD, "realized_n1": written}
    result = audit.audit_table(pd.DataFrame([row], dtype=object).astype(str))
    assert result.status[0] == "audited"
    assert result.table["realized_n1"][0] == value
    plain = audit.audit_table(pd.DataFrame([{**GOOD, "realized_n1": "60"}]).astype(str))
    assert result.metrics.equals(plain.metrics)


@pytest.mark.parametrize("written", ["１２％", "٣٫٦", "6O"])
def test_a_number_cell_that_does_not_parse_is_an_error_naming_it(written):
    result = audit.audit_table(pd.DataFrame([{**GOOD, "realized_n1": written}]).astype(str))
    assert result.status[0] == "invalid"
    error = result.errors.iloc[0]
    assert (error["column"], error["value"]) == ("realized_n1", written)
    assert "not a number" in error["reason"]
