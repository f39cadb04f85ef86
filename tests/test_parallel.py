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

    def wrong_in_child(design, rows, positions, notes):
        out = real(design, rows, positions, notes)
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


def test_an_audit_that_fails_stops_its_json_child(monkeypatch):
    monkeypatch.setattr(export, "PARALLEL_JSON_MIN", 4)
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
        os.waitpid(-1, os.WNOHANG)  # and reaped: no child left
