"""Work shared with a forked child gives the same results as work done in one process."""

from __future__ import annotations

import copy
import json
import os
import sys

import numpy as np
import pandas as pd
import pytest

import audit
from audit import export, metrics, parallel, pipeline
from audit.resources import bundled_dir
from audit.rules import Condition, RuleSet, load_rules

DEMO = bundled_dir("demo_data") / "demo_portfolio.csv"

pytestmark = pytest.mark.skipif(
    not parallel.can_fork(), reason="needs fork (Linux) and more than one core"
)


def _assert_close(a: object, b: object, where: str = "") -> None:
    """Equal documents, numbers to a relative 1e-11."""
    if isinstance(a, dict) and isinstance(b, dict):
        assert a.keys() == b.keys(), where
        for key in a:
            _assert_close(a[key], b[key], f"{where}/{key}")
    elif isinstance(a, list) and isinstance(b, list):
        assert len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _assert_close(x, y, f"{where}/{i}")
    elif isinstance(a, float) and isinstance(b, float):
        assert a == pytest.approx(b, rel=1e-11, nan_ok=True), where
    else:
        assert a == b, where


def _audit(monkeypatch, *, enabled: bool, rules: RuleSet | None = None) -> audit.AuditResult:
    monkeypatch.setattr(parallel, "ENABLED", enabled)
    # The demo's 37 studies suffice to exercise the split.
    monkeypatch.setattr(metrics, "PARALLEL_METRICS_MIN", 2)
    return audit.audit_file(DEMO, rules=rules)


@pytest.mark.parametrize("child_fails", [False, True])
def test_metrics_from_two_processes_equal_one(monkeypatch, child_fails):
    alone = _audit(monkeypatch, enabled=False)
    if child_fails:
        # The parent computes the child's share itself.
        monkeypatch.setattr(parallel.ChildTask, "_run_child", lambda self: os._exit(1))
    shared = _audit(monkeypatch, enabled=True)
    # Equal to the last bits or nearly: a setting shared by few rows is solved directly rather
    # than read off an interpolant (agreeing to about 1e-11), and halving a group can tip that
    # choice.
    pd.testing.assert_frame_equal(shared.metrics, alone.metrics, check_exact=False, rtol=1e-11)
    pd.testing.assert_frame_equal(shared.notes, alone.notes)
    pd.testing.assert_frame_equal(shared.findings, alone.findings)
    _assert_close(shared.to_dict(), alone.to_dict())


def test_the_child_really_computes(monkeypatch):
    # A child that returns wrong numbers must show in the result: the split is in use.
    real = metrics._design_metrics
    parent = os.getpid()

    def wrong_in_child(design, rows, positions, notes, *settings):
        out = real(design, rows, positions, notes, *settings)
        if os.getpid() != parent:
            out["mde"] = np.full(len(rows), -1.0)
        return out

    monkeypatch.setattr(metrics, "_design_metrics", wrong_in_child)
    result = _audit(monkeypatch, enabled=True)
    assert (result.metrics["mde"] == -1.0).any()
    assert (result.metrics["mde"] != -1.0).any()


class _FailsOnLateRows(Condition):
    """A rule condition that breaks on an odd number of rows: on the demo's 37 rows, not on the
    20 of them a JSON child applies the rules to."""

    def evaluate(self, data, params):
        n = len(data.raw("mde"))
        if n % 2:
            raise ZeroDivisionError("boom")
        return np.ones(n, dtype=bool), np.zeros(n, dtype=bool)

    def names(self):
        return {"mde"}


def test_no_child_without_fork(monkeypatch):
    monkeypatch.setattr(sys, "platform", "win32")
    assert not parallel.can_fork()
    with parallel.ChildTask(lambda out: out.write(b"x")) as task:
        assert task.result() is None


def _json_document(monkeypatch, tmp_path, name, **kwargs) -> dict:
    monkeypatch.setattr(export, "JSON_INDENT_LIMIT", 3)
    monkeypatch.setattr(export, "PARALLEL_JSON_MIN", 4)
    result = audit.audit_file(DEMO, **kwargs)
    path = tmp_path / f"{name}.json"
    export.write_json(result, path)
    return json.loads(path.read_text("utf-8"))


@pytest.mark.parametrize("trouble", [None, "child fails", "rule fails"])
def test_json_prepared_during_the_audit_is_the_same_document(monkeypatch, tmp_path, trouble):
    monkeypatch.setattr(parallel, "ENABLED", False)
    alone = _json_document(monkeypatch, tmp_path, "alone")
    monkeypatch.setattr(parallel, "ENABLED", True)
    rules = None
    if trouble == "child fails":
        monkeypatch.setattr(parallel.ChildTask, "_run_child", lambda self: os._exit(1))
    if trouble == "rule fails":
        # Fails on the demo's 37 rows but not on the child's share: the child's findings would
        # keep the rule's flags, so its text must not be used.
        rules = load_rules()
        broken = copy.copy(rules.rules["mde-exceeds-sesoi"])
        object.__setattr__(broken, "when", _FailsOnLateRows())
        rules.rules["mde-exceeds-sesoi"] = broken
        alone = _json_document(monkeypatch, tmp_path, "alone-broken", rules=rules)
    prepared = _json_document(monkeypatch, tmp_path, "prepared", rules=rules, prepare_json=True)
    _assert_close(prepared, alone)


def test_the_prepared_child_really_encodes(monkeypatch, tmp_path):
    # Wrong text from the child must show: the prepared part is what gets written.
    real = pipeline.AuditResult.study_json
    parent = os.getpid()

    def marked(self, chunk=10_000, start=0, stop=None):
        for text in real(self, chunk, start, stop):
            yield (
                text.replace(b'"status":"audited"', b'"status":"from-child"')
                if (os.getpid() != parent)
                else text
            )

    monkeypatch.setattr(pipeline.AuditResult, "study_json", marked)
    document = _json_document(monkeypatch, tmp_path, "marked", prepare_json=True)
    statuses = {study["status"] for study in document["studies"]}
    assert "from-child" in statuses and "audited" in statuses


# -- a table audited in two shares (pipeline._audit_in_shares) ------------------------------------


@pytest.fixture
def shares(monkeypatch):
    """Any table from two rows is audited in shares; the parent takes the first 40 %: rows 0 to
    15 of _demo_with_repeats() (40 rows), the child rows 16 to 39."""
    monkeypatch.setattr(pipeline, "SHARE_MIN", 2)
    monkeypatch.setattr(pipeline, "PARENT_SHARE", 0.4)


def _frames_equal(a: audit.AuditResult, b: audit.AuditResult) -> None:
    # Metrics as in test_metrics_from_two_processes_equal_one: a rarely shared setting may be
    # solved directly in one run and read off the interpolant in the other (1e-11 apart).
    pd.testing.assert_frame_equal(a.metrics, b.metrics, check_exact=False, rtol=1e-11)
    for name in ("table", "errors", "notes", "findings", "rule_problems"):
        pd.testing.assert_frame_equal(getattr(a, name), getattr(b, name), obj=name)
    assert list(a.status) == list(b.status)
    _assert_close(a.to_dict(), b.to_dict())


def _shared_and_alone(monkeypatch, source, **kwargs):
    """The audit of ``source`` by one process, and by two (with the ``shares`` fixture)."""
    monkeypatch.setattr(parallel, "ENABLED", False)
    alone = audit.audit_table(source, **kwargs)
    monkeypatch.setattr(parallel, "ENABLED", True)
    shared = audit.audit_table(source, **kwargs)
    return shared, alone


def _demo_with_repeats(families: bool = True) -> pd.DataFrame:
    """The demo portfolio with trouble across the cut: ids used in both shares, a blank id, a
    bad value, and a row of a design no other row has. ``families=False``: without
    outcome_family (the shares' JSON text is used only where no family is pooled over both)."""
    demo = pd.read_csv(DEMO, dtype=object, keep_default_na=False).iloc[:37]  # the 37 of 2025
    if not families:
        demo = demo.drop(columns="outcome_family")
    repeats = demo.iloc[[0, 1, 30]].copy()
    repeats.loc[repeats.index[0], "study_id"] = ""
    repeats.loc[repeats.index[1], "alpha"] = "five per cent"
    return pd.concat([demo.iloc[:20], repeats, demo.iloc[20:]], ignore_index=True)


@pytest.mark.parametrize("child_fails", [False, True])
def test_a_table_audited_in_two_shares_equals_one_process(shares, monkeypatch, child_fails):
    spied = []
    real = pipeline._audit_share

    def spy(raw, start, stop, *args):
        spied.append((start, stop, os.getpid()))
        return real(raw, start, stop, *args)

    monkeypatch.setattr(pipeline, "_audit_share", spy)
    if child_fails:
        # The parent then audits the child's share itself.
        monkeypatch.setattr(parallel.ChildTask, "_run_child", lambda self: os._exit(1))
    shared, alone = _shared_and_alone(monkeypatch, _demo_with_repeats())
    _frames_equal(shared, alone)
    # A study_id used on both sides of the cut is named, with all its rows, on each of them.
    notes = shared.notes[shared.notes["text"].str.contains("is used by more than one row")]
    assert len(notes) >= 4 and notes["pos"].min() < 16 < notes["pos"].max()
    # This process audited the first 16 rows, and the others only where the child failed.
    here = [(start, stop) for start, stop, _ in spied]
    assert here == ([(0, 16), (16, 40)] if child_fails else [(0, 16)])


def test_shares_keep_the_readers_row_notes_and_cell_problems(shares, monkeypatch, tmp_path):
    # Positions the reader attaches to rows (hidden rows, damaged cells) move with the cut.
    from audit.read import read_table

    raw = read_table(DEMO)
    raw.row_notes = [(3, "row 5 was hidden"), (25, "row 27 was hidden")]
    raw.cell_problems = [(2, "planned_sd", "damaged cell"), (30, "alpha", "damaged cell")]
    shared, alone = _shared_and_alone(monkeypatch, raw)
    _frames_equal(shared, alone)
    assert set(shared.errors["pos"]) >= {2, 30}


class _FailsOnSizes(Condition):
    """A rule condition that breaks when applied to a given number of rows (40: the whole of
    _demo_with_repeats(); 16 and 24: its two shares)."""

    def __init__(self, sizes: set[int]) -> None:
        self.sizes = sizes

    def evaluate(self, data, params):
        n = len(data.raw("mde"))
        if n in self.sizes:
            raise ZeroDivisionError("boom")
        return np.ones(n, dtype=bool), np.zeros(n, dtype=bool)

    def names(self):
        return {"mde"}


def _rules_failing_on(sizes: set[int]) -> RuleSet:
    rules = load_rules()
    broken = copy.copy(rules.rules["mde-exceeds-sesoi"])
    object.__setattr__(broken, "when", _FailsOnSizes(sizes))
    rules.rules["mde-exceeds-sesoi"] = broken
    return rules


@pytest.mark.parametrize(
    ("sizes", "problems"),
    [({24}, 0), ({16, 40}, 1)],
    ids=["fails on the child's share only", "fails on the whole and a share"],
)
def test_a_rule_failing_on_a_share_reports_as_in_one_process(shares, monkeypatch, sizes, problems):
    # A failing share makes the rules run again on the whole table, as one process runs them.
    rules = _rules_failing_on(sizes)
    shared, alone = _shared_and_alone(monkeypatch, _demo_with_repeats(), rules=rules)
    assert len(alone.rule_problems) == problems
    _frames_equal(shared, alone)


@pytest.mark.parametrize("trouble", [None, "rule fails", "families"])
def test_json_of_a_table_audited_in_shares_is_the_same_document(
    shares, monkeypatch, tmp_path, trouble
):
    # With outcome families the pooled estimates span both shares: their powers and notes are
    # added after the merge, and the shares' JSON text (made before) is not used.
    monkeypatch.setattr(export, "JSON_INDENT_LIMIT", 3)
    rules = _rules_failing_on({24}) if trouble == "rule fails" else None
    table = _demo_with_repeats(families=trouble == "families")
    monkeypatch.setattr(parallel, "ENABLED", False)
    export.write_json(audit.audit_table(table, rules=rules), tmp_path / "alone.json")
    monkeypatch.setattr(parallel, "ENABLED", True)
    result = audit.audit_table(table, rules=rules, prepare_json=True)
    assert (result.prepared_studies is not None) == (trouble is None)
    export.write_json(result, tmp_path / "shared.json")
    _assert_close(
        json.loads((tmp_path / "shared.json").read_bytes()),
        json.loads((tmp_path / "alone.json").read_bytes()),
    )


def test_the_shares_json_text_is_what_gets_written(shares, monkeypatch, tmp_path):
    # Text encoded by the child and by the parent during the audit is what the file holds.
    monkeypatch.setattr(export, "JSON_INDENT_LIMIT", 3)
    real = pipeline._write_studies
    parent = os.getpid()

    def marked(share, raw, out):
        real(share, raw, out)
        out.seek(0)
        text = out.read().replace(
            b'"status":"audited"',
            b'"status":"%s"' % (b"by-parent" if os.getpid() == parent else b"by-child"),
        )
        out.seek(0)
        out.truncate()
        out.write(text)

    monkeypatch.setattr(pipeline, "_write_studies", marked)
    result = audit.audit_table(_demo_with_repeats(families=False), prepare_json=True)
    export.write_json(result, tmp_path / "marked.json")
    document = json.loads((tmp_path / "marked.json").read_bytes())
    statuses = [study["status"] for study in document["studies"]]
    assert {"by-parent", "by-child"} <= set(statuses)
    assert "audited" not in statuses
    assert statuses.index("by-child") > max(i for i, s in enumerate(statuses) if s == "by-parent")


def test_no_room_for_the_parents_json_text_costs_time_not_output(shares, monkeypatch, tmp_path):
    monkeypatch.setattr(export, "JSON_INDENT_LIMIT", 3)
    table = _demo_with_repeats(families=False)
    monkeypatch.setattr(parallel, "ENABLED", False)
    export.write_json(audit.audit_table(table), tmp_path / "alone.json")
    monkeypatch.setattr(parallel, "ENABLED", True)
    real = pipeline._write_studies
    parent = os.getpid()

    def full_disk(share, raw, out):
        if os.getpid() == parent:
            raise OSError(28, "No space left on device")
        real(share, raw, out)

    monkeypatch.setattr(pipeline, "_write_studies", full_disk)
    result = audit.audit_table(table, prepare_json=True)
    assert result.prepared_studies is not None and result.prepared_studies.own is None
    export.write_json(result, tmp_path / "shared.json")
    _assert_close(
        json.loads((tmp_path / "shared.json").read_bytes()),
        json.loads((tmp_path / "alone.json").read_bytes()),
    )


@pytest.mark.parametrize("child", ["json child", "shares"])
def test_an_audit_that_fails_stops_its_child(monkeypatch, child):
    # The child of the JSON text (audit_validated) and the child of a share (audit_in_shares).
    if child == "json child":
        monkeypatch.setattr(export, "PARALLEL_JSON_MIN", 4)
    else:
        monkeypatch.setattr(pipeline, "SHARE_MIN", 2)
    closed = []
    real_close = parallel.ChildTask.close

    def close(self):
        closed.append(self._pid)
        real_close(self)

    def broken_summary(*args, **kwargs):
        raise RuntimeError("summary failed")

    monkeypatch.setattr(parallel.ChildTask, "close", close)
    monkeypatch.setattr(pipeline, "portfolio_summary", broken_summary)
    with pytest.raises(RuntimeError, match="summary failed"):
        audit.audit_file(DEMO, prepare_json=True)
    assert closed and closed[0] > 0  # the child was running, and was stopped
    with pytest.raises(ChildProcessError):
        os.waitpid(closed[0], os.WNOHANG)  # and reaped
