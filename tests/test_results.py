"""Reported results through the whole audit: derived values and their notes, CI verdicts,
Type S/M, the observed-power flag, the portfolio's excess-significance block and the exports."""

from __future__ import annotations

import csv
import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.power import TTestIndPower

import audit
from audit.errors import ConfigError
from audit.export import write_csv, write_json

BASE = {
    "design": "two_means",
    "planned_n1": 64,
    "planned_n2": 64,
    "realized_n1": 50,
    "realized_n2": 50,
    "planned_sd": 10,
    "realized_sd": 10,
    "planned_effect": 5,
    "sesoi": 3,
}


def _audit(rows: list[dict], **kw) -> audit.AuditResult:
    frame = pd.DataFrame([{**BASE, "study_id": f"R{i}", **r} for i, r in enumerate(rows)])
    return audit.audit_table(frame.astype(object), **kw)


def _notes(result: audit.AuditResult, pos: int) -> list[str]:
    return result.notes.loc[result.notes["pos"] == pos, "text"].tolist()


def test_results_derived_from_what_was_reported():
    # Realized design: two groups of 50, so the study's test is a t test on 98 df; its 95 %
    # interval and p-values are those of scipy's t distribution with 98 df.
    t98 = stats.t(98)
    q = t98.isf(0.025)
    result = _audit(
        [
            {"observed_effect": 4.0, "observed_se": 2.0},
            {"observed_ci_low": 4.0 - q * 2.0, "observed_ci_high": 4.0 + q * 2.0},
            {"observed_effect": 4.0, "observed_p": 2 * t98.sf(2.0)},
            {"observed_p": 0.01},
            {},
        ]
    )
    m = result.metrics
    np.testing.assert_allclose(m.loc[:2, "result_effect"], 4.0)
    np.testing.assert_allclose(m.loc[:2, "result_se"], 2.0, rtol=1e-9)
    np.testing.assert_allclose(m.loc[:2, "result_p"], 2 * t98.sf(2.0), rtol=1e-7)
    np.testing.assert_allclose(m.loc[:2, "result_ci_low"], 4.0 - q * 2.0, rtol=1e-9)
    np.testing.assert_allclose(m.loc[:2, "result_ci_high"], 4.0 + q * 2.0, rtol=1e-9)
    assert m.loc[:2, "result_ci_level"].tolist() == pytest.approx([0.95] * 3)
    assert "observed_se derived from the confidence interval (95% level, t, 98 df)" in _notes(
        result, 1
    )
    assert "observed_effect derived: midpoint of the confidence interval" in _notes(result, 1)
    assert any(
        "observed_se derived from observed_effect and observed_p" in t for t in _notes(result, 2)
    )
    assert any("observed_p derived" in t for t in _notes(result, 0))
    # p only: significant, so detected, but no interval, effect or SE.
    assert m.loc[3, "result_significant"] == 1.0 and m.loc[3, "ci_verdict"] == "detected"
    assert np.isnan(m.loc[3, "result_se"])
    assert any(t.startswith("result_se: not computed") for t in _notes(result, 3))
    # Nothing reported: one note for the whole group, and every result metric is null.
    assert m.loc[4, "ci_verdict"] is None and np.isnan(m.loc[4, "result_p"])
    assert any(t.startswith("no result reported") for t in _notes(result, 4))
    assert not any(t.startswith("result_p:") for t in _notes(result, 4))


def test_ci_verdicts_through_the_audit():
    # Planned effect 5, SESOI 3; intervals chosen by hand (two-sided test at .05, 95 % CIs).
    result = _audit(
        [
            {"observed_effect": 4.0, "observed_ci_low": 1.0, "observed_ci_high": 7.0},
            {"observed_effect": 0.5, "observed_ci_low": -2.0, "observed_ci_high": 2.5},
            {"observed_effect": 1.0, "observed_ci_low": -2.0, "observed_ci_high": 4.0},
            {"observed_effect": 2.0, "observed_ci_low": -3.0, "observed_ci_high": 7.0},
            {"observed_effect": 1.0, "observed_ci_low": 0.2, "observed_ci_high": 1.8},
            {"observed_effect": -4.0, "observed_ci_low": -7.0, "observed_ci_high": -1.0},
        ]
    )
    assert result.metrics["ci_verdict"].tolist() == [
        "detected",
        "excludes_sesoi",
        "excludes_planned_effect",
        "inconclusive",
        "detected",
        "detected",
    ]
    assert any("smaller than the study was powered for" in t for t in _notes(result, 4))
    assert "significant in the direction opposite to the one used" in _notes(result, 5)
    assert result.portfolio["ci_verdict_counts"] == {
        "detected": 3,
        "excludes_sesoi": 1,
        "excludes_planned_effect": 1,
        "inconclusive": 1,
    }


def test_reported_results_must_hang_together():
    result = _audit(
        [
            {"observed_effect": 1.0, "observed_ci_low": 3.0, "observed_ci_high": 2.0},
            {"observed_effect": 9.0, "observed_ci_low": 1.0, "observed_ci_high": 2.0},
            {"observed_effect": 1.0, "observed_ci_low": 0.5},
        ]
    )
    assert result.status.tolist() == ["invalid", "invalid", "audited"]
    reasons = dict(zip(result.errors["pos"], result.errors["reason"], strict=True))
    assert "must not be below observed_ci_low" in reasons[0]
    assert "must lie within the confidence interval" in reasons[1]
    assert "only one confidence limit reported: the interval is not used" in _notes(result, 2)


def test_precision_against_the_plan_and_the_realized_design():
    # Half-widths: t quantile x SE. Plan: 64 + 64, SD 10 (126 df); realized: 50 + 50 (98 df).
    result = _audit([{"observed_effect": 4.0, "observed_se": 2.5}])
    m = result.metrics.iloc[0]
    plan = stats.t.isf(0.025, 126) * 10 * np.sqrt(2 / 64)
    real = stats.t.isf(0.025, 98) * 10 * np.sqrt(2 / 50)
    observed = stats.t.isf(0.025, 98) * 2.5
    assert m["ci_halfwidth_plan"] == pytest.approx(plan)
    assert m["ci_halfwidth_realized"] == pytest.approx(real)
    assert m["ci_halfwidth_observed"] == pytest.approx(observed)
    assert m["ci_halfwidth_ratio_plan"] == pytest.approx(observed / plan)
    assert m["ci_halfwidth_ratio_realized"] == pytest.approx(observed / real)


def test_type_s_m_use_the_realized_se():
    # An estimate row reproducing Gelman & Carlin's (2014) ovulation-and-voting example (from
    # memory): true effect 2, SE 8.1 -> Type S about 0.24, exaggeration about 9.5. The SESOI
    # variant at 8.1 x 2.8 has about 80 % power: Type S about 0, exaggeration about 1.13
    # (closed form checked against integration in test_retro.py).
    frame = pd.DataFrame(
        {
            "study_id": ["GC"],
            "design": ["estimate"],
            "planned_se": [8.1],
            "realized_se": [8.1],
            "planned_effect": [2.0],
            "sesoi": [8.1 * 2.8],
        }
    )
    m = audit.audit_table(frame).metrics.iloc[0]
    assert m["type_s"] == pytest.approx(0.24, abs=0.01)
    assert m["exaggeration"] == pytest.approx(9.5, rel=0.05)
    assert m["type_s_at_sesoi"] < 1e-5
    assert m["exaggeration_at_sesoi"] == pytest.approx(1.13, abs=0.01)


def test_observed_power_is_flagged_with_hoenig_heisey():
    # A study reporting post-hoc power 0.29 with p = 0.16 (two-sided t, 98 df): its observed
    # power, computed with statsmodels (TTestIndPower at the observed d), is about 0.29.
    t_obs = stats.t.isf(0.08, 98)
    d_obs = t_obs * np.sqrt(1 / 50 + 1 / 50)
    expected = TTestIndPower().power(effect_size=d_obs, nobs1=50, alpha=0.05, ratio=1.0)
    result = _audit(
        [
            {"observed_effect": 3.0, "observed_p": 0.16, "reported_power": round(expected, 2)},
            {"observed_effect": 3.0, "observed_p": 0.16, "reported_power": 0.80},
            {"reported_power": 0.35},
            {"observed_effect": 3.0, "observed_p": 0.16},
        ]
    )
    m = result.metrics
    assert m.loc[0, "observed_power_from_p"] == pytest.approx(expected, rel=1e-6)
    f = result.findings[result.findings["rule"] == "observed-power-reported"]
    assert f["pos"].tolist() == [0, 1, 2]
    assert set(f["severity"]) == {"warning"}
    assert f"{expected:.2f}" in f["message"].iloc[0] and "p = 0.16" in f["message"].iloc[0]
    notes = result.by_row(result.notes, "text")
    assert any("matches the observed power" in n and "Hoenig & Heisey 2001" in n for n in notes[0])
    assert any("differs from the observed power" in n for n in notes[1])
    assert any("without a result to compare" in n for n in notes[2])
    assert result.portfolio["flag_counts"]["observed-power-reported"] == 3
    doc = result.to_dict()
    assert "observed-power-reported" in {f["rule"] for f in doc["studies"][0]["flags"]}
    assert "observed_power" in {c["topic"] for c in doc["caveats"]}


def _estimate_portfolio(n: int, significant: int, se: float = 1.0, effect: float = 2.0):
    """``n`` estimate rows with the same SE and planned effect, ``significant`` of them with a
    significant result (z = 3) and the others not (z = 0.5)."""
    z = np.where(np.arange(n) < significant, 3.0, 0.5)
    return pd.DataFrame(
        {
            "study_id": [f"E{i}" for i in range(n)],
            "design": "estimate",
            "planned_se": se,
            "realized_se": se,
            "planned_effect": effect,
            "observed_effect": z * se,
            "observed_se": se,
        }
    )


def test_excess_significance_block_against_scipy_binomtest():
    # Hand-made portfolio: 12 studies with equal power at the planned effect (z test, effect /
    # SE = 2, power computed with scipy's normal distribution), 10 of them significant.
    # Reference p-value: scipy.stats.binomtest, one-sided.
    result = audit.audit_table(_estimate_portfolio(12, 10))
    block = result.portfolio["excess_significance"]
    power = stats.norm.sf(1.959964 - 2.0) + stats.norm.cdf(-1.959964 - 2.0)
    assert block["observed"] == 10 and block["studies"] == 12
    assert block["expected"] == pytest.approx(12 * power, rel=1e-6)
    expected = stats.binomtest(10, 12, power, alternative="greater").pvalue
    assert block["p_value"] == pytest.approx(expected, rel=1e-6)
    assert block["method"].startswith("exact binomial")
    assert block["basis"].startswith("planned effect")
    # The chi-square form (Ioannidis & Trikalinos 2007), computed with scipy.stats.chi2.
    chi = audit.audit_table(_estimate_portfolio(12, 10), excess_method="chi2")
    block = chi.portfolio["excess_significance"]
    o, e, n = 10, 12 * power, 12
    a = (o - e) ** 2 / e + (o - e) ** 2 / (n - e)
    assert block["statistic"] == pytest.approx(a, rel=1e-6)
    assert block["p_value"] == pytest.approx(stats.chi2.sf(a, 1) / 2, rel=1e-6)
    assert block["method"].startswith("chi-square")
    assert chi.settings["excess_significance"]["method"] == "chi2"


def test_excess_significance_skipped_with_a_note():
    result = audit.audit_table(_estimate_portfolio(4, 4))
    assert result.portfolio["excess_significance"] is None
    note = result.portfolio["excess_significance_note"]
    assert "4 studies" in note and "at least 5" in note
    runs = audit.audit_table(_estimate_portfolio(4, 4), excess_min_studies=3)
    assert runs.portfolio["excess_significance"]["observed"] == 4
    doc = json.loads(json.dumps(result.to_dict(), allow_nan=False))
    assert doc["portfolio"]["excess_significance"] is None


def test_excess_significance_pooled_basis():
    # Two outcome families. The fixed-effect pooled estimate is the inverse-variance weighted
    # mean (computed here by hand); each study's power at it uses its own SE (normal, scipy);
    # the p-value is the Poisson-binomial tail (computed with scipy.stats.poisson_binom).
    effect = np.array([0.9, 0.5, 0.7, 0.2, 2.0, 1.5, 1.1, 1.8, 0.4])
    se = np.array([0.3, 0.25, 0.4, 0.2, 0.6, 0.5, 0.55, 0.7, 0.9])
    family = ["sleep"] * 4 + ["pain"] * 4 + ["lonely"]
    frame = pd.DataFrame(
        {
            "study_id": [f"P{i}" for i in range(9)],
            "design": "estimate",
            "realized_se": se,
            "planned_effect": 1.0,
            "observed_effect": effect,
            "observed_se": se,
            "outcome_family": family,
        }
    )
    result = audit.audit_table(frame, excess_basis="pooled")
    block = result.portfolio["excess_significance"]
    c = stats.norm.isf(0.025)
    power = np.empty(8)
    for rows in (slice(0, 4), slice(4, 8)):
        w = 1 / se[rows] ** 2
        pooled = np.sum(w * effect[rows]) / np.sum(w)
        lam = pooled / se[rows]
        power[rows] = stats.norm.sf(c - lam) + stats.norm.cdf(-c - lam)
        label = family[rows.start]
        assert block["families"][label]["pooled_estimate"] == pytest.approx(pooled)
    sig = np.abs(effect[:8] / se[:8]) > c
    assert block["studies"] == 8 and block["excluded_family_too_small"] == 1
    assert block["observed"] == int(sig.sum())
    assert block["expected"] == pytest.approx(power.sum(), rel=1e-9)
    ref = stats.poisson_binom(power).sf(int(sig.sum()) - 1)
    assert block["p_value"] == pytest.approx(ref, rel=1e-8)
    assert "fixed-effect" in block["basis"]
    random = audit.audit_table(frame, excess_basis="pooled", excess_pooling="random")
    assert "random-effects" in random.portfolio["excess_significance"]["basis"]


@pytest.mark.parametrize(
    "kw,words",
    [
        ({"excess_basis": "largest"}, "excess_basis must be 'planned' or 'pooled'"),
        ({"excess_method": "z"}, "excess_method must be 'exact' or 'chi2'"),
        ({"excess_pooling": "bayes"}, "excess_pooling must be"),
        ({"excess_min_studies": 0}, "excess_min_studies must be a whole number"),
    ],
)
def test_bad_excess_settings_are_a_config_error(kw, words):
    with pytest.raises(ConfigError, match=words):
        audit.audit_table(_estimate_portfolio(3, 1), **kw)


def test_designs_without_a_signed_effect_mark_se_metrics_not_applicable(monkeypatch):
    # An F-test design declares se_realized not applicable; only result_p and
    # result_significant then apply. Simulated by giving the estimate design that declaration.
    design = audit.DESIGNS["estimate"]
    monkeypatch.setattr(
        design, "not_applicable", {**design.not_applicable, "se_realized": "F test"}
    )
    frame = pd.DataFrame(
        {
            "study_id": ["F1", "F2"],
            "design": "estimate",
            "realized_se": 1.0,
            "planned_effect": 2.0,
            "observed_p": [0.01, None],
        }
    )
    result = audit.audit_table(frame)
    m = result.metrics
    assert m["result_significant"].tolist()[0] == 1.0 and m["result_p"][0] == 0.01
    assert m["ci_verdict"].isna().all() and m["type_s"].isna().all()
    text = " ".join(_notes(result, 0))
    assert "not applicable to estimate" in text and "type_s" in text and "ci_verdict" in text
    assert any("missing observed_p" in t for t in _notes(result, 1))


def test_ratio_designs_work_on_the_log_scale(monkeypatch):
    # A hazard-ratio-like design through the analysis-scale hooks: effects and CIs as ratios,
    # SEs on the log scale, direction and SESOI on the log scale. The 95 % CI 0.66-0.97
    # gives SE = (ln 0.97 - ln 0.66) / (2 x 1.96) (normal quantile from scipy).
    design = audit.DESIGNS["estimate"]
    monkeypatch.setattr(design, "to_analysis", lambda x: np.log(np.asarray(x, dtype=float)))
    monkeypatch.setattr(design, "from_analysis", lambda x: np.exp(np.asarray(x, dtype=float)))
    monkeypatch.setattr(design, "orient", lambda v, d: np.exp(d * np.abs(np.log(v))))
    frame = pd.DataFrame(
        {
            "study_id": ["H1", "H2"],
            "design": "estimate",
            "realized_se": 0.1,
            "planned_effect": 0.75,
            "sesoi": 0.9,
            "observed_effect": [0.80, 0.95],
            "observed_ci_low": [0.66, 0.85],
            "observed_ci_high": [0.97, 1.06],
        }
    )
    result = audit.audit_table(frame)
    m = result.metrics
    z = stats.norm.isf(0.025)
    assert m.loc[0, "result_se"] == pytest.approx((np.log(0.97) - np.log(0.66)) / (2 * z))
    assert m["result_effect"].tolist() == [0.80, 0.95]
    assert m["ci_verdict"].tolist() == ["detected", "excludes_planned_effect"]
    assert m.loc[1, "result_ci_low"] == pytest.approx(0.85)
    assert "on the analysis scale" not in " ".join(_notes(result, 0))  # effect was reported


def test_text_metric_in_json_and_csv(tmp_path):
    result = _audit([{"observed_effect": 4.0, "observed_se": 1.0}, {}])
    write_json(result, tmp_path / "a.json")
    doc = json.loads((tmp_path / "a.json").read_text())
    assert doc["studies"][0]["metrics"]["ci_verdict"] == "detected"
    assert doc["studies"][1]["metrics"]["ci_verdict"] is None
    assert doc["studies"][0]["metrics"]["result_significant"] == 1.0
    write_csv(result, tmp_path / "a.csv")
    with (tmp_path / "a.csv").open() as handle:
        rows = list(csv.DictReader(handle))
    assert rows[0]["ci_verdict"] == "detected" and rows[1]["ci_verdict"] == ""


def test_an_effect_without_its_uncertainty():
    # Only an estimate: nothing about its precision, significance or what it rules out.
    result = _audit([{"observed_effect": 4.0}])
    m = result.metrics.iloc[0]
    assert m["result_effect"] == 4.0
    assert np.isnan(m["result_se"]) and np.isnan(m["observed_power"]) and m["ci_verdict"] is None
    notes = _notes(result, 0)
    assert any(t.startswith("result_se: not computed, needs observed_se") for t in notes)
    assert any(t.startswith("ci_verdict: not computed, no confidence interval") for t in notes)
    assert "observed_power_from_p: not computed, observed_p not reported" in notes


def test_demo_json_carries_the_retrospective_block(tmp_path):
    # Done-when of the issue: `check` on the demo writes these metrics and the portfolio block.
    from audit.cli import main
    from audit.resources import bundled_dir

    out = tmp_path / "demo.json"
    demo = bundled_dir("demo_data") / "demo_portfolio.csv"
    assert main(["check", str(demo), "--json", str(out), "--quiet"]) == 0
    doc = json.loads(out.read_text())
    audited = [s for s in doc["studies"] if s["status"] == "audited"]
    for key in ("type_s", "exaggeration", "observed_power", "ci_verdict"):
        assert any(s["metrics"][key] is not None for s in audited), key
    verdicts = {s["metrics"]["ci_verdict"] for s in audited} - {None}
    assert verdicts <= {
        "detected",
        "excludes_sesoi",
        "excludes_planned_effect",
        "inconclusive",
        # Non-inferiority and equivalence rows (issue 15).
        "non_inferior",
        "inferior",
        "equivalent",
        "not_equivalent",
    }
    block = doc["portfolio"]["excess_significance"]
    assert set(block) >= {"observed", "expected", "p_value", "basis", "method"}
    assert 0.0 <= block["p_value"] <= 1.0
    assert {c["topic"] for c in doc["caveats"]} >= {"judgment", "observed_power", "type_sm"}


def test_ci_level_given_as_a_percentage_is_caught():
    result = _audit([{"observed_effect": 1.0, "observed_se": 1.0, "observed_ci_level": "95"}])
    assert result.status.tolist() == ["invalid"]
    assert "looks like a percentage" in result.errors["reason"][0]
    ok = _audit([{"observed_ci_low": -1.0, "observed_ci_high": 3.0, "observed_ci_level": "90%"}])
    q = stats.t.isf(0.05, 98)  # a 90 % t interval on the realized 98 df (scipy)
    assert ok.metrics.loc[0, "result_se"] == pytest.approx(2.0 / q)
    assert ok.metrics.loc[0, "result_ci_level"] == pytest.approx(0.95)


def test_p_values_printed_as_bounds():
    # Papers print "p < 0.001", "< .05", "n.s.", "0.000" (SPSS). A bound decides significance
    # only (common practice: the test rejects when p < alpha); nothing is derived from it.
    frame = pd.DataFrame(
        {
            "study_id": list("ABCDEFG"),
            "design": "estimate",
            "realized_se": 1.0,
            "planned_effect": 2.5,
            "observed_p": ["<0.001", "n.s.", "p < .05", ">0.1", "0.000", "P = 0.03", "< 0.1"],
        }
    )
    result = audit.audit_table(frame)
    assert list(result.status) == ["audited"] * 7
    sig = result.metrics["result_significant"].tolist()
    assert sig[:6] == [1.0, 0.0, 1.0, 0.0, 1.0, 1.0]
    assert np.isnan(sig[6])  # p < 0.1 at alpha .05: cannot tell
    assert np.isnan(result.metrics["result_p"][0]) and result.metrics["result_p"][5] == 0.03
    assert result.table["observed_p_bound"][4] == pytest.approx(0.0005)
    notes = result.by_row(result.notes, "text")
    assert any("read as a bound" in n for n in notes[0])
    assert not any(n.startswith("no result reported") for n in notes[2])
