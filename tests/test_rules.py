"""The rule engine: rule files as documentation, configuration errors, overrides, three-valued
logic, waiting rules, a failing rule, and evaluation over many rows."""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import audit
from audit.errors import ConfigError
from audit.rules import (
    CONTRACT_METRICS,
    Condition,
    RuleSet,
    evaluate_rules,
    known_columns,
    load_rules,
    parse_rule,
)

RULES_DIR = Path(__file__).resolve().parent.parent / "rules"
DEMO = Path(__file__).resolve().parent.parent / "demo_data" / "demo_portfolio.csv"
BUNDLED = sorted(RULES_DIR.glob("*.toml"))

#: Rules the issue asks for, by what they check; the ids are ours.
REQUIRED_RULES = {
    "power-below-target",
    "power-critically-low",
    "mde-exceeds-sesoi",
    "size-short-of-plan",
    "sd-assumption-optimistic",
    "icc-assumption-optimistic",
    "control-rate-assumption-optimistic",
    "fewer-events-than-planned",
    "sample-size-not-reproducible",
    "sample-size-inputs-incomplete",
    "observed-power-reported",
    "null-result-inconclusive",
}


def _table(**columns) -> pd.DataFrame:
    n = len(next(iter(columns.values())))
    return pd.DataFrame({"study_id": [f"S{i}" for i in range(n)], **columns})


def _two_means(n_per_group, planned=64, effect=0.5, **extra) -> pd.DataFrame:
    n = np.atleast_1d(n_per_group)
    return _table(
        design=["two_means"] * len(n),
        effect_scale=["d"] * len(n),
        planned_effect=[effect] * len(n),
        planned_n1=[planned] * len(n),
        planned_n2=[planned] * len(n),
        realized_n1=list(n),
        realized_n2=list(n),
        **extra,
    )


def _flagged(result, rule_id: str) -> list[str]:
    f = result.findings
    return sorted(result.table["study_id"].iloc[f.loc[f["rule"] == rule_id, "pos"]].tolist())


# -- the rule files are their own documentation ---------------------------------------------------


@pytest.mark.parametrize("path", BUNDLED, ids=lambda p: p.stem)
def test_bundled_rule_is_complete(path):
    doc = tomllib.loads(path.read_text())
    assert set(doc) == {"rule"} and len(doc["rule"]) == 1, "one [[rule]] per bundled file"
    spec = doc["rule"][0]
    assert spec["id"] == path.stem, "the file is named after its rule"
    for key in ("id", "severity", "title", "message", "rationale", "references", "when"):
        assert spec.get(key), f"{path.name} lacks {key}"
    assert spec["severity"] in ("note", "warning", "serious")
    assert len(spec["rationale"].split()) >= 40, "the rationale is a paragraph"
    assert all(len(ref) > 20 for ref in spec["references"])
    assert "\n" not in spec["message"].strip()
    rule = parse_rule(spec, str(path))
    assert rule.message.fields, "the message quotes numbers"
    # Thresholds are named parameters, never numbers written into the condition.
    assert rule.when.literals() == []
    for param in rule.parameters.values():
        assert param.meaning and param.low <= param.value <= param.high


def test_default_rule_set_covers_the_issue():
    assert REQUIRED_RULES <= set(load_rules().rules)


@pytest.mark.parametrize(
    "key", ["id", "severity", "title", "when", "message", "rationale", "references"]
)
def test_a_rule_lacking_a_field_is_rejected(key):
    spec = tomllib.loads((RULES_DIR / "power-below-target.toml").read_text())["rule"][0]
    del spec[key]
    with pytest.raises(ConfigError, match=key):
        parse_rule(spec, "x.toml")


def test_rules_name_only_known_columns():
    names = set(known_columns())
    for rule in load_rules().rules.values():
        assert rule.columns() <= names
    # The metrics a later part of the tool computes are the contract's (DESIGN.md section 5).
    assert {"type_s", "exaggeration", "observed_power", "ci_verdict"} <= set(CONTRACT_METRICS)


# -- user rules files -----------------------------------------------------------------------------


def _write(tmp_path, text: str) -> Path:
    path = tmp_path / "mine.toml"
    path.write_text(text)
    return path


def test_override_changes_threshold_and_outcome(tmp_path):
    # 100 of 128 units (78 %) is flagged at the default 0.8; a stricter reading of "a fifth"
    # lost as the limit (0.75) clears it.
    df = _two_means([50, 64])
    assert _flagged(audit.audit_table(df), "size-short-of-plan") == ["S0"]
    path = _write(tmp_path, "[override.size-short-of-plan]\nmin_size_ratio = 0.75\n")
    result = audit.audit_table(df, rules=path)
    assert _flagged(result, "size-short-of-plan") == []
    assert result.settings["rule_parameters"]["size-short-of-plan"] == {"min_size_ratio": 0.75}
    assert result.settings["rule_files"] == [str(path)]


def test_override_severity_and_switch_off(tmp_path):
    df = _two_means([40])
    path = _write(
        tmp_path,
        "[override.power-below-target]\nseverity = 'serious'\n"
        "[override.mde-exceeds-sesoi]\nenabled = false\n",
    )
    result = audit.audit_table(df, rules=path)
    severities = dict(zip(result.findings["rule"], result.findings["severity"], strict=True))
    assert severities["power-below-target"] == "serious"
    assert "mde-exceeds-sesoi" not in result.settings["rules"]
    assert result.settings["rules_disabled"] == ["mde-exceeds-sesoi"]


def test_overrides_as_a_mapping_and_in_order():
    df = _two_means([50])
    first = {"override": {"size-short-of-plan": {"min_size_ratio": 0.5}}}
    second = {"override": {"size-short-of-plan": {"min_size_ratio": 0.9}}}
    assert _flagged(audit.audit_table(df, rules=[first]), "size-short-of-plan") == []
    assert _flagged(audit.audit_table(df, rules=[first, second]), "size-short-of-plan") == ["S0"]


def test_user_rule_is_added(tmp_path):
    path = _write(
        tmp_path,
        """
[[rule]]
id = "tiny-realized-group"
severity = "note"
title = "A group with fewer than ten analysed units"
message = "Group 1 analysed {realized_n1} units (fewer than {min_units})"
rationale = "Very small groups make the normal-theory approximations fragile."
references = []
when = { column = "realized_n1", below = "min_units" }
parameters.min_units = { value = 10, range = [1, 1000], meaning = "smallest group size" }
""",
    )
    result = audit.audit_table(_two_means([8, 30]), rules=path)
    assert _flagged(result, "tiny-realized-group") == ["S0"]
    message = result.findings.loc[result.findings["rule"] == "tiny-realized-group", "message"]
    assert message.iloc[0] == "Group 1 analysed 8 units (fewer than 10)"


@pytest.mark.parametrize(
    "text,expected",
    [
        ("[override.power-below-targt]\nseverity='note'\n", "did you mean 'power-below-target'"),
        ("[override.nope]\nseverity='note'\n", "known rules: .*power-below-target"),
        (
            "[override.power-below-target]\ntolerence = 0.1\n",
            "valid: severity, enabled, unless, tolerance",
        ),
        (
            "[override.power-below-target]\ntolerance = 0.9\n",
            r"outside its allowed range \[0, 0.5\]",
        ),
        ("[override.power-below-target]\ntolerance = 'x'\n", "must be a number"),
        ("[override.power-below-target]\nseverity = 'fatal'\n", "note, warning, serious"),
        ("[override.power-below-target\n", "not valid TOML"),
        ("[rules]\n", "unknown top-level key rules"),
    ],
)
def test_configuration_errors_say_what_is_valid(tmp_path, text, expected):
    with pytest.raises(ConfigError, match=expected):
        load_rules([_write(tmp_path, text)])


def _rule_text(**changes) -> str:
    base = {
        "id": '"my-rule"',
        "severity": '"note"',
        "title": '"t"',
        "message": '"power {power_at_planned_effect}"',
        "rationale": '"r"',
        "references": "[]",
        "when": '{ column = "power_at_planned_effect", below = 0.5 }',
    }
    base.update(changes)
    return "[[rule]]\n" + "".join(f"{k} = {v}\n" for k, v in base.items() if v is not None)


@pytest.mark.parametrize(
    "changes,expected",
    [
        ({"id": '"MyRule"'}, "kebab-case"),
        ({"when": '{ column = "ci_verdict", below = 0.5 }'}, "holds text"),
        ({"when": '{ column = "mde", is = "big" }'}, "'is' compares text"),
        ({"when": '{ column = "mde", below = 1, above = 2 }'}, "exactly one of"),
        ({"when": '{ column = "mde", below = "threshold" }'}, "neither a parameter"),
        ({"when": "{ all = [] }"}, "at least one"),
        ({"when": '{ column = "mde", blank = true, factor = 2 }'}, "unexpected factor"),
        ({"when": '{ column = "2nd arm", below = 0.5 }'}, "usable name for a column"),
        ({"message": '"power {mde:.2q}"'}, "bad format"),
        # A width or precision past MAX_FORMAT_WIDTH is refused before anything is formatted
        # (format(0.5, ">2000000000") alone would take two gigabytes).
        ({"message": '"power {mde:>2000000000}"'}, "a width or precision above 100"),
        ({"message": '"power {mde:.101f}"'}, "a width or precision above 100"),
        ({"message": '"power {mde:' + "9" * 5000 + '}"'}, "a width or precision above 100"),
        ({"message": '"power {mde"'}, "brace"),
        ({"colour": '"red"'}, "unknown key colour"),
        ({"supersedes": '["no-such-rule"]'}, "supersedes unknown rule"),
        ({"id": '"power-below-target"'}, "already defined"),
    ],
)
def test_bad_user_rules_are_rejected(tmp_path, changes, expected):
    with pytest.raises(ConfigError, match=expected):
        load_rules([_write(tmp_path, _rule_text(**changes))])


def test_parameter_specs_are_checked(tmp_path):
    text = _rule_text(when='{ column = "mde", above = "limit" }')
    with pytest.raises(ConfigError, match="needs exactly value, range and meaning"):
        load_rules([_write(tmp_path, text + "parameters.limit = { value = 1 }\n")])
    with pytest.raises(ConfigError, match="never used"):
        load_rules(
            [
                _write(
                    tmp_path,
                    _rule_text()
                    + "parameters.limit = { value = 1, range = [0, 2], meaning = 'm' }\n",
                )
            ]
        )
    with pytest.raises(ConfigError, match="name of a column"):
        load_rules(
            [
                _write(
                    tmp_path,
                    _rule_text(when='{ column = "mde", above = "sesoi" }')
                    + "parameters.sesoi = { value = 1, range = [0, 2], meaning = 'm' }\n",
                )
            ]
        )


def test_missing_rules_file_is_a_config_error(tmp_path):
    with pytest.raises(ConfigError, match="no such file"):
        load_rules([tmp_path / "absent.toml"])


# -- evaluation semantics -------------------------------------------------------------------------


def _only(*texts: str) -> RuleSet:
    return load_rules([tomllib.loads(t) for t in texts], defaults=False)


def test_blank_values_never_flag_even_under_not():
    # Three-valued logic: not (power >= 0.5) is unknown, not true, when power is blank.
    rules = _only(
        _rule_text(when='{ not = { column = "power_at_planned_effect", at_least = 0.5 } }')
    )
    df = _two_means([20, 64])
    df.loc[1, "planned_effect"] = None
    result = audit.audit_table(df, rules=rules)
    assert np.isnan(result.metrics["power_at_planned_effect"].iloc[1])
    assert _flagged(result, "my-rule") == ["S0"]


def test_any_all_and_columns_as_thresholds():
    rules = _only(
        _rule_text(
            when='{ any = [ { column = "realized_n1", below = "planned_n1", factor = 0.5 },'
            ' { all = [ { column = "sesoi", blank = false },'
            ' { column = "mde", above = "sesoi", magnitude = true } ] } ] }'
        )
    )
    df = _two_means([30, 40, 40], sesoi=[None, 0.9, 0.3])
    # S0: 30 < 0.5 * 64; S1: MDE (about 0.63 at 40 per group) below a SESOI of 0.9; S2: above 0.3
    assert _flagged(audit.audit_table(df, rules=rules), "my-rule") == ["S0", "S2"]


def test_invalid_rows_are_never_flagged():
    df = _two_means([20, 20])
    df.loc[1, "alpha"] = 7  # invalid (not a proportion)
    result = audit.audit_table(df)
    assert set(result.findings["pos"]) == {0}


def test_serious_finding_replaces_its_milder_twin():
    result = audit.audit_table(_two_means([20, 40]))
    assert _flagged(result, "power-critically-low") == ["S0"]
    assert _flagged(result, "power-below-target") == ["S1"]


def test_findings_order_and_json_flags():
    result = audit.audit_table(_two_means([20, 64, 40]))
    assert list(result.findings["pos"]) == sorted(result.findings["pos"])
    doc = result.to_dict()
    assert doc["studies"][1]["flags"] == []
    rules = [f["rule"] for f in doc["studies"][0]["flags"]]
    assert "power-critically-low" in rules
    assert doc["portfolio"]["flag_counts"]["power-critically-low"] == 1
    assert doc["settings"]["rules"] == [r.id for r in load_rules().enabled()]


def test_rules_wait_for_metrics_and_activate_when_they_exist():
    df = _table(
        design=["estimate"] * 2,
        planned_effect=[0.5, 0.5],
        realized_se=[0.2, 0.2],
        observed_effect=[0.1, 0.6],
    )
    result = audit.audit_table(df)
    # A metrics table without the retrospective metrics (as a version that lacks them): the
    # rules that need them wait, without flags and without errors.
    absent = result.metrics.drop(columns=["ci_verdict", "exaggeration", "observed_power"])
    waiting = evaluate_rules(load_rules(), result.table, absent, result.valid)
    assert waiting.waiting == {
        "margin-result-inconclusive": ["ci_verdict"],
        "null-result-inconclusive": ["ci_verdict"],
        "observed-power-reported": ["observed_power"],
        "significant-result-likely-exaggerated": ["ci_verdict", "exaggeration"],
    }
    assert "null-result-inconclusive" not in set(waiting.findings["rule"])
    # With the metrics present they are evaluated.
    metrics = result.metrics.copy()
    metrics["ci_verdict"] = pd.Series(["inconclusive", "detected"], dtype=object)
    metrics["exaggeration"] = [2.0, 1.8]
    evaluation = evaluate_rules(load_rules(), result.table, metrics, result.valid)
    assert evaluation.waiting == {}
    found = set(zip(evaluation.findings["pos"], evaluation.findings["rule"], strict=True))
    assert (0, "null-result-inconclusive") in found
    assert (1, "significant-result-likely-exaggerated") in found
    assert (1, "null-result-inconclusive") not in found


class _Broken(Condition):
    def evaluate(self, data, params):
        raise ZeroDivisionError("boom")

    def names(self):
        return {"mde"}


def test_a_failing_rule_becomes_a_problem_and_the_run_goes_on():
    rules = load_rules()
    broken = copy.copy(rules.rules["mde-exceeds-sesoi"])
    object.__setattr__(broken, "when", _Broken())
    rules.rules["mde-exceeds-sesoi"] = broken
    result = audit.audit_table(_two_means([20]), rules=rules)
    assert result.rule_problems.to_dict("records") == [
        {"rule": "mde-exceeds-sesoi", "severity": "warning", "problem": "ZeroDivisionError: boom"}
    ]
    assert _flagged(result, "power-critically-low") == ["S0"]
    assert result.settings["rule_problems"][0]["rule"] == "mde-exceeds-sesoi"


def test_blank_message_values_read_na():
    rules = _only(
        _rule_text(
            when='{ column = "realized_n1", below = 100 }',
            message='"sesoi {sesoi}, n {realized_n1}"',
        )
    )
    result = audit.audit_table(_two_means([20]), rules=rules)
    assert result.findings["message"].tolist() == ["sesoi n/a, n 20"]


def test_bracketed_clauses_are_left_out_when_a_field_is_blank():
    # Issue 13 / DESIGN.md 9.6: a message never prints a placeholder; a clause quoting a blank
    # value is left out, and alternatives pick the first whose values are all given.
    rules = _only(
        _rule_text(
            when='{ column = "realized_n1", below = 100 }',
            message='"n {realized_n1}[, sesoi {sesoi}][; both {sesoi} and {planned_sd}|; sd '
            '{planned_sd}|; neither] in [0, 1]"',
        )
    )
    table = _two_means([20, 30, 40])
    table["sesoi"] = [0.2, None, 0.3]
    table["planned_sd"] = [None, 4.0, 5.0]
    result = audit.audit_table(table, rules=rules)
    assert result.findings["message"].tolist() == [
        "n 20, sesoi 0.2; neither in [0, 1]",
        "n 30; sd 4 in [0, 1]",
        "n 40, sesoi 0.3; both 0.3 and 5 in [0, 1]",
    ]


def test_a_quoted_value_never_reads_equal_to_the_threshold_it_failed():
    # Issue 13: "Power ... is only 0.50 (below 0.50)". The value gets the decimals it needs.
    rules = _only(
        _rule_text(
            when='{ column = "power_at_planned_effect", below = "floor" }',
            message='"power {power_at_planned_effect:.2f} below {floor:.2f}"',
        )
        + '[rule.parameters.floor]\nvalue = 0.5\nrange = [0.0, 1.0]\nmeaning = "a floor"\n'
    )
    table = pd.DataFrame({"study_id": ["a", "b"]})
    metrics = pd.DataFrame({"power_at_planned_effect": [0.49962, 0.3]})
    found = evaluate_rules(rules, table, metrics, np.ones(2, dtype=bool)).findings
    assert found["message"].tolist() == ["power 0.4996 below 0.50", "power 0.30 below 0.50"]


def test_bundled_messages_never_print_a_placeholder():
    # The demo and random rows of every design (with and without results): no bundled rule's
    # message says "n/a".
    from tests.test_designs_all import _random_rows

    df = _random_rows(np.random.default_rng(11), 600)
    rng = np.random.default_rng(12)
    df["observed_ci_low"] = rng.uniform(-1, 0, len(df))
    df["observed_ci_high"] = df["observed_ci_low"] + rng.uniform(0.1, 2, len(df))
    df.loc[df["design"] == "survival", ["observed_ci_low", "observed_ci_high"]] = [0.6, 1.2]
    df.loc[df["design"] == "correlation", ["observed_ci_low", "observed_ci_high"]] = [-0.1, 0.4]
    df["reported_power"] = np.where(rng.uniform(size=len(df)) < 0.2, 0.4, np.nan)
    for result in (audit.audit_table(df), audit.audit_file(DEMO)):
        messages = result.findings["message"].tolist()
        assert messages and not [m for m in messages if "n/a" in m]


def test_evaluation_is_vectorised_over_many_rows():
    # 50,000 studies: every rule is a handful of array operations (timings belong to
    # benchmarks/, not to tests). Counts are checked against plain numpy.
    rng = np.random.default_rng(7)
    n = 50_000
    table = pd.DataFrame(
        {
            "study_id": np.arange(n).astype(str).astype(object),
            "design": np.full(n, "two_means", dtype=object),
            "hypothesis": np.full(n, "superiority", dtype=object),
            "target_power": np.full(n, 0.8),
            "planned_n1": np.full(n, 64.0),
            "planned_events": np.full(n, np.nan),
            "sesoi": rng.uniform(0.1, 1.0, n),
            "reported_power": np.full(n, np.nan),
        }
    )
    metrics = pd.DataFrame(
        {
            "power_at_planned_effect": rng.uniform(0, 1, n),
            "mde": rng.uniform(0.1, 1.0, n),
            "n_ratio": rng.uniform(0.5, 1.2, n),
            "plan_power": rng.uniform(0, 1, n),
        }
    )
    for name in ("sd_ratio", "icc_ratio", "events_ratio", "plan_discrepancy"):
        metrics[name] = np.nan
    for name in ("power_cost_nuisance", "power_cost_attrition", "power_at_sesoi"):
        metrics[name] = rng.uniform(0, 0.2, n)
    metrics["n_required_plan"] = 128.0
    metrics["mde_sesoi_ratio"] = metrics["mde"] / table["sesoi"]
    metrics["sesoi_used"] = table["sesoi"]
    for name in ("planned_sd", "realized_sd", "planned_icc", "realized_icc", "planned_p1"):
        table[name] = np.nan
    for name in ("realized_p1", "realized_events"):
        table[name] = np.nan
    evaluation = evaluate_rules(load_rules(), table, metrics, np.ones(n, dtype=bool))
    power = metrics["power_at_planned_effect"].to_numpy()
    counts = evaluation.findings["rule"].value_counts()
    assert counts["power-critically-low"] == (power < 0.5).sum()
    assert counts["power-below-target"] == ((power >= 0.5) & (power < 0.79)).sum()
    assert counts["mde-exceeds-sesoi"] == (metrics["mde"] > table["sesoi"]).sum()
    assert len(evaluation.findings) == counts.sum()
    assert counts["size-short-of-plan"] == (metrics["n_ratio"] < 0.8).sum()


# -- rules on the file's own columns (issue 19) --------------------------------------------------


def _with_type(types, n=40) -> pd.DataFrame:
    # 40 per group at d = 0.5: power about 0.60 (Cohen 1988, table 2.3.5, from memory), so
    # power-below-target fires on every row unless exempted.
    return _two_means([n] * len(types), **{"Study Type": types, "year": ["2019", "2021", "x"]})


EXEMPT_PILOTS = {
    "override": {"power-below-target": {"unless": {"column": "study_type", "is": "pilot"}}}
}


def test_an_override_exempts_rows_by_a_user_column():
    df = _with_type(["pilot", "main", ""])
    before = audit.audit_table(df)
    assert _flagged(before, "power-below-target") == ["S0", "S1", "S2"]
    after = audit.audit_table(df, rules=EXEMPT_PILOTS)
    # Only the pilot is exempt; a blank study type does not exempt (three-valued logic).
    assert _flagged(after, "power-below-target") == ["S1", "S2"]
    # The other rules are untouched; the exempt row is judged (known false), not unknown.
    assert _flagged(after, "power-critically-low") == _flagged(before, "power-critically-low")
    assert after.rules_judged["power-below-target"] == before.rules_judged["power-below-target"]
    assert "unless study_type is 'pilot'" in after.rules[0].condition_text() or any(
        "unless study_type is 'pilot'" in r.condition_text() for r in after.rules
    )


def test_a_rule_condition_may_test_user_columns_as_text_and_number():
    rules = _only(
        _rule_text(
            when='{ all = [ { column = "Study Type", is = ["main", "pilot"] },'
            ' { column = "year", at_least = 2020 } ] }',
            message='"a {study_type} study of {year}"',
        )
    )
    df = _with_type(["pilot", "main", "main"])
    result = audit.audit_table(df, rules=rules)
    # S0: 2019 < 2020; S1: main, 2021; S2: year 'x' is no number -> unknown, not flagged.
    assert _flagged(result, "my-rule") == ["S1"]
    assert result.findings["message"].tolist() == ["a main study of 2021"]


def test_overrides_add_exemptions_from_each_file():
    second = {"override": {"power-below-target": {"unless": {"column": "year", "below": 2020}}}}
    df = _with_type(["pilot", "main", "main"])
    result = audit.audit_table(df, rules=[EXEMPT_PILOTS, second])
    # S0 is a pilot (and of 2019); S1 of 2021 and S2 (year unknown) stay flagged.
    assert _flagged(result, "power-below-target") == ["S1", "S2"]
    result = audit.audit_table(_with_type(["main", "main", "main"]), rules=[EXEMPT_PILOTS, second])
    assert _flagged(result, "power-below-target") == ["S1", "S2"]


@pytest.mark.parametrize(
    "rules,expected",
    [
        (
            {
                "override": {
                    "power-below-target": {"unless": {"column": "trial_type", "is": "pilot"}}
                }
            },
            r"rule 'power-below-target' .*reads 'trial_type' \(did you mean 'study_type'\?\), "
            r"which is neither .*the file's own columns: study_type, year",
        ),
        (
            {
                "rule": [
                    tomllib.loads(
                        _rule_text(when='{ column = "power_at_planed_effect", below = 0.5 }')
                    )["rule"][0]
                ]
            },
            "reads 'power_at_planed_effect' \\(did you mean 'power_at_planned_effect'",
        ),
    ],
)
def test_a_rule_reading_a_column_the_file_lacks_is_an_error(rules, expected):
    # Documented choice (rules/README.md): an exemption or condition on a missing column is a
    # configuration error, never a rule that silently exempts or fires on nothing.
    with pytest.raises(ConfigError, match=expected):
        audit.audit_table(_with_type(["pilot", "main", ""]), rules=rules)


def test_cli_exemption_and_missing_column_exit_codes(tmp_path):
    from audit.cli import main

    source = tmp_path / "in.csv"
    _with_type(["pilot", "main", ""]).to_csv(source, index=False)
    good = _write(
        tmp_path,
        '[override.power-below-target]\nunless = { column = "study_type", is = "pilot" }\n',
    )
    out = tmp_path / "o.json"
    assert main(["check", str(source), "--quiet", "--rules", str(good), "--json", str(out)]) in (
        0,
        1,
    )
    bad = tmp_path / "bad.toml"
    bad.write_text(
        '[override.power-below-target]\nunless = { column = "trial_type", is = "pilot" }\n'
    )
    assert main(["check", str(source), "--quiet", "--rules", str(bad)]) == 2


def test_unless_is_checked_like_a_condition(tmp_path):
    with pytest.raises(ConfigError, match="exactly one of"):
        load_rules(
            [
                {
                    "override": {
                        "power-below-target": {"unless": {"column": "x", "below": 1, "above": 2}}
                    }
                }
            ]
        )
    with pytest.raises(ConfigError, match="not severity, enabled or unless"):
        load_rules(
            [
                _write(
                    tmp_path,
                    _rule_text(when='{ column = "mde", above = "unless" }')
                    + "[rule.parameters.unless]\nvalue = 1\nrange = [0, 2]\nmeaning = 'm'\n",
                )
            ]
        )


def test_column_texts_are_trimmed_as_text_once_per_distinct_value():
    # str(value).strip() per value, missing values kept as they are (the expression the
    # per-distinct-text path replaces, applied value by value).
    from audit.rules import _trimmed

    cases = [
        np.array([" a", "a ", None, "", "  ", "b\t", float("nan")], dtype=object),
        np.array([1, " 1", 1.0, True, None, "x "], dtype=object),
        np.array([None, None], dtype=object),
    ]
    for values in cases:
        expected = [v if v is None or v != v else str(v).strip() for v in values.tolist()]
        got = _trimmed(values).tolist()
        assert len(got) == len(expected)
        for g, e in zip(got, expected, strict=True):
            assert (g is None and e is None) or (g != g and e != e) or g == e, (g, e)


def test_sharpened_precision_is_the_first_that_tells_value_from_threshold():
    # The value is printed with the fewest extra decimals (at most four) at which it no longer
    # reads as the threshold printed the same way; checked by formatting at each precision.
    from audit.rules import _sharpened_specs

    rng = np.random.default_rng(7)
    threshold = np.full(2000, 0.5)
    values = 0.5 + rng.choice([-1, 1], 2000) * 10.0 ** rng.uniform(-7, -0.5, 2000)
    values[:3] = [0.5, 0.4996, 0.50004]
    for spec, head, digits, kind in ((".2f", "", 2, "f"), (".0%", "", 0, "%")):
        got = _sharpened_specs(values, threshold, spec)
        for v, s in zip(values.tolist(), got, strict=True):
            d = digits
            while (
                d < digits + 4
                and v != 0.5
                and format(v, f".{d}{kind}") == format(0.5, f".{d}{kind}")
            ):
                d += 1
            assert s == f"{head}.{d}{kind}", (v, s)
    assert _sharpened_specs(values[:2], threshold[:2], ".2f") == [".2f", ".4f"]
