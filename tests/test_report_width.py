"""The terminal report at 80 columns cuts nothing: every design name and every number printed
whole (issue 19), the same numbers as on a wide terminal."""

from __future__ import annotations

import io
import re
from collections import Counter

import pytest
from rich.console import Console

import audit
from audit.report import THEME, build_overview, render_report
from audit.resources import bundled_dir

DEMO = bundled_dir("demo_data") / "demo_portfolio.csv"
#: A number as the report prints one: sign, digits with thousands commas, decimals, exponent, %.
NUMBER = re.compile(r"(?<![\w.])[-−]?\d[\d,]*(?:\.\d+)?(?:e[-+]?\d+)?%?")


@pytest.fixture(scope="module")
def demo() -> audit.AuditResult:
    return audit.audit_file(DEMO)


def _render(result: audit.AuditResult, width: int) -> str:
    buf = io.StringIO()
    console = Console(file=buf, width=width, color_system=None, theme=THEME, highlight=False)
    render_report(result, console)
    return buf.getvalue()


@pytest.mark.parametrize("width", [80, 90])
def test_report_at_80_columns_truncates_nothing(demo, width):
    text = _render(demo, width)
    assert max(len(line) for line in text.splitlines()) <= width
    assert "…" not in text
    # Every listed study's design name appears whole, on one line.
    listed = build_overview(demo).flagged
    assert listed
    lines = text.splitlines()
    for entry in listed:
        assert any(re.search(rf"(?<!\w){re.escape(entry.design)}(?!\w)", ln) for ln in lines)
    # The numbers are those of a terminal wide enough for everything: none split over two
    # lines, none cut.
    narrow, wide = Counter(NUMBER.findall(text)), Counter(NUMBER.findall(_render(demo, 240)))
    assert narrow == wide
    assert sum(narrow.values()) > 500


def test_a_long_design_name_and_id_stay_whole_at_80_columns():
    # A table that cannot hold a long id whole is printed one study under another instead.
    import pandas as pd

    frame = pd.DataFrame(
        {
            "study_id": ["a-very-long-study-identifier-of-forty-chars"],
            "design": ["cluster_two_proportions"],
            "planned_n1": [10],
            "planned_n2": [10],
            "realized_n1": [6],
            "realized_n2": [6],
            "planned_p1": [0.2],
            "planned_p2": [0.3],
            "realized_p1": [0.2],
            "planned_icc": [0.05],
            "realized_icc": [0.1],
            "planned_cluster_size": [20],
            "realized_cluster_size": [20],
        }
    )
    text = _render(audit.audit_table(frame), 80)
    assert "…" not in text
    assert "a-very-long-study-identifier-of-forty-chars" in text
    assert "cluster_two_proportions" in text


def test_study_view_at_80_columns_cuts_no_word(demo):
    # A long name in a meaning column (a rule id, a metric) is folded, never cut to "…".
    from audit.report import render_study

    buf = io.StringIO()
    console = Console(file=buf, width=80, color_system=None, theme=THEME, highlight=False)
    render_study(demo, console, list(range(len(demo.table))))
    text = buf.getvalue()
    assert "…" not in text
    assert "sample-size-not-reproducible" in text.replace("\n", "").replace(" ", "")
