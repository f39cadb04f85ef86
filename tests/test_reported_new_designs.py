"""Results from reported statistics and reference effects for the designs and measures of
issue 16 (risk and odds ratios, paired proportions, rates, cluster proportions).

References named beside each check: scipy.stats.chi2_contingency (the uncorrected chi-square of
a 2x2 table, whose root is the pooled z), statsmodels' Table2x2 (sample odds and risk ratios and
the Woolf / Katz SEs of their logs) and mcnemar, statsmodels' power_poisson_ratio_2indep (the SE
of the log rate ratio at the true rates, method_var="alt").
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.contingency_tables import Table2x2, mcnemar

import audit
from audit.designs import design_of


def _audit(rows: list[dict]) -> audit.AuditResult:
    return audit.audit_table(pd.DataFrame(rows).astype(object))


def _pooled_z(e1: int, n1: int, e2: int, n2: int) -> float:
    table = np.array([[e2, n2 - e2], [e1, n1 - e1]])
    chi2 = stats.chi2_contingency(table, correction=False)[0]
    return float(np.sign(e2 / n2 - e1 / n1) * np.sqrt(chi2))


@pytest.mark.parametrize("measure", ["odds_ratio", "risk_ratio"])
def test_a_z_statistic_gives_the_sample_ratio_and_its_wald_se(measure):
    # 70/401 control and 49/398 intervention events: the pooled z (from the chi-square of the
    # table) with the observed control rate recovers p2, hence the sample OR or RR; the SE is
    # that of the log ratio (Woolf for the OR, Katz for the RR).
    e1, n1, e2, n2 = 70, 401, 49, 398
    z = _pooled_z(e1, n1, e2, n2)
    row = {"study_id": "s", "design": "two_proportions", "effect_measure": measure,
           "realized_n1": n1, "realized_n2": n2, "realized_p1": e1 / n1,
           "observed_statistic": z, "statistic_type": "z"}  # fmt: skip
    result = _audit([row])
    assert result.valid.all(), result.error_sentences()
    table = Table2x2(np.array([[e2, n2 - e2], [e1, n1 - e1]]))
    ratio = table.oddsratio if measure == "odds_ratio" else table.riskratio
    log_se = table.log_oddsratio_se if measure == "odds_ratio" else table.log_riskratio_se
    m = result.metrics
    assert m["result_effect"].iat[0] == pytest.approx(ratio, rel=1e-9)
    assert m["result_se"].iat[0] == pytest.approx(log_se, rel=1e-9)


def test_mcnemar_z_gives_the_difference_of_discordant_shares():
    # b = 18 pairs with the event in the control member only, c = 34 in the intervention member
    # only, out of 250: delta = (c - b) / n; McNemar's chi-square (statsmodels, uncorrected)
    # is z squared.
    b, c, n = 18, 34, 250
    z = (c - b) / np.sqrt(b + c)
    table = np.array([[n - b - c, c], [b, 0]])
    assert z**2 == pytest.approx(mcnemar(table, exact=False, correction=False).statistic)
    row = {"study_id": "p", "design": "paired_proportions", "realized_n1": n,
           "realized_p1": b / n, "observed_statistic": z, "statistic_type": "z"}  # fmt: skip
    m = _audit([row]).metrics
    assert m["result_effect"].iat[0] == pytest.approx((c - b) / n, rel=1e-12)
    assert m["result_se"].iat[0] == pytest.approx(((c - b) / n) / z, rel=1e-12)


def test_a_rate_ratio_z_is_read_at_the_se_of_the_rates_it_implies():
    # theta = z SE(theta), SE at the control rate and the intervention rate the ratio implies.
    # statsmodels' power_poisson_ratio_2indep (method_var="alt") gives that SE for one unit of
    # group 1 (std_alt), here divided by sqrt(n1).
    from statsmodels.stats.rates import power_poisson_ratio_2indep

    row = {"study_id": "r", "design": "two_rates", "realized_n1": 120, "realized_n2": 120,
           "realized_rate1": 1.4, "exposure": 1.0, "observed_statistic": -2.3,
           "statistic_type": "z"}  # fmt: skip
    m = _audit([row]).metrics
    theta, se = np.log(m["result_effect"].iat[0]), m["result_se"].iat[0]
    assert theta == pytest.approx(-2.3 * se, rel=1e-9)
    rate2 = 1.4 * np.exp(theta)
    with np.errstate(all="ignore"):
        ref = power_poisson_ratio_2indep(
            1.4, rate2, 120, nobs_ratio=1, exposure=1.0, value=1, alternative="two-sided",
            method_var="alt",
        )  # fmt: skip
    assert se == pytest.approx(ref.std_alt / np.sqrt(120), rel=1e-9)


def test_a_cluster_z_refers_to_the_effective_sizes():
    # With ICC 0 the design effect is 1 and the clusters carry n m independent units: the
    # cluster row reads the same risk difference from z as an individually randomised row.
    z = 2.1
    cluster = {
        "study_id": "c",
        "design": "cluster_two_proportions",
        "realized_n1": 10,
        "realized_n2": 10,
        "realized_cluster_size": 30,
        "realized_icc": 0.0,
        "realized_p1": 0.2,
        "observed_statistic": z,
        "statistic_type": "z",
    }
    single = {"study_id": "i", "design": "two_proportions", "realized_n1": 300,
              "realized_n2": 300, "realized_p1": 0.2, "observed_statistic": z,
              "statistic_type": "z"}  # fmt: skip
    m = _audit([cluster, single]).metrics
    assert m["result_effect"].iat[0] == pytest.approx(m["result_effect"].iat[1], rel=1e-12)


def test_reference_power_of_a_ratio_measure_is_that_of_cohens_h():
    # The standardized unit of every binary measure is Cohen's h: power at h = 0.2 or 0.5 does
    # not depend on the measure a row is written in (an invariant of the definition).
    base = {"design": "two_proportions", "realized_n1": 200, "realized_n2": 200,
            "realized_p1": 0.3}  # fmt: skip
    rows = [{**base, "study_id": m, "effect_measure": m}
            for m in ("risk_difference", "risk_ratio", "odds_ratio")]  # fmt: skip
    m = _audit(rows).metrics
    for column in ("reference_power_0.2", "reference_power_0.5"):
        values = m[column].to_numpy()
        assert np.isfinite(values).all()
        np.testing.assert_allclose(values, values[0], rtol=1e-12)


def test_paired_reference_effects_are_cohens_g():
    # Cohen's g = p2 / (p1 + p2) - 1/2 (Cohen 1988, ch. 5); g lies in (-1/2, 1/2), so the
    # default references 0.5 and 0.8 of a d scale have no paired-proportions counterpart.
    row = {"study_id": "p", "design": "paired_proportions", "realized_n1": 250,
           "realized_p1": 0.08, "sesoi": 0.05}  # fmt: skip
    result = audit.audit_table(pd.DataFrame([row]), reference_effects=[0.05, 0.15, 0.5])
    design = design_of(result.table, 0)
    real = design.scenario(result.table, "realized")
    _, delta = design.at_standardized(real, np.array([0.15]), np.array([1.0]))
    p2 = 0.08 + delta[0]
    assert p2 / (0.08 + p2) - 0.5 == pytest.approx(0.15, rel=1e-12)
    m = result.metrics
    assert np.isfinite(m["reference_power_0.05"].iat[0]) and np.isnan(
        m["reference_power_0.5"].iat[0]
    )
