"""Results as papers report them (audit/reported.py): test statistics, arm means, the reported p.

Sources: Borenstein, Hedges, Higgins & Rothstein (2009), Introduction to Meta-Analysis, ch. 4
(d from means and SDs, d from t, the variance of d), ch. 6 (Fisher's z), ch. 7 (r and d); the
t, F, chi-square and normal tails of scipy.stats; raw data analysed with scipy.stats (t tests,
correlations, contingency tables) as the outside reference for the conversions.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import audit
from audit.reported import half_unit, statistic_p


def _audit(rows: list[dict], **kw) -> audit.AuditResult:
    frame = pd.DataFrame([{"study_id": f"S{i}", **r} for i, r in enumerate(rows)])
    return audit.audit_table(frame.astype(object), **kw)


def _notes(result: audit.AuditResult, i: int) -> list[str]:
    return result.by_row(result.notes, "text")[i]


# -- conversions ----------------------------------------------------------------------------------


def test_d_and_its_variance_from_a_t_statistic_borenstein():
    # Borenstein et al. (2009) ch. 4: d = t sqrt(1/n1 + 1/n2), V_d = (n1 + n2)/(n1 n2) +
    # d^2 / (2 (n1 + n2)) (eq. 4.20); the p of t on n1 + n2 - 2 df from scipy.stats.t.
    rng = np.random.default_rng(7)
    rows, refs = [], []
    for _ in range(40):
        n1, n2 = (int(v) for v in rng.integers(5, 200, 2))
        t = float(np.round(rng.normal(1.5, 1.5), 2))
        rows.append(
            {"design": "two_means", "realized_n1": n1, "realized_n2": n2,
             "observed_statistic": t, "statistic_type": "t", "statistic_df1": n1 + n2 - 2}
        )  # fmt: skip
        d = t * np.sqrt(1 / n1 + 1 / n2)
        v = (n1 + n2) / (n1 * n2) + d * d / (2 * (n1 + n2))
        refs.append((d, np.sqrt(v), 2 * stats.t.sf(abs(t), n1 + n2 - 2)))
    m = _audit(rows).metrics
    d, se, p = (np.array(x) for x in zip(*refs, strict=True))
    np.testing.assert_allclose(m["result_effect"], d, rtol=1e-12)
    np.testing.assert_allclose(m["result_se"], se, rtol=1e-12)
    np.testing.assert_allclose(m["result_p"], p, rtol=1e-10)
    # Significance is the t test's own (not the approximate interval of d).
    np.testing.assert_array_equal(m["result_significant"], (p < 0.05).astype(float))


def test_arm_means_against_a_t_test_of_the_summaries():
    # scipy.stats.ttest_ind_from_stats (pooled variance) gives t and p; the raw difference and
    # its SE follow (Borenstein et al. 2009, eq. 4.3-4.5, pooled SD S_within).
    rng = np.random.default_rng(3)
    for _ in range(20):
        n1, n2 = (int(v) for v in rng.integers(4, 120, 2))
        m1, m2 = rng.normal(50, 5, 2).round(1)
        s1, s2 = rng.uniform(3, 12, 2).round(1)
        ref = stats.ttest_ind_from_stats(m2, s2, n2, m1, s1, n1, equal_var=True)
        sp = np.sqrt(((n1 - 1) * s1**2 + (n2 - 1) * s2**2) / (n1 + n2 - 2))
        common = {"design": "two_means", "realized_n1": n1, "realized_n2": n2,
                  "observed_mean1": m1, "observed_mean2": m2, "observed_sd1": s1,
                  "observed_sd2": s2}  # fmt: skip
        result = _audit([common, {**common, "effect_scale": "d"}])
        raw, std = result.metrics.iloc[0], result.metrics.iloc[1]
        assert raw["result_effect"] == pytest.approx(m2 - m1, rel=1e-12)
        assert raw["result_se"] == pytest.approx((m2 - m1) / ref.statistic, rel=1e-10)
        assert raw["result_p"] == pytest.approx(ref.pvalue, rel=1e-9)
        d = (m2 - m1) / sp
        assert std["result_effect"] == pytest.approx(d, rel=1e-12)
        v = (n1 + n2) / (n1 * n2) + d * d / (2 * (n1 + n2))
        assert std["result_se"] == pytest.approx(np.sqrt(v), rel=1e-12)
        assert std["result_p"] == pytest.approx(ref.pvalue, rel=1e-9)
        assert any("arm means" in n for n in _notes(result, 0))


def test_d_z_from_a_paired_t_and_raw_paired_means():
    # d_z = t / sqrt(n) for a paired t on n - 1 df (Cohen 1988, ch. 2, d_z = d of the
    # differences); the paired t from raw data with scipy.stats.ttest_rel.
    rng = np.random.default_rng(11)
    before = rng.normal(20, 4, 25)
    after = before + rng.normal(1.2, 3, 25)
    ref = stats.ttest_rel(after, before)
    diff = after - before
    rows = [
        {"design": "paired_means", "realized_n1": 25, "observed_statistic": ref.statistic,
         "statistic_type": "t", "statistic_df1": 24},
        {"design": "paired_means", "realized_n1": 25, "observed_mean1": before.mean(),
         "observed_mean2": after.mean(), "realized_sd": diff.std(ddof=1)},
    ]  # fmt: skip
    m = _audit(rows).metrics
    assert m["result_effect"].iat[0] == pytest.approx(diff.mean() / diff.std(ddof=1), rel=1e-10)
    assert m["result_p"].iat[0] == pytest.approx(ref.pvalue, rel=1e-9)
    assert m["result_effect"].iat[1] == pytest.approx(diff.mean(), rel=1e-12)
    assert m["result_se"].iat[1] == pytest.approx(diff.std(ddof=1) / 5, rel=1e-12)
    assert m["result_p"].iat[1] == pytest.approx(ref.pvalue, rel=1e-9)


def test_correlations_from_r_and_from_t_fisher_z():
    # Borenstein et al. (2009) ch. 6: z = atanh r with V = 1 / (n - 3); the interval is
    # tanh(z -/+ 1.96 sqrt(V)). The p of r is that of its t test on n - 2 df
    # (scipy.stats.pearsonr on raw data); r from that t is r = t / sqrt(t^2 + df).
    rng = np.random.default_rng(5)
    x = rng.normal(size=40)
    y = 0.4 * x + rng.normal(size=40)
    r, p = stats.pearsonr(x, y)
    t = r * np.sqrt(38) / np.sqrt(1 - r * r)
    rows = [
        {"design": "correlation", "realized_n1": 40, "observed_statistic": r,
         "statistic_type": "r"},
        {"design": "correlation", "realized_n1": 40, "observed_statistic": t,
         "statistic_type": "t", "statistic_df1": 38},
    ]  # fmt: skip
    m = _audit(rows).metrics
    for i in range(2):
        assert m["result_effect"].iat[i] == pytest.approx(r, rel=1e-10)
        assert m["result_se"].iat[i] == pytest.approx(1 / np.sqrt(37), rel=1e-12)
        assert m["result_p"].iat[i] == pytest.approx(p, rel=1e-8)
        q = stats.norm.isf(0.025) / np.sqrt(37)
        assert m["result_ci_low"].iat[i] == pytest.approx(np.tanh(np.arctanh(r) - q), rel=1e-9)
        assert m["result_ci_high"].iat[i] == pytest.approx(np.tanh(np.arctanh(r) + q), rel=1e-9)


def test_point_biserial_r_gives_the_d_of_the_data():
    # A point-biserial r is the two-sample t in other words (t = r sqrt(N - 2) / sqrt(1 - r^2)),
    # so the d derived from it is the d of the data exactly (scipy.stats.pointbiserialr,
    # ttest_ind). Borenstein et al. (2009, eq. 7.5) give the large-sample d = r sqrt(a) /
    # sqrt(1 - r^2), a = N^2 / (n1 n2), which differs from it by the factor sqrt((N - 2) / N).
    rng = np.random.default_rng(8)
    a, b = rng.normal(0, 1, 30), rng.normal(0.5, 1, 45)
    group = np.r_[np.zeros(30), np.ones(45)]
    r, p = stats.pointbiserialr(group, np.r_[a, b])
    sp = np.sqrt((29 * a.var(ddof=1) + 44 * b.var(ddof=1)) / 73)
    m = _audit(
        [{"design": "two_means", "realized_n1": 30, "realized_n2": 45, "observed_statistic": r,
          "statistic_type": "r"}]
    ).metrics  # fmt: skip
    d = (b.mean() - a.mean()) / sp
    assert m["result_effect"].iat[0] == pytest.approx(d, rel=1e-10)
    assert m["result_p"].iat[0] == pytest.approx(p, rel=1e-8)
    approx = r * (75 / np.sqrt(30 * 45)) / np.sqrt(1 - r * r)
    assert m["result_effect"].iat[0] == pytest.approx(approx * np.sqrt(73 / 75), rel=1e-10)


def test_f_on_one_df_is_t_squared_signed_by_the_direction():
    # F(1, df) = t^2 (a fact of the trade): the same d, SE and p as the t, its sign taken from
    # direction; without a direction only size, SE and p are known.
    base = {"design": "two_means", "realized_n1": 30, "realized_n2": 32}
    rows = [
        {**base, "observed_statistic": -2.2, "statistic_type": "t", "statistic_df1": 60},
        {**base, "observed_statistic": 4.84, "statistic_type": "F", "statistic_df1": 1,
         "statistic_df2": 60, "direction": "decrease"},
        {**base, "observed_statistic": 4.84, "statistic_type": "F", "statistic_df1": 1,
         "statistic_df2": 60},
    ]  # fmt: skip
    result = _audit(rows)
    m = result.metrics
    assert m["result_effect"].iat[1] == pytest.approx(m["result_effect"].iat[0], rel=1e-12)
    assert m["result_se"].iat[1] == pytest.approx(m["result_se"].iat[0], rel=1e-12)
    assert m["result_p"].iat[1] == pytest.approx(stats.f.sf(4.84, 1, 60), rel=1e-10)
    assert m["result_p"].iat[1] == pytest.approx(m["result_p"].iat[0], rel=1e-10)
    assert np.isnan(m["result_effect"].iat[2]) and np.isnan(m["result_ci_low"].iat[2])
    assert m["result_se"].iat[2] == pytest.approx(m["result_se"].iat[0], rel=1e-12)
    assert m["result_significant"].iat[2] == 1.0
    assert any("carries no sign" in n for n in _notes(result, 1))
    assert any("carries no sign and the row gives no direction" in n for n in _notes(result, 2))


@pytest.mark.parametrize("corrected", [False, True])
def test_chi_square_of_a_two_by_two_table_gives_back_the_risk_difference(corrected):
    # The Pearson chi-square of a 2x2 table is the square of the pooled two-proportion z, and
    # Yates' corrected chi-square that of the z with the continuity correction (Fleiss, Levin &
    # Paik 2003, ch. 4); reference values from scipy.stats.chi2_contingency on the counts. The
    # risk difference derived from it, with the observed control rate, is the table's.
    for events1, n1, events2, n2 in [(30, 120, 45, 118), (12, 80, 5, 85), (60, 200, 90, 210)]:
        table = np.array([[events2, n2 - events2], [events1, n1 - events1]])
        chi2, p, _, _ = stats.chi2_contingency(table, correction=corrected)
        rd = events2 / n2 - events1 / n1
        row = {"design": "two_proportions", "realized_n1": n1, "realized_n2": n2,
               "realized_p1": events1 / n1, "observed_statistic": chi2,
               "statistic_type": "chi2", "statistic_df1": 1,
               "direction": "increase" if rd > 0 else "decrease",
               "continuity_correction": "yes" if corrected else "no"}  # fmt: skip
        m = _audit([row]).metrics
        assert m["result_effect"].iat[0] == pytest.approx(rd, rel=1e-9)
        assert m["result_p"].iat[0] == pytest.approx(p, rel=1e-9)


def test_log_hazard_ratio_from_a_z_with_schoenfelds_variance():
    # Schoenfeld (1983): var(log HR) = 1 / (D p (1 - p)); log HR = z x SE.
    m = _audit(
        [{"design": "survival", "realized_n1": 150, "realized_n2": 100, "realized_events": 120,
          "observed_statistic": -2.4, "statistic_type": "z"}]
    ).metrics  # fmt: skip
    se = 1 / np.sqrt(120 * 0.6 * 0.4)
    assert m["result_se"].iat[0] == pytest.approx(se, rel=1e-12)
    assert m["result_effect"].iat[0] == pytest.approx(np.exp(-2.4 * se), rel=1e-12)
    assert m["result_p"].iat[0] == pytest.approx(2 * stats.norm.sf(2.4), rel=1e-10)


def test_the_most_direct_source_comes_first():
    # A reported estimate beats arm means, which beat a statistic; with an estimate and a t the
    # SE is |estimate| / |t| (Borenstein et al. 2009, ch. 7: the SE from an estimate and its
    # test statistic).
    base = {"design": "two_means", "realized_n1": 40, "realized_n2": 40}
    rows = [
        {**base, "observed_effect": 3.0, "observed_mean1": 10, "observed_mean2": 14,
         "observed_sd1": 5, "observed_sd2": 5, "observed_statistic": 2.0, "statistic_type": "t"},
        {**base, "observed_mean1": 10, "observed_mean2": 14, "observed_sd1": 5,
         "observed_sd2": 5, "observed_statistic": 2.0, "statistic_type": "t"},
        {**base, "observed_effect": 3.0, "observed_statistic": 2.0, "statistic_type": "t"},
    ]  # fmt: skip
    result = _audit(rows)
    m = result.metrics
    assert m["result_effect"].tolist()[:2] == [3.0, 4.0]
    assert m["result_se"].iat[0] == pytest.approx(5 * np.sqrt(2 / 40), rel=1e-12)  # the SDs
    assert m["result_se"].iat[2] == pytest.approx(1.5, rel=1e-12)  # |3| / |2|
    # The statistic is read with the design's df (78) where its own is not given.
    assert m["result_p"].iat[2] == pytest.approx(2 * stats.t.sf(2.0, 78), rel=1e-10)
    assert any("statistic_df1: read with the design's 78 df" in n for n in _notes(result, 2))


def test_rows_known_only_by_sizes_and_a_statistic_are_read_as_d():
    # Nothing in outcome units: the MDE is a standardized difference (at n = 64 per group, d =
    # 0.50 at power .80; Cohen 1988, Table 2.4.1, from memory), and so is the result.
    result = _audit(
        [{"design": "two_means", "realized_n1": 64, "realized_n2": 64, "observed_p": 0.3},
         {"design": "two_means", "realized_n1": 64, "realized_n2": 64, "realized_sd": 10,
          "observed_p": 0.3}]
    )  # fmt: skip
    m = result.metrics
    assert m["mde"].iat[0] == pytest.approx(0.50, abs=0.005)
    assert m["mde"].iat[1] == pytest.approx(10 * m["mde"].iat[0], rel=1e-12)
    assert any("effect_scale read as d" in n for n in _notes(result, 0))
    assert not any("effect_scale read as d" in n for n in _notes(result, 1))


# -- the p of a statistic, and the reported p checked ----------------------------------------------


def test_statistic_p_against_scipy_on_random_parameters():
    # scipy.stats t.sf, f.sf, chi2.sf, norm.sf; one-sided t in the tested direction; r through
    # its t on N - 2 df; a one-sided F or chi-square on 1 df halves the tail.
    rng = np.random.default_rng(1)
    k = 300
    kind = rng.choice(["t", "z", "f", "chi2", "r"], k).astype(object)
    df1 = rng.integers(1, 60, k).astype(float)
    df2 = rng.integers(2, 300, k).astype(float)
    value = np.where(kind == "r", rng.uniform(-0.9, 0.9, k), rng.normal(0, 3, k))
    value = np.where((kind == "f") | (kind == "chi2"), np.abs(value) * 2, value)
    omnibus = (kind == "f") | (kind == "chi2")
    df1 = np.where(omnibus, np.where(rng.uniform(size=k) < 0.5, 1, df1), df1)
    sides = rng.choice([1.0, 2.0], k)
    direction = rng.choice([-1.0, 1.0], k)
    size = rng.integers(10, 400, k).astype(float)
    r_df = np.where(rng.uniform(size=k) < 0.5, np.nan, size - 2)
    df1 = np.where(kind == "r", r_df, df1)
    got = statistic_p(kind, value, df1, df2, sides=sides, direction=direction,
                      df_default=np.inf, size=size)  # fmt: skip
    for i in range(k):
        v, s, d = value[i], sides[i], direction[i]
        if kind[i] in ("t", "z", "r"):
            if kind[i] == "r":
                dof = size[i] - 2
                t = v * np.sqrt(dof) / np.sqrt(1 - v * v)
            else:
                dof = df1[i] if kind[i] == "t" else np.inf
                t = v
            dist = stats.t(dof) if np.isfinite(dof) else stats.norm()
            ref = 2 * dist.sf(abs(t)) if s == 2 else dist.sf(d * t)
        else:
            tail = stats.f.sf(v, df1[i], df2[i]) if kind[i] == "f" else stats.chi2.sf(v, df1[i])
            ref = tail / 2 if s == 1 and df1[i] == 1 else tail
        assert got[i] == pytest.approx(ref, rel=1e-9, abs=1e-300), (kind[i], v, df1[i], s)


def test_half_unit_of_printed_numbers():
    assert half_unit(np.array([2.31, 0.03, 0.001, 12.0, 0.25, 1e-5])).tolist() == pytest.approx(
        [0.005, 0.005, 0.0005, 0.5, 0.005, 5e-6]
    )


def test_reported_p_recomputed_and_its_discrepancy():
    # t(40) = 2.5: p = 0.0166 (scipy.stats.t). Reported 0.017: consistent; 0.05: off by a
    # factor (0.045 / 0.0170 at the nearest ends); "< .01" off; a one-sided p (0.008) is named.
    base = {"design": "two_means", "realized_n1": 21, "realized_n2": 21, "observed_statistic": 2.5,
            "statistic_type": "t", "statistic_df1": 40}  # fmt: skip
    result = _audit(
        [{**base, "observed_p": 0.017}, {**base, "observed_p": 0.05},
         {**base, "observed_p": "< .01"}, {**base, "observed_p": 0.008}]
    )  # fmt: skip
    m = result.metrics
    face = 2 * stats.t.sf(2.5, 40)
    np.testing.assert_allclose(m["reported_p_recomputed"], face, rtol=1e-10)
    assert m["reported_p_discrepancy"].iat[0] == 1.0
    high = 2 * stats.t.sf(2.495, 40)  # t printed as 2.5 is at least 2.45: p at most this
    low_t = 2 * stats.t.sf(2.45, 40)
    assert m["reported_p_discrepancy"].iat[1] == pytest.approx(0.045 / low_t, rel=1e-9)
    assert high < low_t
    assert m["reported_p_discrepancy"].iat[2] == pytest.approx(
        2 * stats.t.sf(2.55, 40) / 0.01, rel=1e-9
    )
    assert m["reported_p_as_given"].tolist() == ["p = 0.017", "p = 0.05", "p < 0.01", "p = 0.008"]
    assert (m["reported_p_recomputed_from"] == "reported t statistic").all()
    assert any("one-sided p" in n for n in _notes(result, 3))
    flagged = set(result.findings.loc[result.findings["rule"] == "reported-p-inconsistent", "pos"])
    assert flagged == {1, 2, 3}


def test_a_misprinted_p_does_not_decide_significance():
    # The statistic decides: t(58) = 1.20 is not significant whatever the printed p says.
    result = _audit(
        [{"design": "two_means", "realized_n1": 30, "realized_n2": 30, "observed_statistic": 1.2,
          "statistic_type": "t", "statistic_df1": 58, "observed_p": 0.02}]
    )  # fmt: skip
    assert result.metrics["result_significant"].iat[0] == 0.0
    assert result.metrics["result_p"].iat[0] == 0.02  # as reported
    assert any("disagree about significance" in n for n in _notes(result, 0))


# -- bad input -----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "row,column,words",
    [
        ({"observed_statistic": -3.0, "statistic_type": "F", "statistic_df1": 1,
          "statistic_df2": 40}, "observed_statistic", "cannot be negative"),
        ({"observed_statistic": -3.0, "statistic_type": "chi2"}, "observed_statistic",
         "cannot be negative"),
        ({"observed_statistic": 2.0, "statistic_type": "t", "statistic_df1": 0.5},
         "statistic_df1", "must be a number >= 1"),
        ({"observed_statistic": 2.0, "statistic_type": "q"}, "statistic_type",
         "unknown statistic type"),
        ({"observed_statistic": 2.0}, "statistic_type", "say which statistic it is"),
        ({"observed_statistic": 2.0, "statistic_type": "F", "statistic_df1": 1},
         "statistic_df2", "needs both its degrees of freedom"),
        ({"observed_statistic": 4.0, "statistic_type": "F", "statistic_df1": 2,
          "statistic_df2": 40}, "statistic_df1", "several contrasts"),
        ({"observed_statistic": 1.2, "statistic_type": "r"}, "observed_statistic",
         "strictly between -1 and 1"),
        ({"observed_p": 1.5}, "observed_p", "must be a number in (0, 1]"),
        ({"observed_p": 0}, None, None),
    ],
)  # fmt: skip
def test_bad_statistics_are_row_errors_naming_the_column(row, column, words):
    good = {"design": "two_means", "realized_n1": 20, "realized_n2": 20, "observed_p": 0.2}
    result = _audit([good, {"design": "two_means", "realized_n1": 20, "realized_n2": 20, **row}])
    assert result.status[0] == "audited"
    if column is None:  # p printed as 0 is read as a bound (below 0.001), not an error
        assert result.status[1] == "audited"
        return
    assert result.status[1] == "invalid"
    errors = result.errors[result.errors["pos"] == 1]
    assert column in set(errors["column"]), errors
    assert any(words in r for r in errors["reason"]), list(errors["reason"])


def test_a_statistic_a_design_does_not_read_is_an_error():
    result = _audit(
        [{"design": "survival", "realized_events": 100, "observed_statistic": 0.3,
          "statistic_type": "r"}]
    )  # fmt: skip
    reason = result.errors["reason"].iat[0]
    assert result.errors["column"].iat[0] == "statistic_type"
    assert "z, chi-square" in reason and "survival" in reason


def test_a_statistic_type_without_a_statistic_is_noted():
    result = _audit(
        [{"design": "two_means", "realized_n1": 20, "realized_n2": 20, "statistic_type": "t",
          "observed_p": 0.2}]
    )  # fmt: skip
    assert result.status[0] == "audited"
    assert any("given without observed_statistic: not used" in n for n in _notes(result, 0))


@pytest.mark.parametrize("seed", [1, 2])
def test_every_null_metric_has_a_note_with_reported_statistics(seed):
    # The random rows of test_designs_all with a reported statistic, arm means or neither (a
    # kind each design reads, plausible values): no warning escapes, every row is reported, and
    # each null metric of an audited row is explained.
    from test_designs_all import _explained, _random_rows

    rng = np.random.default_rng(seed)
    df = _random_rows(rng, 300)
    k = len(df)
    designs = df["design"].to_numpy()
    kinds = np.array([sorted(audit.DESIGNS[d].statistic_types)[rng.integers(0, 100) % len(
        audit.DESIGNS[d].statistic_types)] for d in designs], dtype=object)  # fmt: skip
    value = rng.normal(1.5, 1.5, k)
    value = np.where(np.isin(kinds, ["f", "chi2"]), value**2, value)
    value = np.where(kinds == "r", np.tanh(value / 4), value)
    df1 = np.where(np.isin(kinds, ["f", "chi2"]), 1.0, rng.integers(5, 300, k).astype(float))
    df1 = np.where(np.isin(designs, ["k_means", "regression"]) & (kinds == "f"), 2.0, df1)
    use = rng.uniform(size=k) < 0.6
    df["observed_statistic"] = np.where(use, value.round(2), np.nan)
    df["statistic_type"] = np.where(use, kinds, None)
    df["statistic_df1"] = np.where(use & (kinds != "z"), df1, np.nan)
    df["statistic_df2"] = np.where(use & (kinds == "f"), rng.integers(5, 300, k), np.nan)
    means = ~use & np.isin(designs, ["two_means", "cluster_two_means", "paired_means"])
    means &= rng.uniform(size=k) < 0.7
    df["observed_mean1"] = np.where(means, rng.normal(50, 5, k).round(1), np.nan)
    df["observed_mean2"] = np.where(means, rng.normal(52, 5, k).round(1), np.nan)
    two = means & (designs != "paired_means")
    df["observed_sd1"] = np.where(two, rng.uniform(3, 9, k).round(1), np.nan)
    df["observed_sd2"] = np.where(two, rng.uniform(3, 9, k).round(1), np.nan)
    df["observed_p"] = np.where(
        rng.uniform(size=k) < 0.5, rng.uniform(0.001, 0.9, k).round(3), np.nan
    )
    df["outcome_family"] = rng.choice(["a", "b", None], k)
    result = audit.audit_table(df.astype(object))
    assert len(result.table) == k
    audited = np.flatnonzero(result.valid)
    assert len(audited) > 100
    notes = result.by_row(result.notes, "text")
    for i in audited:
        row = result.metrics.iloc[i]
        for metric in audit.METRICS:
            if pd.isna(row[metric]):
                assert _explained(metric, notes[i]), (
                    result.table["design"].iat[i],
                    metric,
                    notes[i],
                )
        if row.filter(like="reference_power_").isna().any():
            assert _explained("reference_power", notes[i]), notes[i]
