"""Rule cases as data: every file in tests/rule_cases/ names a rule and its passing and failing
rows (see tests/rule_cases/README.md). The sources of the numbers are written in each case."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pandas as pd
import pytest

from audit.metrics import compute_metrics
from audit.read import raw_from_frame
from audit.rules import evaluate_rules, load_rules
from audit.validate import validate

CASES_DIR = Path(__file__).parent / "rule_cases"
CASE_FILES = sorted(CASES_DIR.glob("*.toml"))
RULES = load_rules()


def _cases():
    for path in CASE_FILES:
        doc = tomllib.loads(path.read_text())
        for i, case in enumerate(doc["case"]):
            yield pytest.param(doc["rule"], case, id=f"{doc['rule']}[{i}] {case['name'][:40]}")


def run_case(rule_id: str, case: dict) -> tuple[str, list[str]]:
    """The outcome of the default rule set on one case row: flag / pass / waiting, messages."""
    frame = pd.DataFrame([{"study_id": "case", **case["row"]}])
    validated = validate(raw_from_frame(frame))
    table = validated.table.copy()
    valid = validated.valid.copy()
    for column, value in case.get("table", {}).items():
        table[column] = pd.Series([value], dtype=object)
        valid[:] = True
    assert valid.all(), f"case row invalid: {validated.failures.to_dict('records')}"
    metrics = compute_metrics(table, valid).values
    for column, value in case.get("metrics", {}).items():
        metrics[column] = pd.Series([value], dtype=object if isinstance(value, str) else float)
    evaluation = evaluate_rules(RULES, table, metrics, valid)
    assert evaluation.problems.empty, evaluation.problems.to_dict("records")
    if rule_id in evaluation.waiting:
        return "waiting", []
    mine = evaluation.findings[evaluation.findings["rule"] == rule_id]
    return ("flag" if len(mine) else "pass"), list(mine["message"])


@pytest.mark.parametrize("rule_id,case", list(_cases()))
def test_rule_case(rule_id, case):
    outcome, messages = run_case(rule_id, case)
    assert outcome == case["expect"], f"{case['name']}: got {outcome} {messages}"
    for text in case.get("message_not_contains", []):
        assert not any(text in m for m in messages), f"{text!r} in {messages}"
    for text in case.get("message_contains", []):
        assert any(text in m for m in messages), f"{text!r} not in {messages}"


def test_every_rule_has_flag_and_pass_cases():
    covered: dict[str, set[str]] = {}
    for path in CASE_FILES:
        doc = tomllib.loads(path.read_text())
        assert path.stem == doc["rule"], f"{path.name} should be named after its rule"
        assert doc["rule"] in RULES.rules, f"{path.name}: no such rule"
        covered[doc["rule"]] = {c["expect"] for c in doc["case"]}
        for case in doc["case"]:
            assert set(case) <= {
                "name",
                "expect",
                "row",
                "metrics",
                "table",
                "message_contains",
                "message_not_contains",
            }
    for rule_id in RULES.rules:
        assert {"flag", "pass"} <= covered.get(rule_id, set()), f"{rule_id} lacks cases"


def test_case_runner_sees_the_engine():
    # Guard against a runner that cannot fail: a case's expectation reversed must not pass.
    doc = tomllib.loads((CASES_DIR / "power-below-target.toml").read_text())
    flag = next(c for c in doc["case"] if c["expect"] == "flag")
    assert run_case("power-below-target", flag)[0] == "flag"
    no_effect = {**flag, "row": {k: v for k, v in flag["row"].items() if k != "planned_effect"}}
    assert run_case("power-below-target", no_effect)[0] == "pass"
