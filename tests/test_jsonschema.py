"""The JSON Schema of the output document (``study-audit schema``), checked with jsonschema.

The schema is precise enough to fail: the demo's document validates, and deliberately broken
copies of it (a missing key, a wrong type, a value outside an enum) do not.
"""

from __future__ import annotations

import copy
import json

import pytest
from jsonschema import Draft202012Validator

from audit.cli import main
from audit.jsonout import INTEGER_METRICS, SCHEMA_VERSION, schema_text
from audit.metrics import METRICS, TEXT_METRICS
from audit.resources import bundled_dir

DEMO = bundled_dir("demo_data") / "demo_portfolio.csv"


@pytest.fixture(scope="module")
def schema() -> dict:
    doc = json.loads(schema_text())
    Draft202012Validator.check_schema(doc)  # a valid draft 2020-12 schema
    return doc


@pytest.fixture(scope="module")
def document(tmp_path_factory) -> dict:
    out = tmp_path_factory.mktemp("json") / "audit.json"
    assert main(["check", str(DEMO), "--quiet", "--json", str(out)]) == 0
    return json.loads(out.read_text("utf-8"))


def _errors(schema: dict, doc: dict) -> list[str]:
    return [e.message for e in Draft202012Validator(schema).iter_errors(doc)]


def test_the_demo_document_validates(schema, document):
    assert (
        document["schema_version"]
        == SCHEMA_VERSION
        == schema["properties"]["schema_version"]["const"]
    )
    assert _errors(schema, document) == []


def test_schema_command_prints_the_shipped_schema(capsys, schema):
    assert main(["schema"]) == 0
    assert json.loads(capsys.readouterr().out) == schema


def test_schema_lists_every_metric_with_its_type(schema):
    metrics = schema["$defs"]["metrics"]["properties"]
    # Every metric the tool computes is in the schema (a new metric must be added there), and
    # the names another helper's work adds (non-inferiority) are there, nullable, too.
    assert set(METRICS) <= set(metrics)
    assert set(metrics) - set(METRICS) <= {"detectable_margin", "reference_power"}
    for name, spec in metrics.items():
        allowed = spec.get("type", [])
        if "enum" in spec:
            assert None in spec["enum"], name
        elif name in INTEGER_METRICS:
            assert allowed == ["integer", "null"], name
        elif name in TEXT_METRICS:
            assert allowed == ["string", "null"], name
    verdicts = metrics["ci_verdict"]["enum"]
    assert {"detected", "inconclusive", "non_inferior", "inferior", "equivalent"} <= set(verdicts)
    assert "not_equivalent" in verdicts


def _broken(document: dict, change) -> dict:
    doc = copy.deepcopy(document)
    change(doc)
    return doc


def _first_audited(doc: dict) -> dict:
    return next(s for s in doc["studies"] if s["status"] == "audited")


def _first_flagged(doc: dict) -> dict:
    return next(s for s in doc["studies"] if s["flags"])


BREAKS = {
    "no schema_version": lambda d: d.pop("schema_version"),
    "tool renamed": lambda d: d.update(tool="other"),
    "status outside its enum": lambda d: _first_audited(d).update(status="done"),
    "severity outside its enum": lambda d: _first_flagged(d)["flags"][0].update(severity="fatal"),
    "ci_verdict outside its enum": lambda d: _first_audited(d)["metrics"].update(
        ci_verdict="maybe"
    ),
    "power above 1": lambda d: _first_audited(d)["metrics"].update(power_at_planned_effect=1.5),
    "a metric as text": lambda d: _first_audited(d)["metrics"].update(mde="4.2"),
    "a size not whole": lambda d: _first_audited(d)["metrics"].update(n_required_plan=12.5),
    "a metric missing": lambda d: _first_audited(d)["metrics"].pop("mde"),
    "an unknown metric": lambda d: _first_audited(d)["metrics"].update(mdee=1.0),
    "row as text": lambda d: _first_audited(d).update(row="2"),
    "no flags key": lambda d: _first_audited(d).pop("flags"),
    "an invalid row without errors": lambda d: next(
        s for s in d["studies"] if s["status"] == "invalid"
    ).update(errors=[]),
    "portfolio without audited": lambda d: d["portfolio"].pop("audited"),
    "flag count not whole": lambda d: d["portfolio"]["flag_counts"].update(
        {"power-below-target": 1.5}
    ),
    "deficit without p_value": lambda d: d["portfolio"]["excess_significance"].update(
        deficit={"observed": 1, "expected": 2.0}
    ),
}


def test_group_by_summaries_validate_and_can_fail(schema, tmp_path):
    out = tmp_path / "g.json"
    assert main(["check", str(DEMO), "--quiet", "--group-by", "design", "--json", str(out)]) == 0
    doc = json.loads(out.read_text("utf-8"))
    assert doc["groups"]["design"]
    assert _errors(schema, doc) == []
    first = next(iter(doc["groups"]["design"].values()))
    first["audited"] = "four"
    assert _errors(schema, doc)


@pytest.mark.parametrize("name", list(BREAKS))
def test_a_broken_document_fails_validation(schema, document, name):
    assert _errors(schema, _broken(document, BREAKS[name])), name


def test_the_document_of_a_file_with_every_kind_of_row_validates(schema, tmp_path):
    # Invalid rows (no study_id, an unknown design), a row without a header-level design, and
    # the names of the group-by and non-inferiority work as null.
    source = tmp_path / "in.csv"
    source.write_text(
        "study_id,design,realized_se,alpha\n"
        ",estimate,1,0.05\n"
        "B,nonsense,1,0.05\n"
        "C,estimate,2,0.05\n",
        encoding="utf-8",
    )
    out = tmp_path / "o.json"
    assert main(["check", str(source), "--quiet", "--json", str(out)]) == 0
    doc = json.loads(out.read_text("utf-8"))
    assert _errors(schema, doc) == []
    doc["groups"] = None
    doc["portfolio"]["groups"] = None
    for study in doc["studies"]:
        study["metrics"]["detectable_margin"] = None
    assert _errors(schema, doc) == []
