"""Cluster-randomized two means: design effects (Kish; Eldridge et al.), Bloom's MDES,
statsmodels, facts of the trade."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.optimize import brentq
from statsmodels.stats.power import TTestIndPower

import audit
from audit.designs import DESIGNS, TestSpec
from audit.designs.cluster import design_effect

DESIGN = DESIGNS["cluster_two_means"]


def _spec(n: int, alpha=0.05, sides=2.0, power=0.8, direction=1.0) -> TestSpec:
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), (n,)).copy()  # noqa: E731
    return TestSpec(full(alpha), full(sides), full(power), full(direction))


def _sc(n1, n2, m, icc, cv=0.0, sd=1.0) -> dict[str, np.ndarray]:
    n1 = np.atleast_1d(np.asarray(n1, dtype=float))
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), n1.shape).copy()  # noqa: E731
    return {
        "n1": n1,
        "n2": full(n2),
        "sd": full(sd),
        "icc": full(icc),
        "cluster_size": full(m),
        "cluster_size_cv": full(cv),
    }


# -- design effect --------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "m,icc,expected",
    [(20, 0.05, 1.95), (50, 0.02, 1.98), (10, 0.10, 1.90), (100, 0.01, 1.99), (1, 0.3, 1.0)],
)
def test_kish_design_effect(m, icc, expected):
    # Kish (1965), Survey Sampling, section 5.4: deff = 1 + (m - 1) ICC for equal clusters of m;
    # values evaluated by hand from that formula (a single unit per cluster has no inflation).
    assert design_effect(m, icc) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(
    "m,icc,cv,expected",
    [
        (20, 0.05, 0.5, 2.20),  # 1 + (1.25 * 20 - 1) * 0.05
        (10, 0.10, 0.7, 2.39),  # 1 + (1.49 * 10 - 1) * 0.10
        (30, 0.02, 1.0, 2.18),  # 1 + (2 * 30 - 1) * 0.02
        (20, 0.05, 0.0, 1.95),  # cv = 0 gives Kish's value back
    ],
)
def test_eldridge_design_effect(m, icc, cv, expected):
    # Eldridge, Ashby & Kerry (2006), Int. J. Epidemiol. 35:1292-1300: with unequal cluster
    # sizes of mean m and coefficient of variation cv, deff = 1 + ((cv^2 + 1) m - 1) ICC;
    # values evaluated by hand from that formula.
    assert design_effect(m, icc, cv) == pytest.approx(expected, rel=1e-12)


def test_unequal_cluster_sizes_cost_power():
    # Eldridge et al. (2006): variable cluster sizes inflate the design effect, so power falls.
    effect = np.array([0.3])
    equal = DESIGN.power(_sc(15, 15, 20, 0.05, cv=0.0), effect, _spec(1))[0]
    unequal = DESIGN.power(_sc(15, 15, 20, 0.05, cv=0.6), effect, _spec(1))[0]
    assert unequal < equal


# -- Bloom's minimum detectable effect size ------------------------------------------------------


@pytest.mark.parametrize("clusters", [10, 20, 40, 100])
@pytest.mark.parametrize("m,icc,share", [(20, 0.05, 0.5), (50, 0.15, 0.5), (8, 0.02, 0.4)])
def test_mdes_against_bloom(clusters, m, icc, share):
    # Bloom (2005), "Randomizing groups", eq. for the MDES of a cluster design:
    # MDES = M_{J-2} sqrt(rho / (P(1-P)J) + (1 - rho) / (P(1-P)J n)), with
    # M = t_{alpha/2, J-2} + t_{power, J-2} (central t quantiles), computed here with scipy.
    # The bracket is exactly our SE (in SD units). Bloom's multiplier approximates the
    # noncentral t, which we solve exactly; the two agree within 0.3 % from J = 10 on and
    # within 0.05 % from J = 20.
    j = clusters
    n1 = share * j
    n2 = j - n1
    df = j - 2
    multiplier = stats.t.isf(0.025, df) + stats.t.ppf(0.8, df)
    bracket = np.sqrt(icc / (share * (1 - share) * j) + (1 - icc) / (share * (1 - share) * j * m))
    sc = _sc(n1, n2, m, icc)
    assert DESIGN.se(sc)[0] == pytest.approx(bracket, rel=1e-12)
    mde = DESIGN.mde(sc, _spec(1))[0]
    assert mde == pytest.approx(multiplier * bracket, rel=0.003 if j < 20 else 0.0005)


# -- statsmodels on random parameters -------------------------------------------------------------


def test_power_and_mde_against_statsmodels():
    # The cluster t test is a two-sample t test on n1 + n2 - 2 df whose standardized effect is
    # d sqrt(m / deff): statsmodels TTestIndPower with nobs1 = n1 clusters, ratio = n2 / n1.
    rng = np.random.default_rng(81)
    k = 150
    n1 = rng.integers(2, 60, k).astype(float)
    n2 = np.maximum(np.round(n1 * rng.choice([0.5, 1.0, 1.5, 2.0], k)), 2.0)
    m = rng.uniform(1.0, 80.0, k)
    icc = rng.uniform(0.0, 0.4, k)
    cv = rng.uniform(0.0, 1.0, k)
    sd = rng.uniform(0.5, 20.0, k)
    d = rng.uniform(0.02, 1.0, k)
    alpha = rng.uniform(0.001, 0.2, k)
    sides = rng.integers(1, 3, k).astype(float)
    power = rng.uniform(0.3, 0.95, k)
    sc = _sc(n1, n2, m, icc, cv, sd)
    spec = TestSpec(alpha, sides, power, np.ones(k))
    got = DESIGN.power(sc, d * sd, spec)
    mde = DESIGN.mde(sc, spec) / sd
    ref = TTestIndPower()
    scale = np.sqrt(m / design_effect(m, icc, cv))
    for i in range(k):
        alt = "two-sided" if sides[i] == 2 else "larger"
        kw = {"nobs1": n1[i], "alpha": alpha[i], "ratio": n2[i] / n1[i], "alternative": alt}
        expected = ref.power(effect_size=d[i] * scale[i], **kw)
        if np.isfinite(expected):
            assert got[i] == pytest.approx(expected, rel=1e-6)

        def excess(x, kw=kw, i=i):
            v = ref.power(effect_size=x * scale[i], **kw)
            return 1.0 - power[i] if np.isnan(v) else v - power[i]

        assert mde[i] == pytest.approx(brentq(excess, 1e-9, 100.0, xtol=1e-14), rel=1e-6)


def test_required_clusters_are_the_smallest_reaching_target():
    # Clusters per arm (1:1) from statsmodels' power at the integer counts.
    rng = np.random.default_rng(82)
    k = 40
    m = rng.uniform(5, 60, k)
    icc = rng.uniform(0.01, 0.2, k)
    d = rng.uniform(0.2, 0.8, k)
    total = DESIGN.required_size(_sc(np.full(k, np.nan), np.nan, m, icc), d, _spec(k))
    ref = TTestIndPower()
    for i in range(k):
        per = total[i] / 2
        assert per == int(per)
        es = d[i] * np.sqrt(m[i] / design_effect(m[i], icc[i]))
        assert ref.power(effect_size=es, nobs1=per, alpha=0.05) >= 0.8 - 1e-12
        if per > 2:
            assert ref.power(effect_size=es, nobs1=per - 1, alpha=0.05) < 0.8


# -- facts of the trade ---------------------------------------------------------------------------


@settings(max_examples=60, deadline=None)
@given(
    j=st.integers(min_value=2, max_value=200),
    m=st.floats(min_value=1, max_value=200),
    icc=st.floats(min_value=0.0, max_value=0.5),
    alpha=st.floats(min_value=1e-3, max_value=0.3),
    sides=st.sampled_from([1.0, 2.0]),
)
def test_power_at_zero_effect_is_alpha(j, m, icc, alpha, sides):
    got = DESIGN.power(_sc(j, j, m, icc), np.array([0.0]), _spec(1, alpha, sides))[0]
    assert got == pytest.approx(alpha, rel=1e-7)


@settings(max_examples=60, deadline=None)
@given(
    j=st.integers(min_value=2, max_value=200),
    m=st.floats(min_value=2, max_value=200),
    icc=st.floats(min_value=0.001, max_value=0.5),
    d=st.floats(min_value=0.01, max_value=1.5),
)
def test_power_rises_with_clusters_and_falls_with_icc(j, m, icc, d):
    def pw(j=j, icc=icc):
        return DESIGN.power(_sc(j, j, m, icc), np.array([d]), _spec(1))[0]

    assert pw(j=j + 2) >= pw()
    assert pw(icc=min(icc * 1.3, 0.99)) <= pw()


def test_mde_round_trip_on_random_rows():
    rng = np.random.default_rng(83)
    k = 300
    n1 = rng.integers(2, 100, k).astype(float)
    sc = _sc(
        n1,
        n1 + rng.integers(0, 5, k),
        rng.uniform(1, 100, k),
        rng.uniform(0, 0.5, k),
        rng.uniform(0, 1, k),
        rng.uniform(0.5, 10, k),
    )
    spec = TestSpec(
        rng.uniform(0.001, 0.2, k),
        rng.integers(1, 3, k).astype(float),
        rng.uniform(0.3, 0.95, k),
        rng.choice([-1.0, 1.0], k),
    )
    mde = DESIGN.mde(sc, spec)
    np.testing.assert_allclose(DESIGN.power(sc, mde, spec), spec.power, atol=1e-8)


# -- rows: ratios, fallbacks, replanning -----------------------------------------------------------


def _audit(**cols):
    base = {
        "study_id": "CL",
        "design": "cluster_two_means",
        "planned_effect": 4.0,
        "planned_sd": 10.0,
        "planned_icc": 0.05,
        "planned_cluster_size": 20,
        "planned_n1": 16,
        "planned_n2": 16,
        "realized_n1": 15,
        "realized_n2": 16,
    }
    return audit.audit_table(pd.DataFrame([{**base, **cols}]))


def test_ratios_and_replanning_with_realized_icc():
    r = _audit(realized_icc=0.10, realized_cluster_size=15, realized_sd=11.0)
    m = r.metrics.iloc[0]
    assert m["icc_ratio"] == pytest.approx(2.0)
    assert m["cluster_size_ratio"] == pytest.approx(0.75)
    assert m["sd_ratio"] == pytest.approx(1.1)
    # n_required_realized: the planned cluster size with the realized ICC and SD.
    same = _audit(planned_icc=0.10, planned_sd=11.0)
    assert m["n_required_realized"] == same.metrics.iloc[0]["n_required_plan"]
    assert m["n_required_realized"] > m["n_required_plan"]
    assert m["power_at_planned_effect"] < m["power_if_planned_size"] < m["plan_power"]


def test_blank_realized_icc_and_cluster_size_fall_back_with_notes():
    r = _audit()
    m = r.metrics.iloc[0]
    assert np.isnan(m["icc_ratio"]) and np.isnan(m["cluster_size_ratio"])
    assert np.isfinite(m["power_at_planned_effect"])
    notes = " | ".join(r.notes["text"])
    assert "realized_icc not reported" in notes
    assert "realized_cluster_size not reported" in notes


def test_missing_icc_is_a_note_naming_the_column():
    r = _audit(planned_icc=None)
    assert r.status[0] == "audited"
    assert "plan_power: not computed, missing planned_icc" in list(r.notes["text"])


def test_too_few_clusters_is_a_row_error():
    r = _audit(realized_n1=1, realized_n2=1)
    assert r.status[0] == "invalid"
    assert "realized_n2" in set(r.errors["column"])


def test_very_large_effect_needs_only_the_smallest_design():
    # Where even one cluster per arm (2:1, so 1 + 2, df = 1) reaches the target, that is the
    # required size, rather than "not reachable"; checked with statsmodels at that size.
    sc = _sc(396.0, 792.0, 16.25, 0.149)
    spec = _spec(1, alpha=0.1, sides=1.0)
    d = np.array([3.16])
    assert DESIGN.required_size(sc, d, spec)[0] == 3
    es = d[0] * np.sqrt(16.25 / design_effect(16.25, 0.149))
    got = TTestIndPower().power(effect_size=es, nobs1=1, ratio=2, alpha=0.1, alternative="larger")
    assert got >= 0.8
