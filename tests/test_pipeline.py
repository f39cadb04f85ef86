"""The audit a chunk of rows at a time: the same result as one pass, and exports written a part
at a time equal to those of the whole result."""

from __future__ import annotations

import csv
import json

import numpy as np
import pandas as pd
import pytest

import audit
from audit import pipeline
from audit.cli import main
from audit.export import write_csv, write_json
from audit.read import read_table
from audit.resources import bundled_dir
from audit.rules import load_rules
from audit.workbook import write_workbook

DEMO = bundled_dir("demo_data") / "demo_portfolio.csv"


def _rounded(value: object) -> object:
    """Numbers to 11 significant digits (see _same), recursively; number-like texts too."""
    if isinstance(value, float):
        return float(f"{value:.11g}")
    if isinstance(value, str):
        try:
            return _rounded(float(value)) if value.strip() else value
        except ValueError:
            return value
    if isinstance(value, dict):
        return {k: _rounded(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_rounded(v) for v in value]
    return value


def _same(a: audit.AuditResult, b: audit.AuditResult) -> None:
    # Metrics may differ in the last bits only where a setting shared by few rows is solved
    # directly in one run and read off the interpolant in the other (about 1e-11 apart).
    pd.testing.assert_frame_equal(a.metrics, b.metrics, check_exact=False, rtol=1e-11)
    for frame in ("table", "errors", "findings"):
        pd.testing.assert_frame_equal(getattr(a, frame), getattr(b, frame), obj=frame)
    pd.testing.assert_frame_equal(
        a.notes.astype({"text": object}), b.notes.astype({"text": object}), obj="notes"
    )
    assert list(a.status) == list(b.status)
    assert a.settings == b.settings
    assert a.portfolio.keys() == b.portfolio.keys()


@pytest.mark.parametrize("chunk", [1, 3, 7])
def test_the_demo_in_chunks_is_the_demo_in_one_pass(chunk):
    raw = read_table(DEMO)
    one = pipeline.audit_stream(raw)
    parts = pipeline.audit_stream(raw, chunk_rows=chunk)
    _same(parts, one)
    assert _rounded(parts.to_dict()) == _rounded(one.to_dict())


def test_every_usable_corpus_file_in_chunks_is_the_same(tmp_path):
    # The hardening corpus: cut rows, the reader's row notes and cell problems, duplicate
    # columns and duplicate ids (looked for in the whole table) all cross the cuts.
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).parent / "fixtures"))
    import make_fixtures

    corpus = make_fixtures.build(tmp_path / "corpus")
    audited = 0
    for path in corpus.values():
        try:
            raw = read_table(path)
            one = pipeline.audit_stream(raw)
        except audit.AuditError:
            continue
        if len(raw.data) < 2:
            continue
        _same(pipeline.audit_stream(raw, chunk_rows=2), one)
        audited += 1
    assert audited >= 15


def test_exports_written_a_part_at_a_time_equal_those_of_the_whole(tmp_path, monkeypatch):
    whole = audit.audit_file(DEMO)
    write_json(whole, tmp_path / "whole.json")
    write_csv(whole, tmp_path / "whole.csv")
    write_workbook(whole, tmp_path / "whole.xlsx")
    monkeypatch.setattr(pipeline, "CHUNK_ROWS", 5)
    args = ["check", str(DEMO), "--quiet", "--json", str(tmp_path / "parts.json")]
    args += ["--csv", str(tmp_path / "parts.csv"), "--xlsx", str(tmp_path / "parts.xlsx")]
    assert main(args) == 0

    # Equal to the last bits but where a rare setting's noncentrality is solved directly in one
    # run and read off its interpolant in the other (see _same); the layout is the same.
    def document(name):
        return _rounded(json.loads((tmp_path / name).read_bytes()))

    assert document("parts.json") == document("whole.json")

    assert _csv_rows(tmp_path / "parts.csv") == _csv_rows(tmp_path / "whole.csv")
    assert _workbook_cells(tmp_path / "parts.xlsx") == _workbook_cells(tmp_path / "whole.xlsx")


def _csv_rows(path):
    """The rows of a CSV export, numbers to 11 significant digits (see _same)."""
    with path.open(newline="", encoding="utf-8") as handle:
        return _rounded(list(csv.reader(handle)))


def _workbook_cells(path):
    """The cells of every sheet of a workbook export, numbers as in _csv_rows."""
    from openpyxl import load_workbook

    book = load_workbook(path, read_only=True)
    return {ws.title: _rounded(list(ws.iter_rows(values_only=True))) for ws in book.worksheets}


def test_a_rule_failing_on_a_later_part_reports_no_findings_anywhere(tmp_path, monkeypatch, capsys):
    # One pass: a rule that raises reports no findings at all. In parts it may raise on a later
    # part only, after earlier parts found flags: they are dropped and the exports rewritten.
    from audit import rules as rules_module

    ruleset = load_rules([])
    victim = next(r for r in ruleset.enabled() if r.id == "size-short-of-plan")
    real = type(victim.when).evaluate
    calls = {"n": 0}

    def flaky(self, data, params):
        if self is victim.when:
            calls["n"] += 1
            if calls["n"] > 1:
                raise ZeroDivisionError("boom")
        return real(self, data, params)

    monkeypatch.setattr(type(victim.when), "evaluate", flaky)
    monkeypatch.setattr(rules_module, "load_rules", lambda files: ruleset)
    monkeypatch.setattr(pipeline, "CHUNK_ROWS", 10)
    # Without outcome families (with them, the rules run once on the whole table: see
    # test_families_are_pooled_over_every_part_before_the_rules).
    plain = tmp_path / "plain.csv"
    demo = pd.read_csv(DEMO, dtype=object, keep_default_na=False)
    demo.drop(columns="outcome_family").to_csv(plain, index=False)
    result = pipeline.audit_stream(read_table(plain), rules=ruleset)
    assert "size-short-of-plan" not in set(result.findings["rule"])
    assert list(result.rule_problems["rule"]) == ["size-short-of-plan"]
    out = tmp_path / "a.csv"
    calls["n"] = 0
    document = tmp_path / "a.json"
    assert main(["check", str(plain), "--quiet", "--csv", str(out), "--json", str(document)]) == 0
    assert "size-short-of-plan (" not in out.read_text("utf-8")
    # The JSON is written again from the whole file too, and says which rule failed.
    settings = json.loads(document.read_bytes())["settings"]
    assert [p["rule"] for p in settings["rule_problems"]] == ["size-short-of-plan"]
    assert settings["rules_reapplied"] is True
    flags = {f["rule"] for s in json.loads(document.read_bytes())["studies"] for f in s["flags"]}
    assert "size-short-of-plan" not in flags and flags
    # On standard output the parts written are gone already: the run says the output there is
    # incomplete (exit 2) rather than print a second document after the first. A JSON document
    # of few studies is held until the end, and so is still written whole.
    for option, limit in (("--json", 5), ("--csv", 2_000), ("--json", 2_000)):
        monkeypatch.setattr("audit.export.JSON_INDENT_LIMIT", limit)
        calls["n"] = 0
        capsys.readouterr()
        status = main(["check", str(plain), "--quiet", option, "-"])
        printed, err = capsys.readouterr()
        if limit == 2_000 and option == "--json":
            assert status == 0 and json.loads(printed)["settings"]["rules_reapplied"] is True
        else:
            assert status == 2 and f"after {option} - had begun" in err, err
            assert printed.count('"tool"') + printed.count("study_id,") <= 1  # one start only


def test_families_are_pooled_over_every_part_before_the_rules(monkeypatch):
    # power_at_pooled_effect needs every result of a family, wherever the cut falls: the
    # families are pooled over the whole table and the rules then run once, on all rows, and an
    # export written a part at a time gets the whole result once.
    monkeypatch.setattr(pipeline, "CHUNK_ROWS", 7)
    handed = []
    parts = pipeline.audit_stream(read_table(DEMO), on_part=handed.append)
    monkeypatch.setattr(pipeline, "CHUNK_ROWS", 100_000)
    whole = pipeline.audit_stream(read_table(DEMO))
    assert len(handed) == 1 and len(handed[0].table) == len(whole.table)
    pooled = whole.metrics["power_at_pooled_effect"].to_numpy()
    assert np.isfinite(pooled).sum() >= 10
    np.testing.assert_allclose(parts.metrics["power_at_pooled_effect"], pooled, rtol=1e-10)
    pd.testing.assert_frame_equal(parts.findings, whole.findings)


# -- the lean stream of the command line ------------------------------------------------------


def _without_families(tmp_path):
    """The demo without its outcome_family column (a table naming families is never lean)."""
    plain = tmp_path / "plain.csv"
    demo = pd.read_csv(DEMO, dtype=object, keep_default_na=False)
    demo.drop(columns="outcome_family").to_csv(plain, index=False)
    return plain


def _report(result, limit=None):
    import io

    from rich.console import Console

    from audit.report import MAX_LISTED, THEME, render_report

    console = Console(file=io.StringIO(), width=100, color_system=None, theme=THEME)
    render_report(result, console, fail_on="warning", limit=limit or MAX_LISTED)
    return console.file.getvalue()


def _lean(path, tmp_path, chunk, **kwargs):
    """A lean stream of ``path`` with its JSON written a part at a time, as the command line."""
    from audit.export import JsonExport

    with JsonExport(tmp_path / "lean.json", []) as sink:
        result = pipeline.audit_stream(
            read_table(path), on_part=sink.add, consume=True, lean=True, chunk_rows=chunk, **kwargs
        )
        sink.finish(result)
    return result, json.loads((tmp_path / "lean.json").read_bytes())


@pytest.mark.parametrize("chunk", [1, 4, 9, 1000])
def test_a_lean_stream_reports_and_writes_what_the_whole_result_does(tmp_path, monkeypatch, chunk):
    # The lean result lets go of the notes, most finding messages and the columns the summary
    # and the report do not read; what is rendered from it must not change. With at most three
    # studies listed, studies fall out of the listing as later parts come.
    plain = _without_families(tmp_path)
    whole = audit.audit_file(plain)
    write_json(whole, tmp_path / "whole.json")
    monkeypatch.setattr(pipeline, "MAX_LISTED", 3)
    lean, document = _lean(plain, tmp_path, chunk)
    assert _rounded(document) == _rounded(json.loads((tmp_path / "whole.json").read_bytes()))
    assert _report(lean, limit=3) == _report(whole, limit=3)
    assert _rounded(lean.portfolio) == _rounded(whole.portfolio)  # last bits: see _same
    assert lean.caveats == whole.caveats
    pd.testing.assert_frame_equal(
        lean.findings.drop(columns="message"), whole.findings.drop(columns="message")
    )
    # What was let go: the notes, and the messages of every study but the three listed.
    assert not len(lean.notes) and len(whole.notes)
    kept = lean.findings.dropna(subset=["message"])
    assert kept["pos"].nunique() == 3 < whole.findings["pos"].nunique()
    assert "title" not in lean.table and "planned_n1" not in lean.table
    assert set(lean.metrics) < set(whole.metrics) and "n_required_plan" not in lean.metrics


def test_the_lean_metrics_hold_every_metric_the_summary_and_the_report_read():
    # A lean result keeps pipeline.LEAN_METRICS only; a metric named in a module that renders
    # from it (or summarises it) and missing there would be read as "not computed".
    import re
    from pathlib import Path

    from audit.metrics import METRICS

    package = Path(audit.__file__).parent
    readers = ("report", "portfolio", "caveats", "cli", "excess", "result", "terminal")
    named = {
        name
        for module in readers
        for name in METRICS
        if re.search(rf"[\"']{re.escape(name)}[\"']", (package / f"{module}.py").read_text())
    }
    assert named and named <= pipeline.LEAN_METRICS, sorted(named - pipeline.LEAN_METRICS)
    assert pipeline.LEAN_METRICS <= set(METRICS)  # no name misspelt


@pytest.mark.parametrize("basis", ["planned", "pooled"])
def test_a_lean_stream_summarises_groups_as_the_whole_result(tmp_path, monkeypatch, basis):
    # --group-by reads its columns (a text and a number here) over every part.
    plain = _without_families(tmp_path)
    groups = ("field", "alpha")
    whole = audit.audit_file(plain, group_by=groups, excess_basis=basis)
    monkeypatch.setattr(pipeline, "MAX_LISTED", 3)
    lean, document = _lean(
        plain, tmp_path, 5, group_by=groups, excess=pipeline.ExcessSettings(basis=basis)
    )
    assert lean.groups and _rounded(lean.groups) == _rounded(whole.groups)
    assert _rounded(document) == _rounded(whole.to_dict())
    assert _report(lean, limit=3) == _report(whole, limit=3)


def test_a_lean_stream_of_every_corpus_file_reports_the_same(tmp_path, monkeypatch):
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).parent / "fixtures"))
    import make_fixtures

    corpus = make_fixtures.build(tmp_path / "corpus")
    monkeypatch.setattr(pipeline, "MAX_LISTED", 2)
    audited = 0
    for path in corpus.values():
        try:
            whole = audit.audit_file(path)
        except audit.AuditError:
            continue
        lean, document = _lean(path, tmp_path, 2)
        assert _report(lean, limit=2) == _report(whole, limit=2), path.name
        assert _rounded(document) == _rounded(whole.to_dict()), path.name
        audited += 1
    assert audited >= 15


def test_the_command_line_reports_the_same_from_a_lean_stream(tmp_path, monkeypatch, capsys):
    # check without --html, --plots or --study streams lean; with --html it keeps every detail.
    # With a low indentation limit the JSON is written a part at a time, head first.
    from audit import export

    plain = _without_families(tmp_path)
    monkeypatch.setattr(pipeline, "CHUNK_ROWS", 4)
    monkeypatch.setattr(export, "JSON_INDENT_LIMIT", 10)
    monkeypatch.setenv("COLUMNS", "100")
    args = ["check", str(plain), "--fail-on", "serious"]
    outputs = ["--json", str(tmp_path / "lean.json"), "--csv", str(tmp_path / "lean.csv")]
    lean_status = main([*args, *outputs, "--xlsx", str(tmp_path / "lean.xlsx")])
    lean_out = capsys.readouterr().out
    full_status = main([*args, "--html", str(tmp_path / "r.html")])
    full_out = capsys.readouterr().out
    assert lean_status == full_status
    assert lean_out == full_out and "Studies with findings" in lean_out
    whole = audit.audit_file(plain)
    write_json(whole, tmp_path / "whole.json")
    write_csv(whole, tmp_path / "whole.csv")
    write_workbook(whole, tmp_path / "whole.xlsx")
    lean_text = (tmp_path / "lean.json").read_bytes()
    assert not lean_text.startswith(b"{\n")  # compact: written a part at a time
    assert _rounded(json.loads(lean_text)) == _rounded(
        json.loads((tmp_path / "whole.json").read_bytes())
    )

    assert _csv_rows(tmp_path / "lean.csv") == _csv_rows(tmp_path / "whole.csv")
    assert _workbook_cells(tmp_path / "lean.xlsx") == _workbook_cells(tmp_path / "whole.xlsx")


def test_a_json_written_a_part_at_a_time_from_standard_input_names_it(
    tmp_path, monkeypatch, capsys
):
    import io

    from audit import export

    plain = _without_families(tmp_path)
    monkeypatch.setattr(pipeline, "CHUNK_ROWS", 4)
    monkeypatch.setattr(export, "JSON_INDENT_LIMIT", 10)
    monkeypatch.setattr("sys.stdin", io.TextIOWrapper(io.BytesIO(plain.read_bytes())))
    out = tmp_path / "a.json"
    assert main(["check", "-", "--quiet", "--json", str(out)]) == 0
    document = json.loads(out.read_bytes())
    assert document["settings"]["source"] == "standard input"
    assert len(document["studies"]) == len(audit.audit_file(plain).table)
    assert sorted(tmp_path.iterdir()) == sorted([plain, out])  # no temporary file left


def test_an_unfinished_json_export_is_not_put_in_place(tmp_path):
    from audit import export

    whole = audit.audit_file(DEMO)
    target = tmp_path / "a.json"
    target.write_text("earlier")
    with export.JsonExport(target, []) as sink:
        for _ in range(60):  # past the indentation limit: written to the file as it comes
            sink.add(whole)
    assert target.read_text() == "earlier" and list(tmp_path.iterdir()) == [target]
