"""The command line: exit codes, the JSON contract, CSV export, the demo."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import pytest

from audit import METRICS
from audit.cli import main
from audit.resources import bundled_dir

DEMO = bundled_dir("demo_data") / "demo_portfolio.csv"


def test_check_writes_contract_json(tmp_path, capsys):
    out = tmp_path / "a.json"
    assert main(["check", str(DEMO), "--json", str(out), "--quiet"]) == 0
    doc = json.loads(out.read_text())
    assert doc["tool"] == "study-audit" and doc["version"]
    assert doc["settings"]["target_power_default"] == 0.8
    assert isinstance(doc["settings"]["rules"], list)
    with DEMO.open() as handle:
        ids = [r["study_id"] for r in csv.DictReader(handle)]
    # Every input row appears, in input order, with the contract keys.
    assert [s["study_id"] for s in doc["studies"]] == ids
    for s in doc["studies"]:
        assert set(s) >= {
            "study_id",
            "row",
            "design",
            "status",
            "errors",
            "notes",
            "metrics",
            "flags",
        }
        assert s["status"] in ("audited", "invalid")
        assert set(METRICS) <= set(s["metrics"])
    assert [s["row"] for s in doc["studies"]] == list(range(2, 2 + len(ids)))
    p = doc["portfolio"]
    assert p["studies"] == len(ids) and p["audited"] + p["invalid"] == len(ids)
    for key in (
        "median_power_at_planned_effect",
        "share_at_target_power",
        "median_mde_std",
        "flag_counts",
        "excess_significance",
    ):
        assert key in p
    assert capsys.readouterr().out == ""


def test_check_csv_keeps_user_columns_first(tmp_path):
    out = tmp_path / "a.csv"
    assert main(["check", str(DEMO), "--csv", str(out), "--quiet"]) == 0
    with out.open() as handle:
        rows = list(csv.reader(handle))
    with DEMO.open() as handle:
        header = next(csv.reader(handle))
    assert rows[0][: len(header)] == header
    assert {"status", "power_at_planned_effect", "mde", "errors", "notes", "flags"} <= set(rows[0])
    assert len(rows) - 1 == sum(1 for _ in DEMO.open()) - 1


def test_report_prints_a_table(capsys):
    assert main(["check", str(DEMO)]) == 0
    out = capsys.readouterr().out
    assert "KF-101" in out and "not audited" in out


def test_exit_2_for_unusable_input(tmp_path, capsys):
    assert main(["check", str(tmp_path / "missing.csv")]) == 2
    err = capsys.readouterr().err
    assert "no such file" in err and "Traceback" not in err
    bad = tmp_path / "b.csv"
    bad.write_text("name,value\nx,1\n")
    assert main(["check", str(bad)]) == 2
    assert "study_id and design not found" in capsys.readouterr().err


def test_invalid_rows_do_not_change_exit_status(tmp_path):
    path = tmp_path / "p.csv"
    path.write_text("study_id,design,realized_se\nA,estimate,1\nB,estimate,-1\n")
    assert main(["check", str(path), "--quiet"]) == 0


@pytest.mark.parametrize("fail_on", ["note", "warning", "serious"])
def test_fail_on_exit_status_follows_the_flags(tmp_path, fail_on):
    out = tmp_path / "a.json"
    status = main(["check", str(DEMO), "--quiet", "--json", str(out), "--fail-on", fail_on])
    rank = {"note": 0, "warning": 1, "serious": 2}
    flags = [f for s in json.loads(out.read_text())["studies"] for f in s["flags"]]
    worst = max((rank[f["severity"]] for f in flags), default=-1)
    assert status == (1 if worst >= rank[fail_on] else 0)


def test_without_fail_on_flags_do_not_change_exit_status():
    assert main(["check", str(DEMO), "--quiet"]) == 0


def test_json_to_stdout(capsys):
    assert main(["check", str(DEMO), "--json", "-"]) == 0
    captured = capsys.readouterr()
    doc = json.loads(captured.out)
    assert doc["studies"]
    assert "KF-101" in captured.err  # the report moves to stderr


def test_demo_writes_exports(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path / "d")]) == 0
    assert (tmp_path / "d" / "audit.json").stat().st_size > 0
    assert (tmp_path / "d" / "audit.csv").stat().st_size > 0
    assert str(tmp_path / "d") in capsys.readouterr().out


def test_usage_error_exits_2():
    with pytest.raises(SystemExit) as exc:
        main(["check"])
    assert exc.value.code == 2


# -- rules, --study, --fail-on, --quiet ------------------------------------------------------------

FIXTURE = Path(__file__).parent / "fixtures" / "report_portfolio.csv"


def test_fail_on_serious_exits_1_on_a_serious_finding(capsys):
    # RX-01: 20 per group at d = 0.5 has power about 0.34 (Cohen 1988): power-critically-low.
    assert main(["check", str(FIXTURE), "--quiet", "--fail-on", "serious"]) == 1
    assert capsys.readouterr().out == ""


def test_rules_file_changes_a_threshold_and_the_exit_status(tmp_path):
    rules = tmp_path / "lenient.toml"
    rules.write_text("[override.power-critically-low]\npower_floor = 0.3\n")
    out = tmp_path / "a.json"
    args = ["check", str(FIXTURE), "--quiet", "--fail-on", "serious", "--json", str(out)]
    assert main([*args, "--rules", str(rules)]) == 0
    doc = json.loads(out.read_text())
    assert doc["settings"]["rule_parameters"]["power-critically-low"] == {"power_floor": 0.3}
    assert "power-critically-low" not in doc["portfolio"]["flag_counts"]


def test_bad_rules_file_exits_2_before_reading(tmp_path, capsys):
    rules = tmp_path / "bad.toml"
    rules.write_text("[override.power-below-target]\nthreshold = 0.5\n")
    assert main(["check", str(tmp_path / "missing.csv"), "--rules", str(rules)]) == 2
    err = capsys.readouterr().err
    assert "unknown setting 'threshold'" in err
    assert "valid: severity, enabled, unless, tolerance" in err
    assert "Traceback" not in err


def test_study_shows_one_study_in_depth(capsys):
    assert main(["check", str(FIXTURE), "--study", "RX-03"]) == 0
    out = capsys.readouterr().out
    assert "study RX-03" in out and "Planned versus realized" in out
    assert "sd-assumption-optimistic" in out and "Why:" in out
    assert "RX-01" not in out


def test_unknown_study_exits_2(capsys):
    assert main(["check", str(FIXTURE), "--study", "RX-99"]) == 2
    err = capsys.readouterr().err
    assert "no study with study_id 'RX-99'" in err and "RX-01" in err


def test_unknown_study_writes_no_export(tmp_path, capsys):
    # Exit 2 (an option could not be used) leaves every export as it was: none is put in place.
    outputs = {flag: tmp_path / f"out.{flag[2:]}" for flag in ("--json", "--csv", "--xlsx")}
    outputs["--csv"].write_text("earlier\n")
    args = [a for flag, path in outputs.items() for a in (flag, str(path))]
    assert main(["check", str(FIXTURE), "--study", "RX-99", *args]) == 2
    assert "no study with study_id 'RX-99'" in capsys.readouterr().err
    assert outputs["--csv"].read_text() == "earlier\n"
    assert not outputs["--json"].exists() and not outputs["--xlsx"].exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.csv"]  # no temporary file left


def test_quiet_prints_nothing(tmp_path, capsys):
    assert main(["check", str(FIXTURE), "--quiet", "--csv", str(tmp_path / "a.csv")]) == 0
    captured = capsys.readouterr()
    assert captured.out == "" and captured.err == ""


def test_rules_command_lists_and_documents_every_rule(capsys):
    from audit.rules import load_rules

    assert main(["rules"]) == 0
    listing = capsys.readouterr().out
    for rule in load_rules().rules.values():
        assert rule.id in listing
        assert main(["rules", rule.id]) == 0
        page = " ".join(capsys.readouterr().out.split())
        assert " ".join(rule.title.split()) in page
        assert " ".join(rule.rationale.split())[:60] in page
        for ref in rule.references:
            assert ref[:30] in page


def test_rules_command_with_a_user_file(tmp_path, capsys):
    rules = tmp_path / "mine.toml"
    rules.write_text("[override.power-below-target]\ntolerance = 0.05\n")
    assert main(["rules", "power-below-target", "--rules", str(rules)]) == 0
    out = capsys.readouterr().out
    assert "0.05" in out and "changed by" in out
    assert str(rules) in "".join(out.split())  # a long path may wrap


def test_unknown_rule_id_exits_2(capsys):
    assert main(["rules", "power-below"]) == 2
    assert "did you mean 'power-below-target'" in capsys.readouterr().err


def test_no_progress_bar_when_stderr_is_not_a_terminal(tmp_path, capsys, monkeypatch):
    import audit.cli

    monkeypatch.setattr(audit.cli, "PROGRESS_MIN_BYTES", 0)
    assert main(["check", str(FIXTURE)]) == 0
    assert capsys.readouterr().err == ""


def test_a_rule_that_fails_is_reported_and_counts_for_fail_on(monkeypatch, capsys):
    from audit import rules

    def boom(self, data, params):
        raise RuntimeError("simulated failure")

    monkeypatch.setattr(rules.IsText, "evaluate", boom)  # only rules testing text fail
    assert main(["check", str(FIXTURE), "--quiet", "--fail-on", "warning"]) == 1
    err = capsys.readouterr().err
    assert "rule control-rate-assumption-optimistic could not be evaluated" in err
    assert "simulated failure" in err and "Traceback" not in err
    # The other rules still ran: the serious finding of RX-01 is there.
    assert main(["check", str(FIXTURE), "--quiet", "--fail-on", "serious"]) == 1


def test_study_twice_shows_both_studies(capsys):
    # Issue 13: --study A --study B showed only B.
    assert main(["check", str(DEMO), "--study", "KF-101", "--study", "KF-104"]) == 0
    out = capsys.readouterr().out
    assert "study-audit: study KF-101" in out and "study-audit: study KF-104" in out
    # KF-104 is one-sided (alpha .025, sides 1 in the demo file): the view says so.
    view = out.split("study-audit: study KF-104", 1)[1]
    (test_line,) = [line for line in view.splitlines() if line.startswith(" test ")][:1]
    assert "alpha 0.025 one-sided" in test_line


def test_user_mistakes_with_output_folders_are_exit_2(tmp_path, capsys):
    # Issue 13: --plots onto an existing file was an internal error (exit 3).
    a_file = tmp_path / "taken"
    a_file.write_text("keep me")
    assert main(["check", str(DEMO), "--plots", str(a_file), "--quiet"]) == 2
    assert "is a file" in capsys.readouterr().err
    assert main(["demo", "--out", str(a_file)]) == 2
    assert "is a file" in capsys.readouterr().err
    assert a_file.read_text() == "keep me"


# -- no output replaces a file the run reads (issue 13) -------------------------------------


def _copy_demo(tmp_path: Path) -> Path:
    source = tmp_path / "portfolio.csv"
    source.write_bytes(DEMO.read_bytes())
    return source


def test_respond_never_writes_over_its_input(tmp_path, capsys):
    source = _copy_demo(tmp_path)
    before = source.read_bytes()
    assert main(["respond", str(source), "KF-101", "--out", str(source)]) == 2
    err = capsys.readouterr().err
    assert "is the input file this run reads" in err and "Traceback" not in err
    assert err.count("\n") == 1  # one sentence
    assert source.read_bytes() == before


@pytest.mark.parametrize("option", ["--json", "--csv", "--xlsx"])
def test_no_export_writes_over_a_rules_file(tmp_path, capsys, option):
    source = _copy_demo(tmp_path)
    rules = tmp_path / "ours.toml"
    rules.write_text("[override.size-short-of-plan]\nmin_size_ratio = 0.9\n", encoding="utf-8")
    before = rules.read_bytes()
    args = ["check", str(source), "--rules", str(rules), option, str(rules), "--quiet"]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert "is a rules file this run reads" in err and "Traceback" not in err
    assert rules.read_bytes() == before


def test_no_export_writes_over_the_input_through_a_link(tmp_path, capsys):
    source = _copy_demo(tmp_path)
    before = source.read_bytes()
    link = tmp_path / "link.csv"
    link.symlink_to(source)
    assert main(["check", str(source), "--csv", str(link), "--quiet"]) == 2
    assert "is the input file this run reads" in capsys.readouterr().err
    assert source.read_bytes() == before and link.is_symlink()


# -- command-line conventions (issue 19) -----------------------------------------------------


def _stdin(monkeypatch, data: bytes) -> None:
    import io

    monkeypatch.setattr("sys.stdin", io.TextIOWrapper(io.BytesIO(data)))


def test_check_dash_reads_csv_from_standard_input(monkeypatch, tmp_path, capsys):
    _stdin(monkeypatch, DEMO.read_bytes())
    out = tmp_path / "a.json"
    assert main(["check", "-", "--quiet", "--json", str(out)]) == 0
    doc = json.loads(out.read_text("utf-8"))
    direct = tmp_path / "b.json"
    assert main(["check", str(DEMO), "--quiet", "--json", str(direct)]) == 0
    expected = json.loads(direct.read_text("utf-8"))
    assert [s["metrics"] for s in doc["studies"]] == [s["metrics"] for s in expected["studies"]]
    assert doc["settings"]["source"] == "standard input"


def test_check_dash_reads_a_workbook_from_standard_input(monkeypatch, tmp_path):
    _stdin(monkeypatch, (bundled_dir("demo_data") / "demo_portfolio.xlsx").read_bytes())
    out = tmp_path / "a.json"
    assert main(["check", "-", "--quiet", "--json", str(out)]) == 0
    assert len(json.loads(out.read_text("utf-8"))["studies"]) > 40


def test_empty_standard_input_is_one_sentence(monkeypatch, capsys):
    _stdin(monkeypatch, b"")
    assert main(["check", "-", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("study-audit: standard input is empty") and err.count("\n") == 1


def test_unusable_standard_input_names_standard_input_not_a_temporary_file(monkeypatch, capsys):
    _stdin(monkeypatch, b"title,notes\nx,y\n")
    assert main(["check", "-", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "standard input" in err and "stdin.csv" not in err and "/tmp" not in err


@pytest.mark.parametrize(
    "options,expected",
    [
        (["--json", "-", "--csv", "-"], "--json and --csv both ask for standard output"),
        (["--csv", "-", "--html", "-"], "--csv and --html both ask for standard output"),
        (["--xlsx", "-"], "--xlsx - is refused"),
        (["--plots", "-"], "--plots - is refused"),
    ],
)
def test_standard_output_takes_at_most_one_text_export(options, expected, capsys):
    assert main(["check", str(DEMO), *options]) == 2
    captured = capsys.readouterr()
    assert captured.out == ""  # nothing half-written to standard output
    assert expected in captured.err and captured.err.count("\n") == 1


def test_csv_to_stdout_keeps_the_report_off_it(capsys):
    assert main(["check", str(DEMO), "--csv", "-"]) == 0
    captured = capsys.readouterr()
    rows = list(csv.reader(captured.out.splitlines()))
    assert rows[0][0] == "study_id" and len(rows) > 40
    assert "KF-101" in captured.err
    assert not any("─" in line for line in captured.out.splitlines())  # no report lines


def test_piped_stdin_to_stdout_in_a_real_process(tmp_path):
    import subprocess
    import sys

    done = subprocess.run(
        [sys.executable, "-m", "audit", "check", "-", "--json", "-"],
        input=DEMO.read_bytes(),
        capture_output=True,
        timeout=300,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    doc = json.loads(done.stdout)
    assert doc["studies"][0]["study_id"] == "KF-101"
    assert b"KF-101" in done.stderr  # the report, on standard error


def test_template_refuses_to_overwrite_and_needs_xlsx(tmp_path, capsys):
    out = tmp_path / "t.xlsx"
    assert main(["template", str(out)]) == 0
    before = out.read_bytes()
    assert main(["template", str(out)]) == 2
    assert "exists; add --force" in capsys.readouterr().err
    assert out.read_bytes() == before
    assert main(["template", str(out), "--force"]) == 0
    assert main(["template", str(tmp_path / "t.csv")]) == 2
    assert "ending in .xlsx" in capsys.readouterr().err
    assert not (tmp_path / "t.csv").exists()


def test_bare_command_prints_the_help(capsys):
    assert main([]) == 0
    out = capsys.readouterr().out
    assert out.startswith("usage: study-audit")
    for command in ("check", "demo", "template", "columns", "schema", "rules", "respond"):
        assert command in out
    assert "exit status:" in out and "examples:" in out


@pytest.mark.parametrize("command", ["check", "demo", "template", "rules", "columns", "respond"])
def test_help_texts_have_examples_defaults_and_exit_codes(command, capsys):
    with pytest.raises(SystemExit) as exc:
        main([command, "--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    assert "exit status:" in out and "example" in out
    assert "3  internal error" in out
    if command == "check":
        assert "(default: png)" in out and "(default: 5)" in out
        # Metavars: FILE for what is read, OUT for files written, DIR for folders.
        for option in ("--json OUT", "--csv OUT", "--xlsx OUT", "--plots DIR", "--rules FILE"):
            assert option in out


def test_columns_lists_every_contract_column_with_its_designs(capsys):
    from audit.designs import DESIGNS
    from audit.schema import COLUMNS

    assert main(["columns"]) == 0
    out = capsys.readouterr().out
    for column in COLUMNS:
        assert column.name in out
    assert main(["columns", "--design", "survival"]) == 0
    survival = capsys.readouterr().out
    assert "planned_events" in survival and "planned_icc" not in survival
    for name in DESIGNS["survival"].inputs():
        assert name in survival
    assert main(["columns", "--design", "nope"]) == 2
