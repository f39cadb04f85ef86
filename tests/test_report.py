"""The terminal report, rendered at a fixed width without colour and compared with stored text.

The stored texts live in tests/report_expected/. After an intended change of the report, rewrite
them with ``STUDY_AUDIT_UPDATE_EXPECTED=1 python -m pytest tests/test_report.py`` and read the
diff before committing it.
"""

from __future__ import annotations

import io
import os
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from rich.console import Console

import audit
from audit.pipeline import STAGES
from audit.report import (
    THEME,
    StageBar,
    build_overview,
    render_report,
    render_rule,
    render_rules,
    render_study,
)
from audit.rules import load_rules

HERE = Path(__file__).parent
FIXTURE = HERE / "fixtures" / "report_portfolio.csv"
EXPECTED = HERE / "report_expected"


def _console(width: int = 100) -> Console:
    return Console(file=io.StringIO(), width=width, color_system=None, theme=THEME, highlight=False)


def _text(console: Console) -> str:
    out = console.file.getvalue()  # type: ignore[attr-defined]
    return "\n".join(line.rstrip() for line in out.splitlines()) + "\n"


def _result():
    result = audit.audit_file(FIXTURE)
    result.settings["source"] = FIXTURE.name  # not the machine's absolute path
    return result


def _compare(name: str, text: str) -> None:
    path = EXPECTED / name
    if os.environ.get("STUDY_AUDIT_UPDATE_EXPECTED"):
        path.parent.mkdir(exist_ok=True)
        path.write_text(text)
    assert path.exists(), f"{path} missing; create it with STUDY_AUDIT_UPDATE_EXPECTED=1"
    assert text == path.read_text()


def test_portfolio_report_matches_stored_text():
    console = _console()
    render_report(_result(), console, fail_on="serious")
    _compare("portfolio_w100.txt", _text(console))


def test_study_view_matches_stored_text():
    result = _result()
    console = _console()
    render_study(result, console, result.positions_of("RX-03"))
    _compare("study_RX-03_w100.txt", _text(console))


def test_rule_documentation_matches_stored_text():
    console = _console()
    render_rule(load_rules().get("sample-size-not-reproducible"), console)
    _compare("rule_sample-size-not-reproducible_w100.txt", _text(console))


def test_report_sections_and_order():
    console = _console()
    render_report(_result(), console)
    text = _text(console)
    headings = [
        "study-audit report",
        "Portfolio",
        "Studies with findings (5), most severe first",
        "Rows not audited (2)",
        "Reading these results",
    ]
    positions = [text.index(h) for h in headings]
    assert positions == sorted(positions)
    # Studies with findings: serious ones first, and a clean study named, not listed.
    order = [text.index(s, positions[2]) for s in ("RX-01", "RX-03", "RX-04", "RX-05", "RX-08")]
    assert order == sorted(order)
    assert "No findings for 1 audited study: RX-02." in text
    for reason in ("realized_n1 = '-5'", "design = 'factorial'"):
        assert reason in text
    for caveat in ("Hoenig & Heisey 2001", "Gelman & Carlin 2014", "qualified statistician"):
        assert caveat in " ".join(text.split())


def test_overview_counts_agree_with_findings():
    result = _result()
    view = build_overview(result)
    assert view.audited == 6 and view.invalid == 2
    assert view.by_worst == {"serious": 3, "warning": 2, "note": 0, "none": 1}
    counts = {rc.rule: rc.studies for rc in view.rule_counts}
    assert counts == {
        r.id: int(result.findings.loc[result.findings["rule"] == r.id, "pos"].nunique())
        for r in result.rules
    }
    # Power bands hold every study with a computed power, once.
    assert sum(c for _, c in view.power_bands) == view.power_known == 6


@pytest.mark.parametrize("width", [60, 80])
def test_narrow_terminals_keep_every_line_inside_the_width(width):
    console = _console(width)
    result = _result()
    render_report(result, console)
    render_study(result, console, result.positions_of("RX-01"))
    render_rules(load_rules(), console)
    text = _text(console)
    assert max(len(line) for line in text.splitlines()) <= width
    for study in ("RX-01", "RX-03", "RX-04", "RX-05", "RX-08", "RX-06", "RX-07"):
        assert study in text
    assert "serious" in text and "warning" in text and "note" in text


def test_no_color_keeps_the_words_and_drops_the_colours(monkeypatch):
    monkeypatch.setenv("NO_COLOR", "1")
    console = Console(file=io.StringIO(), width=100, force_terminal=True, theme=THEME)
    render_report(_result(), console)
    out = console.file.getvalue()  # type: ignore[attr-defined]
    assert not re.search(r"\x1b\[[0-9;]*3[0-7]m|\x1b\[[0-9;]*38;", out), "a colour was emitted"
    assert "serious" in out and "power-critically-low" in out


def test_named_styles_colour_severities_when_colour_is_on():
    console = Console(
        file=io.StringIO(), width=100, force_terminal=True, color_system="standard", theme=THEME
    )
    render_report(_result(), console)
    out = console.file.getvalue()  # type: ignore[attr-defined]
    assert "\x1b[1;31mserious" in out  # audit.severity.serious is bold red


def test_large_portfolio_is_summarised_not_listed():
    n = 3_000
    df = pd.DataFrame(
        {
            "study_id": [f"L{i:05d}" for i in range(n)],
            "design": "two_means",
            "effect_scale": "d",
            "planned_effect": 0.5,
            "planned_n1": 64,
            "planned_n2": 64,
            "realized_n1": np.linspace(10, 80, n).round(),
            "realized_n2": np.linspace(10, 80, n).round(),
        }
    )
    df.loc[:99, "alpha"] = 3  # 100 invalid rows
    result = audit.audit_table(df)
    console = _console()
    render_report(result, console, limit=25)
    text = _text(console)
    flagged = int(result.findings["pos"].nunique())
    assert f"Studies with findings ({flagged:,})" in text
    assert f"{flagged - 25:,} more studies with findings are not listed" in text
    assert "75 more rows not audited" in text
    assert len(text.splitlines()) < 600


def test_stage_bar_runs_through_the_stages():
    console = Console(file=io.StringIO(), width=80, force_terminal=True)
    seen = []
    with StageBar(console, STAGES) as bar:
        result = audit.audit_file(FIXTURE, progress=lambda s: (seen.append(s), bar(s)))
    assert seen == list(STAGES)
    assert result.portfolio["studies"] == 8
    assert bar.progress.tasks[0].total == len(STAGES)


def test_portfolio_mde_medians_are_of_magnitudes_and_the_report_shows_them():
    # Issue 13: two studies at d = +0.5 and -0.5 had a median standardized MDE of 0.0. The
    # median of the magnitudes is 0.5 (the MDE of d at the target is the same size both ways).
    rows = []
    for sid, sign in (("up", "increase"), ("down", "decrease")):
        rows.append({"study_id": sid, "design": "two_means", "effect_scale": "d",
                     "direction": sign, "realized_n1": 64, "realized_n2": 64})  # fmt: skip
    result = audit.audit_table(pd.DataFrame(rows))
    std = result.metrics["mde_std"].to_numpy()
    assert std[0] == pytest.approx(-std[1]) and std[0] > 0
    assert result.portfolio["median_mde_std"]["two_means"] == pytest.approx(std[0])
    spread = result.portfolio["mde_std_distribution"]["two_means"]
    assert spread["studies"] == 2 and spread["median"] == pytest.approx(std[0])
    # The report lays out the portfolio's own numbers: change them and the report follows.
    result.portfolio["mde_std_distribution"]["two_means"]["median"] = 0.123
    console = _console()
    render_report(result, console)
    assert "0.123" in _text(console)


def test_untested_excess_significance_is_said_once():
    result = audit.audit_table(
        pd.DataFrame({"study_id": ["a"], "design": ["estimate"], "realized_se": [1.0]})
    )
    console = _console()
    render_report(result, console)
    text = " ".join(_text(console).split())
    assert text.count("excess significance not tested") == 1
