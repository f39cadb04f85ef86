"""Terminal safety: no user value reaches a terminal with an escape sequence or a control
character (audit/terminal.py); the exports keep the values as read (docs/hardening.md)."""

from __future__ import annotations

import csv
import re
import sys
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from audit.cli import main
from audit.terminal import clean, clean_line

sys.path.insert(0, str(Path(__file__).parent / "fixtures"))
import make_fixtures

#: What must never reach a terminal (ECMA-48 C0 but LF and TAB, DEL, C1; Unicode bidi controls).
FORBIDDEN = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u061c\u200e\u200f\u202a-\u202e\u2066-\u2069]")


@pytest.mark.parametrize(
    "text,expected",
    [
        ("a\x1b]52;c;aGVsbG8=\x07b", "ab"),  # OSC 52 ended by BEL
        ("a\x1b]0;title\x1b\\b", "ab"),  # OSC ended by ST (ESC \)
        ("a\x1b[31;1mb\x1b[0m", "ab"),  # CSI colours
        ("a\x1b[2Jb", "ab"),  # CSI erase the screen
        ("a\x9b2Jb", "ab"),  # CSI as a C1 character
        ("a\x1bPqdata\x1b\\b", "ab"),  # DCS string
        ("a\x1b7b", "ab"),  # two-character escape
        ("a\x1b", "a"),  # a lone ESC at the end
        ("a\x85b\x00c\x7fd\x08e\rf", "abcdef"),  # C1, NUL, DEL, BS, CR
        ("left \u202eright\u202c \u2066iso\u2069 \u200f", "left right iso "),  # bidi controls
        ("line\nnext\tcell", "line\nnext\tcell"),  # line feed and tab kept
        ("Étude ١٢٣ 𝟙 café — ok", "Étude ١٢٣ 𝟙 café — ok"),  # letters and digits kept
    ],
)
def test_clean(text, expected):
    assert clean(text) == expected
    assert not FORBIDDEN.search(clean(text))


def test_clean_line_is_one_line():
    assert clean_line("a\nb\tc\x1b[1m") == "a b c"


@settings(max_examples=300, deadline=None, derandomize=True)
@given(st.text(alphabet=st.characters(codec="utf-8"), max_size=40))
def test_clean_never_leaves_a_control(text):
    out = clean(text)
    assert not FORBIDDEN.search(out)
    assert clean(out) == out
    if not FORBIDDEN.search(text):
        assert out == text  # text without controls is left exactly as it is


@pytest.fixture
def hostile(tmp_path: Path) -> Path:
    return make_fixtures.build(tmp_path, ["terminal_escapes.csv"])["terminal_escapes.csv"]


def _assert_safe(text: str) -> None:
    assert "\x1b" not in text and not FORBIDDEN.search(text), repr(text[:200])
    assert "]52;" not in text


def test_study_view_report_and_respond_are_clean(hostile, capsys, tmp_path):
    assert main(["check", str(hostile), "--study", "OM-1"]) == 0
    out = capsys.readouterr().out
    _assert_safe(out)
    assert "Trial copied red evil [/] end" in out  # the text itself is kept, markup shown as is
    assert main(["check", str(hostile)]) in (0, 1)
    captured = capsys.readouterr()
    _assert_safe(captured.out + captured.err)
    assert main(["respond", str(hostile), "OM-1"]) == 0
    out = capsys.readouterr().out
    _assert_safe(out)
    assert "(Trial copied red evil [/] end)" in out


def test_exports_keep_the_value_as_read(hostile, capsys, tmp_path):
    out = tmp_path / "a.csv"
    assert main(["check", str(hostile), "--quiet", "--csv", str(out)]) in (0, 1)
    capsys.readouterr()
    with out.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    assert [r["title"] for r in rows if r["study_id"] == "OM-1"] == [make_fixtures.TERMINAL_HOSTILE]


def test_messages_on_standard_error_are_clean(tmp_path, capsys):
    missing = tmp_path / "x\x1b]52;c;aGk=\x07\n.csv"
    assert main(["check", str(missing)]) == 2
    err = capsys.readouterr().err
    _assert_safe(err)
    assert err.count("\n") == 1 and "no such file" in err


def test_rule_texts_are_clean(tmp_path, capsys):
    rule = tmp_path / "r.toml"
    rule.write_text(
        '[[rule]]\nid = "odd-title"\nseverity = "note"\n'
        'title = "flags \\u001b]52;c;aGk=\\u0007 mde"\n'
        'when = { column = "mde", above = 100 }\nmessage = "mde {mde}"\n'
        'rationale = "why \\u202e it matters"\nreferences = ["ref \\u001b[2J one"]\n'
    )
    assert main(["rules", "--rules", str(rule)]) == 0
    _assert_safe(capsys.readouterr().out)
    assert main(["rules", "--rules", str(rule), "odd-title"]) == 0
    out = capsys.readouterr().out
    _assert_safe(out)
    assert "flags  mde" in out and "ref  one" in out
