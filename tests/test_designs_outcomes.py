"""Designs of issue 16: cluster proportions, two rates, crossover, paired proportions, stepped
wedge. Each against an outside source named beside the check: statsmodels (computed with it),
scipy's noncentral t, an independently built GLS design matrix, a simulation, closed forms and
facts of the trade (common practice)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.power import NormalIndPower, TTestIndPower
from statsmodels.stats.rates import power_negbin_ratio_2indep, power_poisson_ratio_2indep

import audit
from audit.designs import DESIGNS, TestSpec
from audit.designs.cluster import design_effect
from audit.designs.cluster_proportions import cluster_proportions_power
from audit.designs.paired_proportions import connor_pairs, mcnemar_power
from audit.designs.proportions import fleiss_n1
from audit.designs.stepped_wedge import stepped_wedge_variance

Z975 = stats.norm.ppf(0.975)


def _spec(k, alpha=0.05, sides=2.0, power=0.8, direction=1.0) -> TestSpec:
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), (k,)).copy()  # noqa: E731
    return TestSpec(full(alpha), full(sides), full(power), full(direction))


def _audit(rows: list[dict]) -> audit.AuditResult:
    return audit.audit_table(pd.DataFrame(rows))


# -- cluster_two_proportions ----------------------------------------------------------------------


def test_cluster_power_against_scipy_noncentral_t():
    # The formula written out independently: effective sizes n m / DE, SE0 pooled and SE1
    # unpooled, scipy.stats.nct on J - 2 df with the critical value scaled by SE0 / SE1.
    rng = np.random.default_rng(1610)
    k = 60
    n1 = rng.integers(2, 40, k).astype(float)
    n2 = rng.integers(2, 40, k).astype(float)
    m = rng.uniform(5, 80, k)
    icc = rng.uniform(0, 0.15, k)
    cv = rng.uniform(0, 0.7, k)
    p1 = rng.uniform(0.05, 0.8, k)
    p2 = np.clip(p1 + rng.uniform(-0.2, 0.2, k), 0.02, 0.95)
    alpha = rng.uniform(0.01, 0.1, k)
    sides = rng.integers(1, 3, k).astype(float)
    direction = np.where(p2 < p1, -1.0, 1.0)
    de = design_effect(m, icc, cv)
    got = cluster_proportions_power(n1, n2, m, de, p1, p2, alpha, sides, direction)
    for i in range(k):
        a, b = n1[i] * m[i] / de[i], n2[i] * m[i] / de[i]
        pbar = (a * p1[i] + b * p2[i]) / (a + b)
        se0 = np.sqrt(pbar * (1 - pbar) * (1 / a + 1 / b))
        se1 = np.sqrt(p1[i] * (1 - p1[i]) / a + p2[i] * (1 - p2[i]) / b)
        df = n1[i] + n2[i] - 2
        c = stats.t.ppf(1 - alpha[i] / sides[i], df) * se0 / se1
        ncp = direction[i] * (p2[i] - p1[i]) / se1
        ref = stats.nct.sf(c, df, ncp)
        if sides[i] == 2:
            ref += stats.nct.sf(c, df, -ncp)
        assert got[i] == pytest.approx(ref, rel=1e-7, abs=1e-12)


def test_cluster_power_at_no_difference_is_alpha_and_falls_with_the_icc():
    # Common practice: the size of the test is alpha; clustering costs power.
    p = np.array([0.1, 0.3, 0.5])
    at_null = cluster_proportions_power(8, 10, 25, 2.2, p, p, 0.05, 2)
    np.testing.assert_allclose(at_null, 0.05, rtol=1e-10)
    de = design_effect(25, np.array([0.0, 0.02, 0.05, 0.1]))
    power = cluster_proportions_power(12, 12, 25, de, 0.3, 0.2, 0.05, 2, -1.0)
    assert np.all(np.diff(power) < 0)


def test_cluster_size_is_the_individual_size_times_the_design_effect():
    # Donner, Birkett & Buck (1981): clusters per arm = units of an individually randomized
    # trial (Fleiss) x DE / m. With many clusters the t reference adds at most a cluster or two.
    rng = np.random.default_rng(1611)
    k = 40
    p1 = rng.uniform(0.1, 0.5, k)
    p2 = p1 - rng.uniform(0.03, 0.06, k)
    m = rng.uniform(3, 10, k)
    icc = rng.uniform(0.01, 0.05, k)
    de = design_effect(m, icc)
    design = DESIGNS["cluster_two_proportions"]
    sc = {"n1": np.ones(k), "n2": np.ones(k), "p1": p1, "icc": icc, "cluster_size": m,
          "cluster_size_cv": np.zeros(k), "continuity_correction": np.zeros(k)}  # fmt: skip
    total = design.required_size(sc, p2 - p1, _spec(k, direction=-1.0))
    per_arm = total / 2
    donner = np.ceil(fleiss_n1(p1, p2, 1.0, 0.05, 2, 0.8, 0.0) * de / m)
    assert np.all(per_arm >= donner - 1)
    assert np.all(per_arm <= donner + 2)
    assert np.all(per_arm > 50)


def test_cluster_odds_ratio_plan_needs_the_clusters_of_its_risk_difference():
    base = {"design": "cluster_two_proportions", "planned_p1": 0.25, "planned_n1": 20,
            "planned_n2": 20, "planned_icc": 0.04, "planned_cluster_size": 30,
            "realized_n1": 19, "realized_n2": 20, "realized_icc": 0.06}  # fmt: skip
    odds = 0.15 * 0.75 / (0.25 * 0.85)
    res = _audit(
        [
            {**base, "study_id": "rd", "planned_p2": 0.15},
            {**base, "study_id": "or", "effect_measure": "odds_ratio", "planned_effect": odds},
            {**base, "study_id": "rr", "effect_measure": "risk_ratio", "planned_effect": 0.6},
        ]
    )
    m = res.metrics
    assert res.valid.all()
    assert m["n_required_plan"].nunique() == 1
    np.testing.assert_allclose(m["power_at_planned_effect"], m["power_at_planned_effect"].iat[0])
    assert m["icc_ratio"].iat[0] == pytest.approx(1.5)


def test_cluster_result_from_events_is_inflated_by_the_design_effect():
    row = {"study_id": "c", "design": "cluster_two_proportions", "planned_p1": 0.3,
           "planned_p2": 0.2, "planned_n1": 10, "planned_n2": 10, "planned_icc": 0.05,
           "planned_cluster_size": 20, "realized_n1": 10, "realized_n2": 10,
           "observed_events1": 60, "observed_events2": 40}  # fmt: skip
    m = _audit([row]).metrics.iloc[0]
    de = 1 + 19 * 0.05
    se = np.sqrt(0.3 * 0.7 / 200 + 0.2 * 0.8 / 200) * np.sqrt(de)
    assert m["result_effect"] == pytest.approx(-0.1)
    assert m["result_se"] == pytest.approx(se, rel=1e-12)
    # The interval uses t on J - 2 = 18 df.
    q = stats.t.ppf(0.975, 18)
    assert m["result_ci_high"] == pytest.approx(-0.1 + q * se, rel=1e-9)


def test_clustering_columns_are_read_by_the_cluster_designs_and_named_in_the_error():
    res = _audit(
        [
            {"study_id": "ok", "design": "cluster_two_proportions", "planned_p1": 0.3,
             "planned_p2": 0.2, "planned_n1": 10, "planned_n2": 10, "planned_icc": 0.05,
             "planned_cluster_size": 20, "cluster_size_cv": 0.4},
            {"study_id": "bad", "design": "two_proportions", "planned_p1": 0.3,
             "planned_p2": 0.2, "planned_n1": 100, "planned_n2": 100, "planned_icc": 0.05},
        ]
    )  # fmt: skip
    assert res.status.tolist() == ["audited", "invalid"]
    reason = res.errors["reason"].iat[0]
    for name in ("cluster_two_means", "cluster_two_proportions", "stepped_wedge"):
        assert name in reason


# -- two_rates -----------------------------------------------------------------------------------


def test_rates_power_against_statsmodels_poisson_and_negative_binomial():
    # statsmodels.stats.rates with method_var="alt" (the variance at the true rates under H0
    # too, Zhu & Lakkis): its sample 1 is our intervention arm (rate2, n2), its nobs_ratio our
    # n1 / n2. Poisson: power_poisson_ratio_2indep with its dispersion 1; negative binomial:
    # power_negbin_ratio_2indep with our k.
    rng = np.random.default_rng(1612)
    k = 80
    n1 = rng.integers(10, 600, k).astype(float)
    n2 = np.round(n1 * rng.choice([0.5, 1.0, 2.0], k))
    rate1 = rng.uniform(0.1, 4.0, k)
    ratio = np.exp(rng.uniform(-0.7, 0.7, k))
    t = rng.uniform(0.25, 3.0, k)
    disp = np.where(rng.uniform(size=k) < 0.5, 0.0, rng.uniform(0.1, 1.5, k))
    alpha = rng.uniform(0.01, 0.1, k)
    sides = rng.integers(1, 3, k).astype(float)
    direction = np.where(ratio < 1, -1.0, 1.0)
    design = DESIGNS["two_rates"]
    sc = {"n1": n1, "n2": n2, "rate1": rate1, "exposure": t, "dispersion": disp}
    got = design.power(sc, ratio, TestSpec(alpha, sides, np.full(k, 0.8), direction))
    for i in range(k):
        alt = "two-sided" if sides[i] == 2 else ("larger" if direction[i] > 0 else "smaller")
        common = dict(nobs1=n2[i], nobs_ratio=n1[i] / n2[i], exposure=t[i], alpha=alpha[i],
                      alternative=alt, method_var="alt", value=1.0,
                      return_results=False)  # fmt: skip
        if disp[i] == 0:
            ref = power_poisson_ratio_2indep(rate1[i] * ratio[i], rate1[i], **common)
        else:
            ref = power_negbin_ratio_2indep(
                rate1[i] * ratio[i], rate1[i], dispersion=disp[i], **common
            )
        assert got[i] == pytest.approx(float(ref), rel=1e-9, abs=1e-12)


def test_rates_required_size_is_the_smallest_reaching_target_and_mde_round_trips():
    rng = np.random.default_rng(1613)
    k = 60
    design = DESIGNS["two_rates"]
    rate1 = rng.uniform(0.2, 3, k)
    ratio = np.exp(rng.uniform(-0.6, -0.1, k))
    sc = {"n1": np.ones(k), "n2": np.ones(k), "rate1": rate1,
          "exposure": rng.uniform(0.5, 2, k), "dispersion": rng.uniform(0, 1, k)}  # fmt: skip
    spec = _spec(k, direction=-1.0)
    total = design.required_size(sc, ratio, spec)
    per = total / 2
    at = {**sc, "n1": per, "n2": per}
    fewer = {**sc, "n1": per - 1, "n2": per - 1}
    assert np.all(design.power(at, ratio, spec) >= 0.8 - 1e-12)
    assert np.all(design.power(fewer, ratio, spec) < 0.8)
    # Closed form (Poisson, 1:1, exposure 1): rates 1 and 0.5 need
    # (z.975 + z.8)^2 (1 + 2) / ln(2)^2 = 49.0 units per arm.
    one = {"n1": np.ones(1), "n2": np.ones(1), "rate1": np.ones(1), "exposure": np.ones(1),
           "dispersion": np.zeros(1)}  # fmt: skip
    n_closed = (Z975 + stats.norm.ppf(0.8)) ** 2 * 3 / np.log(2) ** 2
    assert design.required_size(one, np.array([0.5]), _spec(1, direction=-1.0))[0] == 2 * np.ceil(
        n_closed
    )
    # MDE: the power at it is the target.
    real = {**sc, "n1": rng.integers(30, 500, k).astype(float)}
    real["n2"] = real["n1"]
    mde = design.mde(real, spec)
    np.testing.assert_allclose(design.power(real, mde, spec), 0.8, atol=1e-9)
    assert np.all(mde < 1)


def test_rates_rows_end_to_end_with_the_result_from_events():
    row = {"study_id": "r", "design": "two_rates", "planned_rate1": 1.2, "planned_rate2": 0.9,
           "exposure": 1.0, "dispersion": 0.4, "planned_n1": 250, "planned_n2": 250,
           "realized_n1": 240, "realized_n2": 238, "observed_events1": 300,
           "observed_events2": 220}  # fmt: skip
    res = _audit([row])
    m = res.metrics.iloc[0]
    assert m["planned_effect_used"] == pytest.approx(0.75)
    ratio = (220 / 238) / (300 / 240)
    se = np.sqrt(1 / 300 + 1 / 220 + 0.4 / 240 + 0.4 / 238)
    assert m["result_effect"] == pytest.approx(ratio, rel=1e-12)
    assert m["result_se"] == pytest.approx(se, rel=1e-12)
    # The realized control rate comes from the events: 300 / 240 per unit of exposure.
    notes = res.by_row(res.notes, "text")[0]
    assert any("observed_events1 / realized_n1 / exposure is used" in t for t in notes)
    assert any("planned rate ratio is held fixed" in t for t in notes)


@pytest.mark.parametrize(
    "cells,column",
    [
        ({"dispersion": -0.2}, "dispersion"),
        ({"planned_effect": 0.0, "planned_rate2": None}, "planned_effect"),
        ({"planned_rate1": -1.0}, "planned_rate1"),
        ({"exposure": 0.0}, "exposure"),
        ({"sesoi": -0.8}, "sesoi"),
    ],
)
def test_rates_bad_input_is_a_row_error(cells, column):
    good = {"study_id": "ok", "design": "two_rates", "planned_rate1": 1.0,
            "planned_rate2": 0.7, "planned_n1": 100, "planned_n2": 100}  # fmt: skip
    res = _audit([good, {**good, "study_id": "bad", **cells}])
    assert res.status.tolist() == ["audited", "invalid"]
    assert column in res.errors["column"].tolist()


# -- crossover -----------------------------------------------------------------------------------


def test_crossover_power_is_the_two_sample_t_on_half_the_period_differences():
    # Jones & Kenward (2003), ch. 2: the AB/BA effect is (mean d_AB - mean d_BA) / 2, a
    # two-sample comparison of n/2 subjects per sequence with SD sd_d / 2 on n - 2 df.
    # Reference: statsmodels TTestIndPower.
    rng = np.random.default_rng(1614)
    k = 40
    n = 2 * rng.integers(3, 60, k).astype(float)
    sd = rng.uniform(1, 20, k)
    effect = rng.uniform(0.2, 1.5, k) * sd / np.sqrt(n) * 3
    alpha = rng.uniform(0.01, 0.1, k)
    sides = rng.integers(1, 3, k).astype(float)
    design = DESIGNS["crossover"]
    got = design.power(
        {"n1": n, "sd": sd}, effect, TestSpec(alpha, sides, np.full(k, 0.8), np.ones(k))
    )
    for i in range(k):
        ref = TTestIndPower().power(
            effect[i] / (sd[i] / 2),
            n[i] / 2,
            alpha[i],
            ratio=1.0,
            alternative="two-sided" if sides[i] == 2 else "larger",
        )
        assert got[i] == pytest.approx(ref, rel=1e-7)


def test_crossover_required_size_is_even_and_smallest():
    rng = np.random.default_rng(1615)
    k = 30
    design = DESIGNS["crossover"]
    sd = rng.uniform(2, 10, k)
    effect = rng.uniform(0.3, 1.2, k) * sd
    total = design.required_size({"n1": np.ones(k), "sd": sd}, effect, _spec(k))
    assert np.all(total % 2 == 0)
    for i in range(k):

        def power(n, i=i):
            return TTestIndPower().power(effect[i] / (sd[i] / 2), n / 2, 0.05, ratio=1.0)

        assert power(total[i]) >= 0.8 - 1e-10
        if total[i] > 4:
            assert power(total[i] - 2) < 0.8


def test_crossover_size_follows_the_normal_formula_of_julious():
    # Julious (2004), Statistics in Medicine 23:1921-1986, section 5 (formula from memory): an
    # AB/BA crossover needs n = 2 (z_(1-alpha/2) + z_(1-beta))^2 sigma_w^2 / delta^2 subjects in
    # all, sigma_w the within-subject SD (sigma_d^2 = 2 sigma_w^2), plus a few for the t
    # distribution on n - 2 df.
    design = DESIGNS["crossover"]
    sigma_w = np.array([4.0, 6.0, 10.0])
    delta = np.array([1.0, 1.5, 2.0])
    sd_d = np.sqrt(2.0) * sigma_w
    total = design.required_size({"n1": np.ones(3), "sd": sd_d}, delta, _spec(3))
    normal = 2 * (Z975 + stats.norm.ppf(0.8)) ** 2 * sigma_w**2 / delta**2
    assert np.all(total >= normal) and np.all(total <= normal + 4)


def test_crossover_between_subject_sd_and_correlation_are_converted_with_a_note():
    base = {"design": "crossover", "planned_effect": 3.0, "planned_n1": 30, "realized_n1": 28}
    rows = [
        {**base, "study_id": "within", "planned_sd": 8.0 * np.sqrt(2 * (1 - 0.7))},
        {**base, "study_id": "between", "planned_sd": 8.0, "period_correlation": 0.7},
    ]
    res = _audit(rows)
    m = res.metrics
    np.testing.assert_allclose(
        m["power_at_planned_effect"].iat[0], m["power_at_planned_effect"].iat[1], rtol=1e-12
    )
    np.testing.assert_allclose(m["n_required_plan"].iat[0], m["n_required_plan"].iat[1])
    notes = res.by_row(res.notes, "text")[1]
    assert any("converted with period_correlation" in t for t in notes)


def test_crossover_second_group_size_is_an_error():
    row = {"study_id": "x", "design": "crossover", "planned_sd": 4, "planned_effect": 2,
           "planned_n1": 20, "planned_n2": 20}  # fmt: skip
    res = _audit([row])
    assert res.status.tolist() == ["invalid"]
    assert res.errors["column"].tolist() == ["planned_n2"]


# -- paired_proportions --------------------------------------------------------------------------


def test_mcnemar_sizes_follow_connor_and_power_is_alpha_at_no_difference():
    # Connor (1987), Biometrics 43:207-211: n = (z sqrt(psi) + z_b sqrt(psi - delta^2))^2 /
    # delta^2; the exact two-tailed solution can only be at or one pair below... above it.
    rng = np.random.default_rng(1616)
    k = 50
    p1 = rng.uniform(0.02, 0.3, k)
    p2 = p1 + rng.uniform(0.03, 0.2, k)
    design = DESIGNS["paired_proportions"]
    n = design.required_size({"n1": np.ones(k), "p1": p1}, p2 - p1, _spec(k))
    closed = np.ceil(connor_pairs(p1, p2, 0.05, 2, 0.8))
    assert np.all((n >= closed) & (n <= closed + 1))
    np.testing.assert_allclose(mcnemar_power(n, p1, p1, 0.05, 2), 0.05, rtol=1e-10)
    # Hand computation of Connor's formula: p10 = 0.1, p01 = 0.2 -> 233.09 pairs.
    hand = (Z975 * np.sqrt(0.3) + stats.norm.ppf(0.8) * np.sqrt(0.29)) ** 2 / 0.01
    assert connor_pairs(0.1, 0.2, 0.05, 2, 0.8) == pytest.approx(hand, rel=1e-12)


def test_mcnemar_power_against_simulation():
    # Monte Carlo: pairs drawn from the multinomial (p10, p01, rest), McNemar's z statistic
    # (b - c) / sqrt(b + c) at two-sided .05; Connor's normal power within 3.5 simulation SEs.
    rng = np.random.default_rng(1617)
    reps = 40_000
    for n, p10, p01 in [(150, 0.1, 0.2), (300, 0.05, 0.09), (80, 0.2, 0.35)]:
        counts = rng.multinomial(n, [p10, p01, 1 - p10 - p01], size=reps)
        b, c = counts[:, 1], counts[:, 0]
        with np.errstate(divide="ignore", invalid="ignore"):
            z = (b - c) / np.sqrt(b + c)
        simulated = np.mean(np.abs(np.nan_to_num(z)) > Z975)
        power = float(mcnemar_power(n, p10, p01, 0.05, 2))
        assert abs(power - simulated) < 3.5 * np.sqrt(simulated * (1 - simulated) / reps) + 0.01


def test_paired_rows_end_to_end():
    row = {"study_id": "m", "design": "paired_proportions", "planned_p1": 0.1,
           "planned_p2": 0.2, "planned_n1": 240, "realized_n1": 220, "realized_p1": 0.12,
           "realized_p2": 0.19}  # fmt: skip
    res = _audit([row])
    m = res.metrics.iloc[0]
    assert m["n_required_plan"] == 234  # ceil(233.09), the far tail negligible
    assert m["result_effect"] == pytest.approx(0.07)
    assert m["result_se"] == pytest.approx(np.sqrt((0.31 - 0.07**2) / 220), rel=1e-12)
    assert m["mde_std"] > 0
    bad = {**row, "study_id": "b", "planned_p1": 0.6, "planned_p2": 0.5}
    res = _audit([row, bad])
    assert res.status.tolist() == ["audited", "invalid"]
    assert "planned_p2" in res.errors["column"].tolist()


# -- stepped_wedge -------------------------------------------------------------------------------


def _gls_variance(clusters: int, periods: int, m: float, sd: float, icc: float) -> float:
    """Hussey & Hughes' model fitted by GLS: period fixed effects and the treatment indicator,
    each cluster's T cluster-period means with covariance sigma^2 I + tau^2 J; clusters spread
    evenly over the T - 1 sequences. The inverse information's treatment entry."""
    steps = periods - 1
    sigma2 = (1 - icc) * sd**2 / m
    tau2 = icc * sd**2
    v_inv = np.linalg.inv(sigma2 * np.eye(periods) + tau2 * np.ones((periods, periods)))
    info = np.zeros((periods + 1, periods + 1))
    for s in np.repeat(np.arange(1, steps + 1), clusters // steps):
        x = (np.arange(1, periods + 1) > s).astype(float)
        z = np.hstack([np.eye(periods), x[:, None]])
        info += z.T @ v_inv @ z
    return float(np.linalg.inv(info)[-1, -1])


def test_stepped_wedge_variance_against_the_gls_design_matrix():
    rng = np.random.default_rng(1618)
    for _ in range(40):
        periods = int(rng.integers(3, 9))
        clusters = (periods - 1) * int(rng.integers(1, 6))
        m = float(rng.uniform(1, 60))
        sd = float(rng.uniform(0.5, 10))
        icc = float(rng.uniform(0, 0.4))
        got = float(stepped_wedge_variance(clusters, periods, m, sd, icc))
        assert got == pytest.approx(_gls_variance(clusters, periods, m, sd, icc), rel=1e-9)


def test_stepped_wedge_design_effect_of_woertman():
    # Woertman et al. (2013), J. Clin. Epidemiol. 66:752-758 (formula from memory): with k
    # steps, b = 1 baseline period, t = 1 period per step and m per cluster-period, a trial of
    # I clusters matches an individually randomized trial of N_ind = I m / DE_sw units,
    # DE_sw = (1 + rho (k t m + b m - 1)) / (1 + rho (k t m / 2 + b m - 1)) * 3 (1 - rho) /
    # (2 t (k - 1/k)); that trial's variance is 4 sd^2 / N_ind.
    for clusters, periods, m, sd, rho in [(12, 4, 20, 1.0, 0.05), (30, 6, 7, 3.2, 0.2)]:
        k = periods - 1
        de = (1 + rho * (k * m + m - 1)) / (1 + rho * (k * m / 2 + m - 1))
        de *= 3 * (1 - rho) / (2 * (k - 1 / k))
        n_ind = clusters * m / de
        got = stepped_wedge_variance(clusters, periods, m, sd, rho)
        assert got == pytest.approx(4 * sd**2 / n_ind, rel=1e-12)


def test_stepped_wedge_power_required_clusters_and_mde():
    design = DESIGNS["stepped_wedge"]
    rng = np.random.default_rng(1619)
    k = 30
    periods = rng.integers(3, 8, k).astype(float)
    sc = {"n1": np.ones(k), "sd": rng.uniform(1, 5, k), "icc": rng.uniform(0.01, 0.2, k),
          "cluster_size": rng.uniform(5, 40, k), "periods": periods,
          "cluster_size_cv": np.zeros(k)}  # fmt: skip
    effect = sc["sd"] * rng.uniform(0.15, 0.5, k)
    spec = _spec(k)
    clusters = design.required_size(sc, effect, spec)
    steps = periods - 1
    assert np.all(clusters % steps == 0)
    at = design.power({**sc, "n1": clusters}, effect, spec)
    fewer = design.power({**sc, "n1": clusters - steps}, effect, spec)
    assert np.all(at >= 0.8 - 1e-12)
    assert np.all((fewer < 0.8) | (clusters - steps < 2))
    # z power (Hussey & Hughes), both tails: statsmodels NormalIndPower with the standardized
    # effect effect / SE and one "observation" (ratio 0: a one-sample z test).
    se = np.sqrt(stepped_wedge_variance(clusters, periods, sc["cluster_size"], sc["sd"], sc["icc"]))
    ref = [NormalIndPower().power(e / s, 1, 0.05, ratio=0) for e, s in zip(effect, se, strict=True)]
    np.testing.assert_allclose(at, ref, rtol=1e-10)
    real = {**sc, "n1": clusters}
    mde = design.mde(real, spec)
    np.testing.assert_allclose(design.power(real, mde, spec), 0.8, rtol=1e-9)


def test_stepped_wedge_rows_and_bad_input():
    good = {"study_id": "ok", "design": "stepped_wedge", "planned_n1": 12, "periods": 4,
            "planned_cluster_size": 20, "planned_sd": 1.0, "planned_icc": 0.05,
            "planned_effect": 0.3, "realized_n1": 12, "realized_icc": 0.08}  # fmt: skip
    bad = [
        {**good, "study_id": "p1", "periods": 1},
        {**good, "study_id": "p2", "periods": 2},
        {**good, "study_id": "cv", "cluster_size_cv": 0.3},
        {**good, "study_id": "n2", "planned_n2": 12},
    ]
    res = _audit([good, *bad])
    assert res.status.tolist() == ["audited", "invalid", "invalid", "invalid", "invalid"]
    assert res.errors["column"].tolist() == ["periods", "periods", "cluster_size_cv", "planned_n2"]
    m = res.metrics.iloc[0]
    var = stepped_wedge_variance(12, 4, 20, 1.0, 0.08)
    assert m["se_realized"] == pytest.approx(np.sqrt(var), rel=1e-12)
    assert m["icc_ratio"] == pytest.approx(1.6)
