"""F-test designs (k means, regression): Cohen's tables, statsmodels, facts of the trade."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import brentq
from statsmodels.stats.power import FTestAnovaPower, ftest_anova_power, ftest_power

import audit
from audit.designs import DESIGNS, TestSpec

KMEANS = DESIGNS["k_means"]
REGRESSION = DESIGNS["regression"]


def _spec(n: int, alpha=0.05, power=0.8) -> TestSpec:
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), (n,)).copy()  # noqa: E731
    return TestSpec(full(alpha), full(2.0), full(power), full(1.0))


def _nan_is_one(value: float) -> float:
    # statsmodels' noncentral F tail returns nan where the power is 1 to machine precision
    # (very large noncentralities); a root search on it needs the value it stands for.
    return 1.0 if np.isnan(value) else value


# -- k means --------------------------------------------------------------------------------------


def test_k_means_f_025_three_groups_against_statsmodels_and_cohen():
    # f = 0.25, k = 3, alpha .05, power .80. statsmodels FTestAnovaPower solves N* = 157.19
    # (52.40 per group); rounded up to equal groups that is 3 x 53 = 159 (computed with
    # statsmodels). Cohen (1988) table 8.4.4 prints 52 per group (from memory): his table rounds
    # to the nearest unit, one below our rounded-up size.
    n_star = FTestAnovaPower().solve_power(
        effect_size=0.25, nobs=None, alpha=0.05, power=0.8, k_groups=3
    )
    assert n_star == pytest.approx(157.19, abs=0.01)
    got = KMEANS.required_size(
        {"n1": np.array([np.nan]), "groups": np.array([3.0])}, np.array([0.25]), _spec(1)
    )
    assert got[0] == 3 * np.ceil(n_star / 3) == 159
    assert round(n_star / 3) == 52


@pytest.mark.parametrize(
    "f,k,cohen_per_group",
    [(0.10, 3, 322), (0.40, 3, 21), (0.10, 4, 274), (0.25, 4, 45), (0.40, 4, 18)],
)
def test_k_means_sizes_near_cohens_table(f, k, cohen_per_group):
    # Cohen (1988), table 8.4.4, alpha .05, power .80 (values from memory): per-group n. Our
    # size is the continuous solution rounded up, so it is Cohen's value or one more.
    got = KMEANS.required_size(
        {"n1": np.array([np.nan]), "groups": np.array([float(k)])}, np.array([f]), _spec(1)
    )
    per_group = got[0] / k
    assert per_group in (cohen_per_group, cohen_per_group + 1)
    # and it is the smallest equal-group size reaching the target (computed with statsmodels)
    assert ftest_anova_power(f, per_group * k, 0.05, k_groups=k) >= 0.8
    assert ftest_anova_power(f, (per_group - 1) * k, 0.05, k_groups=k) < 0.8


def test_k_means_power_and_mde_against_statsmodels():
    # statsmodels ftest_anova_power: lambda = f^2 N on (k - 1, N - k) df, random settings.
    rng = np.random.default_rng(51)
    m = 150
    k = rng.integers(2, 8, m).astype(float)
    n = k + rng.integers(1, 400, m)
    f = rng.uniform(0.02, 0.8, m)
    alpha = rng.uniform(0.001, 0.2, m)
    power = rng.uniform(0.3, 0.97, m)
    spec = TestSpec(alpha, np.full(m, 2.0), power, np.ones(m))
    sc = {"n1": n, "groups": k}
    got = KMEANS.power(sc, f, spec)
    mde = KMEANS.mde(sc, spec)
    for i in range(m):
        expected = ftest_anova_power(f[i], n[i], alpha[i], k_groups=k[i])
        assert got[i] == pytest.approx(expected, rel=1e-7, abs=1e-12)
        root = brentq(
            lambda x, i=i: (
                _nan_is_one(ftest_anova_power(x, n[i], alpha[i], k_groups=k[i])) - power[i]
            ),
            1e-6,
            50.0,
            xtol=1e-14,
        )
        assert mde[i] == pytest.approx(root, rel=1e-6)


def test_k_means_required_size_on_random_settings():
    # The equal-group size reaches the target and one fewer per group does not (statsmodels).
    rng = np.random.default_rng(52)
    m = 60
    k = rng.integers(2, 7, m).astype(float)
    f = rng.uniform(0.1, 0.8, m)
    alpha = rng.uniform(0.01, 0.1, m)
    power = rng.uniform(0.5, 0.95, m)
    total = KMEANS.required_size(
        {"n1": np.full(m, np.nan), "groups": k},
        f,
        TestSpec(alpha, np.full(m, 2.0), power, np.ones(m)),
    )
    for i in range(m):
        per = total[i] / k[i]
        assert per == int(per)
        assert ftest_anova_power(f[i], total[i], alpha[i], k_groups=k[i]) >= power[i] - 1e-12
        if per > 2:
            below = ftest_anova_power(f[i], total[i] - k[i], alpha[i], k_groups=k[i])
            assert below < power[i]


# -- regression -----------------------------------------------------------------------------------


def _reg(n, u, q=0.0):
    n = np.atleast_1d(np.asarray(n, dtype=float))
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), n.shape).copy()  # noqa: E731
    return {"n1": n, "predictors": full(u), "covariates": full(q)}


def test_regression_power_mde_size_against_statsmodels():
    # statsmodels ftest_power(f, df2, df1, alpha, ncc) has lambda = f^2 (df2 + df1 + ncc); with
    # df1 = u, df2 = N - u - q - 1 and ncc = q + 1 that is f^2 N, Cohen's lambda for f^2 of u
    # predictors next to q covariates (computed with statsmodels, random settings).
    rng = np.random.default_rng(61)
    m = 150
    u = rng.integers(1, 6, m).astype(float)
    q = rng.integers(0, 6, m).astype(float)
    n = u + q + 1 + rng.integers(1, 500, m)
    f2 = rng.uniform(0.005, 0.6, m)
    alpha = rng.uniform(0.001, 0.2, m)
    power = rng.uniform(0.3, 0.97, m)
    spec = TestSpec(alpha, np.full(m, 2.0), power, np.ones(m))
    sc = _reg(n, u, q)
    got = REGRESSION.power(sc, f2, spec)
    mde = REGRESSION.mde(sc, spec)
    need = REGRESSION.required_size(sc, f2, spec)

    def ref(x, total, i):
        return ftest_power(np.sqrt(x), total - u[i] - q[i] - 1, u[i], alpha[i], ncc=q[i] + 1)

    for i in range(m):
        assert got[i] == pytest.approx(ref(f2[i], n[i], i), rel=1e-7, abs=1e-12)
        root = brentq(
            lambda x, i=i: _nan_is_one(ref(x, n[i], i)) - power[i], 1e-8, 100.0, xtol=1e-15
        )
        assert mde[i] == pytest.approx(root, rel=1e-6)
        assert ref(f2[i], need[i], i) >= power[i] - 1e-12
        if need[i] - 1 > u[i] + q[i] + 1:
            assert ref(f2[i], need[i] - 1, i) < power[i]


def test_regression_covariates_cost_denominator_df():
    # Common practice: at fixed f^2 and N, each covariate costs one error df, so power falls.
    f2 = np.array([0.15])
    powers = [REGRESSION.power(_reg(40, 3, q), f2, _spec(1))[0] for q in (0, 2, 5, 10)]
    assert powers == sorted(powers, reverse=True)
    assert powers[0] > powers[-1]


# -- both: facts of the trade and the round trip -------------------------------------------------


@settings(max_examples=60, deadline=None)
@given(
    n=st.integers(min_value=10, max_value=3000),
    k=st.integers(min_value=2, max_value=8),
    alpha=st.floats(min_value=1e-4, max_value=0.3),
)
def test_power_at_zero_effect_is_alpha(n, k, alpha):
    spec = _spec(1, alpha)
    zero = np.array([0.0])
    sc = {"n1": np.array([float(n)]), "groups": np.array([float(k)])}
    assert KMEANS.power(sc, zero, spec)[0] == pytest.approx(alpha, rel=1e-9)
    assert REGRESSION.power(_reg(float(n), k - 1, 1), zero, spec)[0] == pytest.approx(
        alpha, rel=1e-9
    )


@settings(max_examples=60, deadline=None)
@given(
    n=st.integers(min_value=10, max_value=3000),
    f=st.floats(min_value=0.01, max_value=1.0),
    alpha=st.floats(min_value=1e-4, max_value=0.3),
)
def test_power_rises_with_n_effect_and_alpha(n, f, alpha):
    def pw(n=n, f=f, alpha=alpha):
        sc = {"n1": np.array([float(n)]), "groups": np.array([3.0])}
        return KMEANS.power(sc, np.array([f]), _spec(1, alpha))[0]

    assert pw(n=n + 6) >= pw()
    assert pw(f=f * 1.1) >= pw()
    assert pw(alpha=min(alpha * 1.5, 0.45)) >= pw()


@pytest.mark.parametrize("name", ["k_means", "regression"])
def test_mde_round_trip_on_random_rows(name):
    rng = np.random.default_rng(71)
    m = 300
    groups = rng.integers(2, 8, m).astype(float)
    n = groups + 2 + rng.integers(1, 2000, m)
    sc = {"n1": n, "groups": groups, "predictors": groups - 1, "covariates": np.ones(m)}
    spec = TestSpec(
        rng.uniform(0.001, 0.2, m), np.full(m, 2.0), rng.uniform(0.3, 0.97, m), np.ones(m)
    )
    design = DESIGNS[name]
    mde = design.mde(sc, spec)
    assert np.all(mde > 0)
    np.testing.assert_allclose(design.power(sc, mde, spec), spec.power, atol=1e-8)


# -- rows -----------------------------------------------------------------------------------------


def _audit(**cols):
    return audit.audit_table(pd.DataFrame([{"study_id": "F", **cols}]))


def test_se_metrics_not_applicable_with_reason():
    r = _audit(design="k_means", planned_effect=0.25, groups=3, planned_n1=159, realized_n1=150)
    m = r.metrics.iloc[0]
    assert np.isnan(m["se_plan"]) and np.isnan(m["precision_ratio"])
    assert any(t.startswith("se_plan: not applicable") for t in r.notes["text"])
    assert m["n_required_plan"] == 159 and m["plan_discrepancy"] == 0
    assert m["mde_std"] == m["mde"]


def test_missing_groups_or_predictors_are_notes_not_errors():
    r = audit.audit_table(
        pd.DataFrame(
            [
                {"study_id": "K", "design": "k_means", "planned_effect": 0.25, "planned_n1": 90},
                {"study_id": "R", "design": "regression", "planned_effect": 0.1, "planned_n1": 90},
            ]
        )
    )
    assert list(r.status) == ["audited", "audited"]
    notes = list(r.notes["text"])
    assert "plan_power: not computed, missing groups" in notes
    assert "plan_power: not computed, missing predictors" in notes


@pytest.mark.parametrize(
    "cols,column",
    [
        ({"design": "k_means", "groups": 4, "planned_n1": 4}, "planned_n1"),
        ({"design": "k_means", "groups": 3, "sides": 1}, "sides"),
        ({"design": "k_means", "groups": 3, "planned_effect": -0.2}, "planned_effect"),
        (
            {"design": "regression", "predictors": 3, "covariates": 5, "realized_n1": 9},
            "realized_n1",
        ),
    ],
)
def test_bad_cells_are_row_errors(cols, column):
    row = {"planned_effect": 0.2, "planned_n1": 60, "realized_n1": 60, **cols}
    r = _audit(**row)
    assert r.status[0] == "invalid"
    assert column in set(r.errors["column"])
