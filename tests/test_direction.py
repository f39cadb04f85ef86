"""The direction a study hoped for, and rows that give none (DESIGN.md section 9.1).

References named beside each check: the normal quantiles come from scipy.stats; the verdict
rule "an interval excludes a band when it lies wholly inside it" and the mirror-image symmetry
are the definitions of section 9.1 (common practice for equivalence-style readings of a CI).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats

import audit
from audit.metrics import TEXT_METRICS


def _audit(rows: list[dict]) -> audit.AuditResult:
    return audit.audit_table(pd.DataFrame(rows).astype(object))


def _errors(result: audit.AuditResult, pos: int) -> list[tuple[str, str]]:
    e = result.errors[result.errors["pos"] == pos]
    return list(zip(e["column"], e["reason"], strict=True))


def _notes(result: audit.AuditResult, pos: int) -> list[str]:
    return result.by_row(result.notes, "text")[pos]


ESTIMATE = {"design": "estimate", "realized_se": 0.1, "sesoi": 0.2}


def test_mirror_images_get_the_same_verdict_without_a_direction():
    # Issue 13: -0.10 (-0.30, 0.10) was "excludes_sesoi" and +0.10 (-0.10, 0.30) "inconclusive".
    # With no direction both intervals reach beyond the band (-0.2, 0.2): both inconclusive.
    result = _audit(
        [
            {**ESTIMATE, "study_id": "neg", "observed_effect": -0.1, "observed_ci_low": -0.3,
             "observed_ci_high": 0.1},
            {**ESTIMATE, "study_id": "pos", "observed_effect": 0.1, "observed_ci_low": -0.1,
             "observed_ci_high": 0.3},
            {**ESTIMATE, "study_id": "in", "observed_effect": -0.02, "observed_ci_low": -0.15,
             "observed_ci_high": 0.11},
        ]
    )  # fmt: skip
    m = result.metrics
    assert m["ci_verdict"].tolist() == ["inconclusive", "inconclusive", "excludes_sesoi"]
    assert m["direction_used"].tolist() == ["either"] * 3
    # Nothing depends on the estimate's sign: the two mirror images agree on every number.
    numeric = [c for c in m.columns if c not in TEXT_METRICS]
    mirror = {"result_effect": "result_effect", "result_ci_low": "result_ci_high",
              "result_ci_high": "result_ci_low"}  # fmt: skip
    for name in numeric:
        if name in mirror:
            np.testing.assert_allclose(m[name].iat[0], -m[mirror[name]].iat[1], err_msg=name)
        else:
            np.testing.assert_allclose(m[name].iat[0], m[name].iat[1], err_msg=name)


def test_a_stated_direction_reads_the_sesoi_on_its_side():
    # With direction = increase the same interval (-0.30, 0.10) rules out a benefit of 0.2.
    result = _audit(
        [{**ESTIMATE, "study_id": "up", "direction": "increase", "observed_effect": -0.1,
          "observed_ci_low": -0.3, "observed_ci_high": 0.1}]
    )  # fmt: skip
    assert result.metrics["ci_verdict"].iat[0] == "excludes_sesoi"
    assert result.metrics["sesoi_used"].iat[0] == 0.2


def test_survival_without_a_planned_effect_is_judged_either_way():
    # Issue 13: HR 0.74 (0.50-1.11), SESOI 0.8, no planned effect was an "informative null"
    # and the MDE was printed as HR 1.77. Either way: the band is [0.8, 1.25] on the HR scale,
    # the interval reaches below 0.8, so it is inconclusive; the MDE is a magnitude.
    row = {"study_id": "S", "design": "survival", "realized_events": 100, "sesoi": 0.8,
           "observed_effect": 0.74, "observed_ci_low": 0.50, "observed_ci_high": 1.11}  # fmt: skip
    result = _audit([row, {**row, "study_id": "D", "direction": "decrease"}])
    m = result.metrics
    assert m["ci_verdict"].tolist() == ["inconclusive", "inconclusive"]
    # Schoenfeld, 1:1: SE(log HR) = 2 / sqrt(D); MDE = exp(+-2.80 SE) (Bloom's multiplier,
    # normal quantiles from scipy).
    multiplier = stats.norm.ppf(0.975) + stats.norm.ppf(0.8)
    se = 2 / np.sqrt(100)
    assert m["mde"].iat[0] == pytest.approx(np.exp(multiplier * se), rel=1e-6)
    assert m["mde"].iat[1] == pytest.approx(np.exp(-multiplier * se), rel=1e-6)
    assert m["mde"].iat[1] < 1 and m["mde_std"].iat[1] < 0
    assert m["sesoi_used"].tolist() == pytest.approx([1.25, 0.8])


def test_decrease_without_a_planned_effect_gives_a_negative_mde():
    # Bloom (1995): MDE = 2.80 SE (two-sided .05, power .80, normal); signed by the direction.
    result = _audit(
        [{"study_id": "d", "design": "estimate", "realized_se": 1.0, "direction": "decrease"},
         {"study_id": "e", "design": "estimate", "realized_se": 1.0}]
    )  # fmt: skip
    mde = result.metrics["mde"].to_numpy()
    assert mde[0] == pytest.approx(-2.80, abs=0.005)
    assert mde[1] == pytest.approx(2.80, abs=0.005)


def _pooled_power(p1: float, p2: float, n: float) -> float:
    # The two-proportion z test with the variance pooled under H0 (Fleiss, Levin & Paik 2003,
    # section 4.2), both rejection tails, written out here with scipy's normal distribution.
    c = stats.norm.ppf(0.975)
    pbar = (p1 + p2) / 2
    se0 = np.sqrt(2 * pbar * (1 - pbar) / n)
    se1 = np.sqrt((p1 * (1 - p1) + p2 * (1 - p2)) / n)
    d = abs(p2 - p1)
    return stats.norm.cdf((d - c * se0) / se1) + stats.norm.cdf((-d - c * se0) / se1)


def test_proportions_without_a_direction_take_the_harder_side():
    # From a control rate of 0.2 a rise is harder to detect than a fall of the same size (its
    # variance is larger). With no direction the MDE is the larger of the two, and the power at
    # the SESOI the lower; both checked against the textbook power formula solved with brentq.
    row = {"study_id": "p", "design": "two_proportions", "realized_n1": 150, "realized_n2": 150,
           "realized_p1": 0.2, "sesoi": 0.1}  # fmt: skip
    result = _audit([row, {**row, "study_id": "up", "direction": "increase"},
                     {**row, "study_id": "down", "direction": "decrease"}])  # fmt: skip
    m = result.metrics
    up = optimize.brentq(lambda d: _pooled_power(0.2, 0.2 + d, 150) - 0.8, 1e-4, 0.79)
    down = optimize.brentq(lambda d: _pooled_power(0.2, 0.2 - d, 150) - 0.8, 1e-4, 0.199)
    assert m["mde"].iat[1] == pytest.approx(up, rel=1e-6)
    assert m["mde"].iat[2] == pytest.approx(-down, rel=1e-6)
    assert m["mde"].iat[0] == pytest.approx(max(up, down), rel=1e-6)
    low = min(_pooled_power(0.2, 0.3, 150), _pooled_power(0.2, 0.1, 150))
    assert m["power_at_sesoi"].iat[0] == pytest.approx(low, rel=1e-9)
    assert m["direction_used"].tolist() == ["either", "increase", "decrease"]


def test_a_one_sided_test_needs_a_direction():
    rows = [
        {"study_id": "a", "design": "estimate", "realized_se": 1.0, "sides": 1},
        {"study_id": "b", "design": "estimate", "realized_se": 1.0, "sides": 1,
         "direction": "increase"},
        {"study_id": "c", "design": "estimate", "realized_se": 1.0, "sides": 1,
         "planned_effect": -2.0},
    ]  # fmt: skip
    result = _audit(rows)
    assert result.status.tolist() == ["invalid", "audited", "audited"]
    ((column, reason),) = _errors(result, 0)
    assert column == "sides" and "needs a direction" in reason
    # Bloom (1995): the one-sided multiplier at .05 and power .80 is 2.49.
    assert result.metrics["mde"].iat[1] == pytest.approx(2.49, abs=0.005)
    assert result.metrics["mde"].iat[2] == pytest.approx(-2.49, abs=0.005)


def test_a_direction_that_contradicts_the_planned_effect_is_an_error():
    rows = [
        {"study_id": "a", "design": "two_means", "planned_effect": 5, "direction": "decrease",
         "realized_n1": 50, "realized_n2": 50, "realized_sd": 10},
        {"study_id": "b", "design": "survival", "planned_effect": 1.3, "direction": "decrease",
         "realized_events": 200},
        {"study_id": "c", "design": "two_proportions", "planned_p1": 0.3, "planned_p2": 0.2,
         "direction": "decrease", "realized_n1": 100, "realized_n2": 100},
    ]  # fmt: skip
    result = _audit(rows)
    assert result.status.tolist() == ["invalid", "invalid", "audited"]
    assert _errors(result, 0)[0][0] == "direction"
    assert "an increase" in _errors(result, 1)[0][1]


def test_clustering_on_an_individually_randomised_design_is_an_error():
    # Issue 13: a two_proportions row with ICC and cluster sizes was audited as individually
    # randomised (power 0.93 where the design effect 2.56 gives about 0.57).
    row = {"study_id": "c", "design": "two_proportions", "planned_p1": 0.3, "planned_p2": 0.45,
           "realized_n1": 160, "realized_n2": 160, "planned_icc": 0.05, "realized_icc": 0.05,
           "planned_cluster_size": 32, "realized_cluster_size": 32}  # fmt: skip
    result = _audit([row])
    columns = {c for c, _ in _errors(result, 0)}
    assert {"planned_icc", "realized_icc", "planned_cluster_size"} <= columns
    assert all("cluster" in r for _, r in _errors(result, 0))
    # Kish's design effect 1 + (m - 1) ICC for m = 32, ICC 0.05 is 2.55 (Kish 1965).
    assert 1 + 31 * 0.05 == pytest.approx(2.55)


def test_group_sizes_on_a_one_group_design_are_an_error():
    # k_means takes the total N in planned_n1: per-group sizes in n1/n2 would be read as N.
    row = {"study_id": "k", "design": "k_means", "groups": 3, "planned_effect": 0.25,
           "planned_n1": 53, "planned_n2": 53, "realized_n1": 50}  # fmt: skip
    result = _audit([row])
    assert [c for c, _ in _errors(result, 0)] == ["planned_n2"]


def test_columns_a_design_does_not_read_are_named_in_a_note():
    rows = [
        {"study_id": "a", "design": "two_proportions", "planned_p1": 0.3, "planned_p2": 0.45,
         "realized_n1": 160, "realized_n2": 160, "planned_sd": 4.0, "planned_events": 40},
        {"study_id": "b", "design": "k_means", "groups": 3, "planned_effect": 0.25,
         "realized_n1": 150, "direction": "increase"},
    ]  # fmt: skip
    result = _audit(rows)
    assert result.status.tolist() == ["audited", "audited"]
    (a,) = [n for n in _notes(result, 0) if n.startswith("filled but not used")]
    assert "planned_sd" in a and "planned_events" in a and "two_proportions" in a
    (b,) = [n for n in _notes(result, 1) if n.startswith("filled but not used")]
    assert b.endswith("direction")


def test_a_blank_interval_level_means_95_percent():
    # Issue 13: with two comparisons (Bonferroni alpha .025) a blank observed_ci_level was read
    # at 97.5 %. Papers report 95 % intervals: the SE is the width over 2 x z(0.975) (scipy).
    row = {"study_id": "a", "design": "estimate", "realized_se": 1.0, "comparisons": 2,
           "observed_ci_low": 0.5, "observed_ci_high": 4.5}  # fmt: skip
    result = _audit([row])
    expected = 4.0 / (2 * stats.norm.ppf(0.975))
    assert result.metrics["result_se"].iat[0] == pytest.approx(expected, rel=1e-12)
    # The interval dual to the test (97.5 %) is rebuilt from that SE, with a note.
    assert result.metrics["result_ci_level"].iat[0] == pytest.approx(0.975)
    assert any("not at the level of the study's test" in n for n in _notes(result, 0))


def test_an_estimate_far_from_the_middle_of_its_interval_gets_a_note():
    # An odds ratio 0.70 (0.50-0.98) entered on the raw scale: its midpoint is 0.74, off by a
    # sixth of the half-width; on the log scale (a survival HR) the same numbers are central.
    rows = [
        {"study_id": "raw", "design": "estimate", "realized_se": 0.1, "observed_effect": 0.70,
         "observed_ci_low": 0.50, "observed_ci_high": 0.98},
        {"study_id": "log", "design": "survival", "realized_events": 100,
         "observed_effect": 0.70, "observed_ci_low": 0.50, "observed_ci_high": 0.98},
    ]  # fmt: skip
    result = _audit(rows)
    assert any("far from the middle of its interval" in n for n in _notes(result, 0))
    assert not any("far from the middle" in n for n in _notes(result, 1))
