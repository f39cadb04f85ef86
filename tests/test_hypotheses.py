"""Non-inferiority and equivalence: margin power, exact TOST, sizes, detectable margins, verdicts
and validation, each checked against a source the project did not write."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, special, stats

import audit
from audit.designs._margin import (
    detectable_equivalence_margin,
    detectable_ni_margin,
    ni_power,
    tost_power,
)


def _audit(rows: list[dict]) -> audit.AuditResult:
    return audit.audit_table(pd.DataFrame(rows))


def _errors(result) -> list[tuple[str, str]]:
    return list(zip(result.errors["column"], result.errors["reason"], strict=True))


# -- the maths ------------------------------------------------------------------------------------


def test_ni_power_is_the_one_sided_noncentral_t_at_the_shifted_effect():
    # Closed form: the NI statistic (s·est + M)/SE is a noncentral t with ncp (s·Δ + M)/se;
    # computed with scipy.stats.nct / norm on random parameters.
    rng = np.random.default_rng(11)
    k = 40
    shift = rng.uniform(-0.5, 0.5, k)
    margin = rng.uniform(0.2, 1.5, k)
    se = rng.uniform(0.1, 0.6, k)
    df = rng.choice([3.0, 10.0, 57.0, np.inf], k)
    alpha = rng.choice([0.025, 0.05], k)
    got = ni_power(shift, margin, se, df, alpha)
    ncp = (shift + margin) / se
    want = np.where(
        np.isinf(df),
        stats.norm.sf(stats.norm.isf(alpha) - ncp),
        stats.nct.sf(
            stats.t.isf(alpha, np.where(np.isinf(df), 1, df)), np.where(np.isinf(df), 1, df), ncp
        ),
    )
    np.testing.assert_allclose(got, want, rtol=1e-8)


def _tost_by_quad(delta, margin, se, df, alpha):
    """Exact TOST power by adaptive quadrature over the chi distribution of s / sigma."""
    c = stats.t.isf(alpha, df)

    def integrand(u):
        inner = special.ndtr((margin - delta) / se - c * u) - special.ndtr(
            (-margin - delta) / se + c * u
        )
        # U = sqrt(chi2(df)/df): density 2 df u f_chi2(df u^2).
        return max(inner, 0.0) * 2.0 * df * u * stats.chi2.pdf(df * u * u, df)

    top = margin / (c * se)
    value, _ = integrate.quad(integrand, 0.0, top, limit=200, epsabs=1e-13, epsrel=1e-11)
    return value


def test_exact_tost_power_agrees_with_quadrature_on_random_parameters():
    # Numerical integration (scipy.integrate.quad) of both tails of the bivariate noncentral t.
    rng = np.random.default_rng(5)
    k = 30
    df = rng.choice([2.0, 4.0, 9.0, 22.0, 80.0, 400.0, 5000.0], k)
    se = rng.uniform(0.1, 0.5, k)
    margin = rng.uniform(0.3, 1.5, k)
    delta = rng.uniform(-1.0, 1.0, k) * margin
    alpha = rng.choice([0.025, 0.05, 0.1], k)
    got = tost_power(delta, margin, se, df, alpha)
    want = [_tost_by_quad(*args) for args in zip(delta, margin, se, df, alpha, strict=True)]
    np.testing.assert_allclose(got, want, rtol=1e-7, atol=1e-10)


def test_exact_tost_power_agrees_with_simulation():
    # Monte Carlo of the two-sample TOST (fixed seed): 12 per group, sigma 1, true difference
    # 0.1, margin 0.8, alpha .05 each; the exact power lies within 4 simulation SEs.
    rng = np.random.default_rng(20261203)
    reps, n = 200_000, 12
    x = rng.standard_normal((reps, n))
    y = rng.standard_normal((reps, n)) + 0.1
    diff = y.mean(axis=1) - x.mean(axis=1)
    sp = np.sqrt((x.var(axis=1, ddof=1) + y.var(axis=1, ddof=1)) / 2.0)
    se_hat = sp * np.sqrt(2.0 / n)
    c = stats.t.isf(0.05, 2 * n - 2)
    shown = (diff - c * se_hat > -0.8) & (diff + c * se_hat < 0.8)
    simulated = shown.mean()
    exact = float(tost_power(0.1, 0.8, np.sqrt(2.0 / n), 2 * n - 2, 0.05))
    assert abs(simulated - exact) < 4.0 * np.sqrt(exact * (1 - exact) / reps)
    # The normal approximation is visibly off at this size (why mean designs use the exact t).
    assert abs(float(tost_power(0.1, 0.8, np.sqrt(2.0 / n), np.inf, 0.05)) - exact) > 0.02


def test_normal_tost_power_agrees_with_statsmodels_power_ztost_prop():
    # statsmodels.stats.proportion.power_ztost_prop with the variance at the true proportion
    # (variance_prop = p_alt, no discreteness): a one-sample TOST on a normal estimate.
    from statsmodels.stats.proportion import power_ztost_prop

    rng = np.random.default_rng(8)
    for _ in range(12):
        p = rng.uniform(0.2, 0.8)
        n = int(rng.integers(50, 800))
        m = rng.uniform(0.05, 0.2)
        d = rng.uniform(-0.8, 0.8) * m
        a = float(rng.choice([0.025, 0.05]))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            want = power_ztost_prop(
                p - d - m, p - d + m, n, p, alpha=a, dist="norm", variance_prop=p, discrete=False
            )[0]
        got = float(tost_power(d, m, np.sqrt(p * (1 - p) / n), np.inf, a))
        assert got == pytest.approx(want, rel=1e-9, abs=1e-12)


def test_power_at_the_margin_is_alpha_and_rises_with_precision():
    # Common practice: at a true difference on the margin the NI test has power alpha; TOST
    # power at the margin is at most alpha; both rise as the SE falls.
    assert float(ni_power(-0.3, 0.3, 0.1, 30, 0.025)) == pytest.approx(0.025, rel=1e-9)
    assert float(tost_power(0.3, 0.3, 0.1, 30, 0.05)) <= 0.05 + 1e-12
    se = np.linspace(0.5, 0.05, 20)
    assert np.all(np.diff(ni_power(0.0, 0.3, se, 40, 0.025)) > 0)
    assert np.all(np.diff(tost_power(0.05, 0.3, se, 40, 0.05)) >= 0)


def test_detectable_margins_invert_the_power():
    rng = np.random.default_rng(2)
    k = 20
    se = rng.uniform(0.1, 0.4, k)
    df = rng.choice([6.0, 30.0, np.inf], k)
    delta = rng.uniform(-0.2, 0.2, k)
    alpha = np.full(k, 0.05)
    power = rng.uniform(0.6, 0.95, k)
    m_ni = detectable_ni_margin(delta, se, df, alpha, power)
    np.testing.assert_allclose(ni_power(delta, m_ni, se, df, alpha), power, rtol=1e-8)
    m_eq = detectable_equivalence_margin(delta, se, df, alpha, power)
    np.testing.assert_allclose(tost_power(delta, m_eq, se, df, alpha), power, rtol=1e-7)


# -- sizes and power through the audit -----------------------------------------------------------


def test_issue_example_non_inferiority_of_two_proportions():
    # Issue 15: p1 = p2 = 0.85, one-sided alpha .025, margin 10 points. Blackwelder's unpooled
    # variance at the true proportions: n per group = (z.975 + z.80)^2 (2 x .85 x .15) / .1^2
    # = 200.2 -> 201 (hand calculation of Blackwelder 1982, eq. for H0: p2 - p1 <= -M).
    row = dict(
        study_id="NI",
        design="two_proportions",
        hypothesis="non_inferiority",
        margin=0.10,
        alpha=0.025,
        direction="increase",
        planned_p1=0.85,
        planned_p2=0.85,
        planned_n1=240,
        planned_n2=240,
        realized_n1=236,
        realized_n2=238,
        observed_effect=0.007,
        observed_ci_low=-0.079,
        observed_ci_high=0.093,
    )
    result = _audit([row])
    m = result.metrics.iloc[0]
    assert m["n_required_plan"] == 402
    se = np.sqrt(2 * 0.85 * 0.15 / 240)
    assert m["plan_power"] == pytest.approx(stats.norm.sf(1.959964 - 0.1 / se), rel=1e-5)
    assert 0.85 < m["plan_power"] < 0.89  # "about 0.87", not superiority's 0.03
    assert m["ci_verdict"] == "non_inferior"
    assert m["result_significant"] == 1.0
    assert np.isnan(m["mde"])
    assert m["plan_reproduced_by"] is None or "unpooled" in m["plan_reproduced_by"]


def test_chow_shao_wang_non_inferiority_proportions_example():
    # Chow, Shao & Wang, Sample Size Calculations in Clinical Research, section 4.2 (from
    # memory): p_T = .85, p_C = .65, margin .10, one-sided alpha .05, power .80:
    # n = (1.64 + 0.84)^2 (.85 x .15 + .65 x .35) / (.2 + .1)^2 = 24.3 -> 25 per group.
    row = dict(
        study_id="csw",
        design="two_proportions",
        hypothesis="non_inferiority",
        margin=0.10,
        alpha=0.05,
        planned_p1=0.65,
        planned_p2=0.85,
        planned_n1=25,
        planned_n2=25,
    )
    m = _audit([row]).metrics.iloc[0]
    assert m["n_required_plan"] == 50


def test_non_inferiority_means_size_is_the_one_sided_t_at_the_margin():
    # Julious 2004, section 4 (closed form): with no true difference, NI at one-sided alpha is
    # the one-sided superiority calculation at an effect equal to the margin; d = 0.5,
    # one-sided .025, power .90 needs 86 per group by the exact t (Cohen's table gives 85 by
    # his approximation for two-sided .05, from memory).
    row = dict(
        study_id="m",
        design="two_means",
        effect_scale="d",
        hypothesis="non_inferiority",
        direction="increase",
        margin=0.5,
        alpha=0.025,
        target_power=0.9,
        planned_n1=86,
        planned_n2=86,
    )
    sup = dict(row, study_id="s", hypothesis=None, margin=None, planned_effect=0.5, sides=1)
    result = _audit([row, sup])
    ni, su = result.metrics.iloc[0], result.metrics.iloc[1]
    assert ni["n_required_plan"] == su["n_required_plan"] == 172
    assert ni["plan_power"] == pytest.approx(su["plan_power"], rel=1e-10)
    assert ni["plan_reproduced_by"] == "exact t"


def test_equivalence_means_size_by_exact_tost():
    # TOST, no true difference, margin / sigma = 0.4, alpha .05, power .80: the normal closed
    # form of Julious 2004 (eq. for Delta = 0) gives 2 (1.645 + 1.2816)^2 / 0.16 = 107.0 per
    # group; the exact t needs one more (108). Checked against the quadrature above.
    row = dict(
        study_id="eq",
        design="two_means",
        hypothesis="equivalence",
        margin=2.0,
        alpha=0.05,
        planned_sd=5.0,
        planned_n1=108,
        planned_n2=108,
        realized_n1=107,
        realized_n2=108,
    )
    m = _audit([row]).metrics.iloc[0]
    assert m["n_required_plan"] == 216
    exact_107 = _tost_by_quad(0.0, 2.0, 5.0 * np.sqrt(2 / 107), 212, 0.05)
    exact_108 = _tost_by_quad(0.0, 2.0, 5.0 * np.sqrt(2 / 108), 214, 0.05)
    assert exact_107 < 0.8 <= exact_108
    assert m["plan_power"] == pytest.approx(exact_108, rel=1e-7)
    assert m["plan_reproduced_by"] == "exact t"
    assert m["detectable_margin"] == pytest.approx(2.0, rel=0.01)


def test_survival_non_inferiority_events_on_the_log_hr_scale():
    # Chow, Shao & Wang, section 7 (closed form): events = (z_a + z_b)^2 / (p(1-p)
    # (log HR_true - log margin)^2); HR margin 1.3, true HR 1, one-sided .025, power .8, 1:1:
    # 4 x 7.849 / log(1.3)^2 = 455.9 -> 456 events. A margin of 0.769 is its reciprocal.
    row = dict(
        study_id="hr",
        design="survival",
        hypothesis="non_inferiority",
        direction="decrease",
        margin=1.3,
        planned_effect=1.0,
        alpha=0.025,
        planned_events=456,
        planned_n1=400,
        planned_n2=400,
        realized_events=430,
        realized_n1=398,
        realized_n2=399,
    )
    flipped = dict(row, study_id="hr2", margin=1 / 1.3)
    result = _audit([row, flipped])
    m = result.metrics
    z = special.ndtri(0.975) + special.ndtri(0.8)
    assert m["events_required_plan"].tolist() == [np.ceil(4 * z * z / np.log(1.3) ** 2)] * 2
    assert m["plan_power"].iloc[0] == pytest.approx(
        stats.norm.sf(1.959964 - np.log(1.3) * np.sqrt(456 / 4)), rel=1e-5
    )
    notes = result.by_row(result.notes, "text")
    assert any("reciprocal" in t for t in notes[1])
    assert m["detectable_margin"].iloc[0] > 1.0


def test_estimate_design_equivalence_and_non_inferiority():
    # Normal with a given SE: NI power = Phi((s·Delta + M)/se - z_a); TOST closed form.
    rows = [
        dict(study_id="e1", design="estimate", hypothesis="non_inferiority",
             direction="increase", margin=0.3, alpha=0.025, planned_se=0.1, realized_se=0.12),
        dict(study_id="e2", design="estimate", hypothesis="equivalence", margin=0.3,
             alpha=0.05, planned_se=0.1, realized_se=0.12, planned_effect=0.05),
    ]  # fmt: skip
    m = _audit(rows).metrics
    assert m["plan_power"].iloc[0] == pytest.approx(stats.norm.sf(1.959964 - 3.0), rel=1e-6)
    want = stats.norm.cdf(0.25 / 0.1 - 1.644854) - stats.norm.cdf(-0.35 / 0.1 + 1.644854)
    assert m["plan_power"].iloc[1] == pytest.approx(want, rel=1e-6)


def test_crossover_and_cluster_non_inferiority_use_the_designs_t():
    rows = [
        dict(study_id="x", design="crossover", hypothesis="non_inferiority", direction="increase",
             margin=1.0, alpha=0.025, planned_sd=2.0, planned_n1=40, realized_n1=38),
        dict(study_id="c", design="cluster_two_means", hypothesis="non_inferiority",
             direction="increase", margin=1.0, alpha=0.025, planned_sd=4.0, planned_icc=0.05,
             planned_cluster_size=20, planned_n1=10, planned_n2=10, realized_n1=10,
             realized_n2=10),
    ]  # fmt: skip
    m = _audit(rows).metrics
    # Crossover: SE = sd / sqrt(n), t on n - 2 df (DESIGN.md 9.2).
    se = 2.0 / np.sqrt(40)
    want = stats.nct.sf(stats.t.isf(0.025, 38), 38, 1.0 / se)
    assert m["plan_power"].iloc[0] == pytest.approx(want, rel=1e-8)
    # Cluster: variance x design effect 1 + (m - 1) ICC over J m units per arm, J - 2 df.
    deff = 1 + 19 * 0.05
    se = 4.0 * np.sqrt(deff * 2 / 200)
    want = stats.nct.sf(stats.t.isf(0.025, 18), 18, 1.0 / se)
    assert m["plan_power"].iloc[1] == pytest.approx(want, rel=1e-8)


# -- verdicts -------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("hypothesis", "low", "high", "verdict"),
    [
        ("non_inferiority", -0.079, 0.05, "non_inferior"),
        ("non_inferiority", -0.2, -0.11, "inferior"),
        ("non_inferiority", -0.12, 0.02, "inconclusive"),
        ("equivalence", -0.05, 0.08, "equivalent"),
        ("equivalence", 0.11, 0.3, "not_equivalent"),
        ("equivalence", -0.05, 0.12, "inconclusive"),
    ],
)
def test_ci_verdict_against_the_margin(hypothesis, low, high, verdict):
    # DESIGN.md 9.1: the interval at level 1 - 2 alpha (here a reported 95% interval with a
    # one-sided .025, or 90% with .05) against the margin .10.
    alpha = 0.025 if hypothesis == "non_inferiority" else 0.05
    level = 1 - 2 * alpha
    row = dict(
        study_id="v", design="estimate", hypothesis=hypothesis, direction="increase",
        margin=0.10, alpha=alpha, planned_se=0.04, realized_se=0.04,
        observed_effect=(low + high) / 2, observed_ci_low=low, observed_ci_high=high,
        observed_ci_level=level,
    )  # fmt: skip
    if hypothesis == "equivalence":
        row.pop("direction")
    m = _audit([row]).metrics.iloc[0]
    assert m["ci_verdict"] == verdict
    assert m["result_ci_level"] == pytest.approx(level)


def test_ni_verdict_for_a_decrease_is_better_row():
    # Lower is better (a hazard ratio): non-inferior when the upper limit is below the margin.
    row = dict(
        study_id="hr", design="survival", hypothesis="non_inferiority", direction="decrease",
        margin=1.25, alpha=0.025, planned_effect=1.0, planned_events=600, realized_events=600,
        planned_n1=500, planned_n2=500, realized_n1=500, realized_n2=500,
        observed_effect=0.98, observed_ci_low=0.83, observed_ci_high=1.16,
    )  # fmt: skip
    worse = dict(
        row, study_id="hr2", observed_effect=1.5, observed_ci_low=1.3, observed_ci_high=1.73
    )
    m = _audit([row, worse]).metrics
    assert m["ci_verdict"].tolist() == ["non_inferior", "inferior"]


# -- validation -----------------------------------------------------------------------------------

_NI = dict(
    study_id="x", design="two_proportions", hypothesis="non_inferiority", margin=0.1,
    alpha=0.025, direction="increase", planned_p1=0.8, planned_p2=0.8, planned_n1=300,
    planned_n2=300,
)  # fmt: skip


@pytest.mark.parametrize(
    ("change", "column", "words"),
    [
        ({"margin": None}, "margin", "needs its margin"),
        ({"sides": 2}, "sides", "one-sided"),
        ({"margin": -0.1}, "margin", "positive magnitude"),
        ({"direction": None}, "direction", "which way is better"),
        ({"effect_measure": "odds_ratio", "margin": 1.5}, "hypothesis", "risk difference only"),
        ({"design": "correlation", "planned_effect": 0.3}, "hypothesis", "no non-inferiority"),
        ({"hypothesis": "equivalence", "sides": 2}, "sides", "two one-sided tests"),
    ],
)
def test_bad_margin_rows_are_invalid_naming_the_column(change, column, words):
    result = _audit([dict(_NI, **change), dict(_NI, study_id="fine")])
    errors = _errors(result)
    assert any(c == column and words in r for c, r in errors), errors
    assert result.status.tolist() == ["invalid", "audited"]


def test_superiority_rows_are_unchanged_by_the_new_columns():
    # A superiority row gives the same numbers whether or not the file has the new columns.
    from audit.resources import bundled_dir

    rows = pd.read_csv(bundled_dir("demo_data") / "demo_portfolio.csv", dtype=object)
    sup = rows[rows.get("hypothesis", pd.Series(index=rows.index)).isna()].reset_index(drop=True)
    sup = sup.drop(columns=[c for c in ("hypothesis", "margin") if c in sup.columns])
    before = audit.audit_table(sup).metrics
    after = audit.audit_table(sup.assign(hypothesis=None, margin=None)).metrics
    pd.testing.assert_frame_equal(before, after)


def test_superiority_row_with_a_margin_says_it_is_not_used():
    row = dict(_NI, study_id="s", hypothesis="superiority", planned_p2=0.9)
    result = _audit([row])
    notes = result.by_row(result.notes, "text")[0]
    assert any(t.startswith("margin not used") for t in notes)


# -- referee text ---------------------------------------------------------------------------------


def test_respond_writes_the_non_inferiority_version():
    # Issue 15: the draft names the margin, the one-sided level and where the interval's limit
    # lies against the margin; it never says "planned to detect a risk difference of 0".
    from audit.respond import respond_text

    row = dict(
        study_id="NI", design="two_proportions", hypothesis="non_inferiority", margin=0.10,
        alpha=0.025, direction="increase", planned_p1=0.85, planned_p2=0.85, planned_n1=240,
        planned_n2=240, realized_n1=236, realized_n2=238, observed_effect=0.007,
        observed_ci_low=-0.079, observed_ci_high=0.093,
    )  # fmt: skip
    eq = dict(
        study_id="EQ", design="two_means", hypothesis="equivalence", margin=2.0, alpha=0.05,
        planned_sd=5.0, planned_n1=108, planned_n2=108, realized_n1=100, realized_n2=101,
        observed_effect=0.5, observed_ci_low=-0.6, observed_ci_high=2.6, observed_ci_level=0.9,
    )  # fmt: skip
    result = _audit([row, eq])
    text = respond_text(result, "NI")
    assert "planned to detect" not in text
    assert "margin of 0.1" in text and "one-sided test at α = 0.025" in text
    assert "lower limit (−0.079) lies above the margin (−0.1): non-inferiority is shown" in text
    other = respond_text(result, "EQ")
    assert "two one-sided tests, each at α = 0.05" in other
    assert "90% CI" in other and "neither shows equivalence" in other


# -- robustness -----------------------------------------------------------------------------------

_SUPPORTED = (
    "one_mean",
    "paired_means",
    "two_means",
    "crossover",
    "cluster_two_means",
    "two_proportions",
    "survival",
    "estimate",
)


@pytest.mark.parametrize("seed", [4, 9])
def test_random_margin_rows_audit_and_every_null_metric_has_a_note(seed):
    # Random non-inferiority and equivalence rows of every supported design with random blanks:
    # none raises (RuntimeWarnings are errors in the test run), and each null metric of an
    # audited row is explained by a note.
    from test_designs_all import _explained

    rng = np.random.default_rng(seed)
    k = 240
    design = rng.choice(_SUPPORTED, k)
    n1 = rng.integers(10, 300, k).astype(float)
    survival = design == "survival"
    p1 = rng.uniform(0.1, 0.9, k)
    data = {
        "study_id": [f"M{i}" for i in range(k)],
        "design": design,
        "hypothesis": rng.choice(["non_inferiority", "equivalence"], k),
        "margin": np.where(survival, rng.uniform(1.05, 1.6, k), rng.uniform(0.05, 2.0, k)),
        "direction": rng.choice(["increase", "decrease"], k),
        "alpha": rng.choice([0.025, 0.05], k),
        "target_power": rng.choice([0.8, 0.9], k),
        "planned_n1": n1,
        "planned_n2": np.round(n1 * rng.choice([0.5, 1.0, 2.0], k)),
        "realized_n1": np.round(n1 * rng.uniform(0.5, 1.0, k)),
        "realized_n2": np.round(n1 * rng.uniform(0.5, 1.0, k)),
        "planned_sd": rng.uniform(0.5, 5.0, k),
        "realized_sd": rng.uniform(0.5, 5.0, k),
        "planned_effect": np.where(
            survival, np.exp(rng.uniform(-0.1, 0.1, k)), rng.normal(0, 0.1, k)
        ),
        "planned_p1": p1,
        "planned_p2": np.clip(p1 + rng.uniform(-0.05, 0.05, k), 0.01, 0.99),
        "realized_p1": np.clip(p1 + rng.uniform(-0.05, 0.05, k), 0.01, 0.99),
        "planned_icc": rng.uniform(0.0, 0.1, k),
        "planned_cluster_size": rng.uniform(5, 30, k),
        "planned_events": np.round(n1 * 1.5 * rng.uniform(0.3, 0.9, k)),
        "realized_events": np.round(n1 * 1.5 * rng.uniform(0.2, 0.8, k)),
        "planned_se": rng.uniform(0.05, 0.5, k),
        "realized_se": rng.uniform(0.05, 0.5, k),
        "control_effect": np.where(survival, rng.uniform(0.4, 0.9, k), rng.uniform(0.2, 3.0, k)),
        "observed_effect": np.where(survival, np.exp(rng.normal(0, 0.1, k)), rng.normal(0, 0.2, k)),
        "observed_se": rng.uniform(0.02, 0.4, k),
        "planned_dropout": rng.choice([0.0, 0.1, 0.2], k),
    }
    binary = design == "two_proportions"
    data["planned_effect"] = np.where(binary, np.nan, data["planned_effect"])
    df = pd.DataFrame(data).astype(object)
    blank = rng.uniform(size=df.shape) < 0.15
    blank[:, :4] = False  # id, design, hypothesis, margin
    for j, column in enumerate(df.columns):
        blank[:, j] |= ~np.isin(
            design, [n for n, d in audit.DESIGNS.items() if column in d.inputs()]
        )
    df = df.mask(blank)
    result = audit.audit_table(df)
    assert len(result.table) == k
    audited = np.flatnonzero(result.valid)
    assert len(audited) > k // 2
    notes = result.by_row(result.notes, "text")
    for i in audited:
        row = result.metrics.iloc[i]
        for metric in audit.METRICS:
            if pd.isna(row[metric]):
                assert _explained(metric, notes[i]), (design[i], metric, notes[i])
        power = row["power_at_planned_effect"]
        assert np.isnan(power) or 0.0 <= power <= 1.0


# -- Farrington-Manning -------------------------------------------------------------------------


def test_restricted_proportions_maximise_the_constrained_likelihood():
    # Issue 15 (a grid search and the Miettinen-Nurminen cubic): 0.8 vs 0.8 with a null
    # difference of -0.1 has the restricted maximum at 0.84106 (statsmodels'
    # score_test_proportions_2indep gives 0.8363 there and is not used as a reference).
    from scipy import optimize

    from audit.hypotheses import restricted_proportions

    p1, p2 = restricted_proportions(0.8, 0.8, 1.0, -0.1)
    assert float(p1) == pytest.approx(0.84106, abs=5e-6)
    assert float(p2) == pytest.approx(float(p1) - 0.1, abs=1e-14)
    # Random settings against scipy.optimize.minimize_scalar on the log-likelihood.
    rng = np.random.default_rng(31)
    k = 25
    a, b = rng.uniform(0.05, 0.95, k), rng.uniform(0.05, 0.95, k)
    r = rng.choice([0.5, 1.0, 2.0, 3.0], k)
    d = rng.uniform(-0.25, 0.25, k)
    got, _ = restricted_proportions(a, b, r, d)
    for i in range(k):
        lo, hi = max(0.0, -d[i]) + 1e-12, min(1.0, 1.0 - d[i]) - 1e-12

        def nll(x, i=i):
            y = x + d[i]
            return -(
                a[i] * np.log(x) + (1 - a[i]) * np.log(1 - x)
                + r[i] * (b[i] * np.log(y) + (1 - b[i]) * np.log(1 - y))
            )  # fmt: skip

        best = optimize.minimize_scalar(nll, bounds=(lo, hi), method="bounded",
                                        options={"xatol": 1e-12})  # fmt: skip
        assert got[i] == pytest.approx(best.x, abs=1e-7)


def test_farrington_manning_size_is_a_reproduction_method_for_proportions():
    # Farrington & Manning (1990), sample-size formula for H0: p2 - p1 <= -M: n per group
    # = (z_a sqrt(V0) + z_b sqrt(V1))^2 / M^2 with V0 at the restricted proportions on the
    # margin. 0.8 vs 0.8, margin 0.1, one-sided .025, power .8: V0 = 2 x ... from the RMLE
    # 0.84106 / 0.74106 (issue 15), V1 = 2 x 0.16.
    v0 = 0.84106 * 0.15894 + 0.74106 * 0.25894
    v1 = 2 * 0.16
    n = (special.ndtri(0.975) * np.sqrt(v0) + special.ndtri(0.8) * np.sqrt(v1)) ** 2 / 0.01
    planned = int(np.ceil(n))
    row = dict(_NI, planned_n1=planned, planned_n2=planned)
    m = _audit([row]).metrics.iloc[0]
    assert m["plan_reproduced_by"] == "Farrington-Manning (restricted MLE variance)"
    assert m["plan_discrepancy_closest"] == pytest.approx(0.0, abs=1e-12)
    # The audit's own (Blackwelder) size differs: 2 x (z_a + z_b)^2 x 0.16 / 0.01 = 251.2.
    assert m["n_required_plan"] == 2 * 252
