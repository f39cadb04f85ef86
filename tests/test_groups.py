"""--group-by: the portfolio summary per value of a column (audit.portfolio.group_summaries).

Each group's summary is checked against the portfolio summary computed, by the functions that
compute the whole portfolio, on that group's rows alone; the counts add up to the portfolio's
(common practice: a partition's counts sum to the whole).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

import audit
from audit.cli import main
from audit.errors import ConfigError
from audit.portfolio import (
    BLANK_GROUP,
    MAX_GROUPS,
    excess_significance,
    group_labels,
    portfolio_summary,
)
from audit.resources import bundled_dir

DEMO = bundled_dir("demo_data") / "demo_portfolio.csv"
SHARED = (
    "studies",
    "audited",
    "invalid",
    "median_power_at_planned_effect",
    "share_at_target_power",
    "median_mde_std",
    "flag_counts",
    "studies_by_worst_finding",
    "ci_verdict_counts",
)


@pytest.fixture(scope="module")
def grouped() -> audit.AuditResult:
    return audit.audit_file(DEMO, group_by=["Field", "design"])


def _subset_summary(result: audit.AuditResult, mask: np.ndarray) -> dict:
    """The portfolio summary of the rows in ``mask`` alone, from the portfolio functions."""
    pos = np.flatnonzero(mask)
    table = result.table.iloc[pos].reset_index(drop=True)
    metrics = result.metrics.iloc[pos].reset_index(drop=True)
    renumber = {int(p): i for i, p in enumerate(pos)}
    f = result.findings[result.findings["pos"].isin(pos)].copy()
    f["pos"] = f["pos"].map(renumber)
    return portfolio_summary(table, metrics, result.valid[pos], f.reset_index(drop=True))


def test_each_group_is_the_portfolio_summary_of_its_rows(grouped):
    labels = group_labels(grouped.table["field"].to_numpy(dtype=object))
    for value, summary in grouped.groups["field"].items():
        expected = _subset_summary(grouped, labels == value)
        for key in SHARED:
            got, want = summary[key], expected[key]
            if isinstance(want, float):
                assert got == pytest.approx(want, rel=1e-12), (value, key)
            else:
                assert got == want, (value, key)


def test_group_excess_significance_matches_the_portfolio_test_on_its_rows(grouped):
    designs = grouped.table["design"].to_numpy(dtype=object)
    tested = 0
    for value, summary in grouped.groups["design"].items():
        mask = designs == value
        pos = np.flatnonzero(mask)
        block, note = excess_significance(
            grouped.table.iloc[pos].reset_index(drop=True),
            grouped.metrics.iloc[pos].reset_index(drop=True),
            grouped.valid[pos],
        )
        assert summary["excess_significance_note"] == note
        if block is None:
            assert summary["excess_significance"] is None
            continue
        tested += 1
        got = summary["excess_significance"]
        assert got["observed"] == block["observed"]
        assert got["expected"] == pytest.approx(block["expected"], rel=1e-12)
        assert got["p_value"] == pytest.approx(block["p_value"], rel=1e-12)
    assert tested >= 1  # two_means has enough studies with results in the demo


def test_groups_partition_the_portfolio(grouped):
    for column, groups in grouped.groups.items():
        for key in ("studies", "audited", "invalid", "studies_with_power"):
            total = sum(g[key] for g in groups.values())
            whole = (
                grouped.portfolio["studies_with_power"]
                if key == "studies_with_power"
                else grouped.portfolio[key]
            )
            assert total == whole, (column, key)
        flags: dict[str, int] = {}
        for g in groups.values():
            for rule, n in g["flag_counts"].items():
                flags[rule] = flags.get(rule, 0) + n
        assert flags == grouped.portfolio["flag_counts"]


def test_header_matched_like_input_headers(grouped):
    # "Field" names the file's "field" column; settings keep the header as written.
    assert list(grouped.groups) == ["field", "design"]
    assert grouped.settings["group_by"] == ["field", "design"]
    assert "education" in grouped.groups["field"]


def test_blank_cells_form_a_stated_group_listed_last():
    frame = pd.read_csv(DEMO, dtype=str, keep_default_na=False)
    frame["programme"] = ["north"] * 20 + [""] * 5 + ["south"] * (len(frame) - 25)
    frame.loc[3, "programme"] = "  north "
    result = audit.audit_table(frame, group_by="programme")
    groups = result.groups["programme"]
    assert list(groups) == ["north", "south", BLANK_GROUP]
    assert groups[BLANK_GROUP]["studies"] == 5
    assert groups["north"]["studies"] == 20


def test_group_labels_whole_numbers_and_blanks():
    cells = np.array([2019.0, "2019", 2019, None, "  ", 0.25, "x"], dtype=object)
    assert group_labels(cells).tolist() == ["2019", "2019", "2019", BLANK_GROUP, BLANK_GROUP,
                                            "0.25", "x"]  # fmt: skip


def test_unknown_column_is_a_config_error():
    with pytest.raises(ConfigError, match="no column of that name"):
        audit.audit_file(DEMO, group_by=["programme"])


def test_near_unique_column_is_refused():
    frame = pd.read_csv(DEMO, dtype=str, keep_default_na=False)
    frame = pd.concat([frame] * (MAX_GROUPS // len(frame) + 1), ignore_index=True)
    frame["study_id"] = [f"S{i}" for i in range(len(frame))]
    with pytest.raises(ConfigError, match="distinct values"):
        audit.audit_table(frame, group_by=["study_id"])


def test_cli_unknown_group_column_exits_2_with_one_sentence(capsys):
    assert main(["check", str(DEMO), "--group-by", "programme", "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "programme" in err and "Traceback" not in err


def test_cli_json_has_groups_key_and_none_without(tmp_path):
    out = tmp_path / "a.json"
    assert main(["check", str(DEMO), "--json", str(out), "--group-by", "field", "--quiet"]) == 0
    document = json.loads(out.read_text())
    assert list(document["groups"]) == ["field"]
    assert document["groups"]["field"]["education"]["studies"] == 8
    plain = tmp_path / "b.json"
    assert main(["check", str(DEMO), "--json", str(plain), "--quiet"]) == 0
    assert "groups" not in json.loads(plain.read_text())


def test_cli_report_and_workbook_lay_out_the_groups(tmp_path, capsys):
    import openpyxl

    book = tmp_path / "a.xlsx"
    assert main(["check", str(DEMO), "--xlsx", str(book), "--group-by", "design"]) == 0
    report = capsys.readouterr().out
    assert "By design (16 groups)" in report
    flowing = " ".join(report.split())
    assert "excess significance within a group:" in flowing
    assert "two_means: 6 significant results against" in flowing
    wb = openpyxl.load_workbook(book, read_only=True)
    rows = list(wb["groups"].iter_rows(values_only=True))
    assert rows[0][:3] == ("column", "value", "studies")
    two_means = next(r for r in rows if r[1] == "two_means")
    # 26 two_means rows, 3 of them the non-inferiority and equivalence trials of issue 15.
    assert two_means[2] == 26 and isinstance(two_means[6], float)
