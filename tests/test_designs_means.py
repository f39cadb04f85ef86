"""Mean designs and the generic estimate: published tables, statsmodels, facts of the trade."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.optimize import brentq
from statsmodels.stats.power import TTestIndPower, TTestPower

import audit
from audit.designs import DESIGNS, TestSpec


def _spec(n: int, alpha=0.05, sides=2.0, power=0.8, direction=1.0) -> TestSpec:
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), (n,)).copy()  # noqa: E731
    return TestSpec(full(alpha), full(sides), full(power), full(direction))


def _two_means(n1, n2, sd=1.0, covariates=0.0, r2=0.0) -> dict[str, np.ndarray]:
    n1 = np.atleast_1d(np.asarray(n1, dtype=float))
    k = len(n1)
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), (k,)).copy()  # noqa: E731
    return {
        "n1": n1,
        "n2": full(n2),
        "sd": full(sd),
        "covariates": full(covariates),
        "covariate_r2": full(r2),
    }


# -- published values -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    "d,per_group_exact,total", [(0.2, 393.4, 788), (0.5, 63.8, 128), (0.8, 25.5, 52)]
)
def test_cohen_two_sample_sizes(d, per_group_exact, total):
    # Cohen (1988), Statistical Power Analysis, table 2.4.1: n per group 393 / 64 / 26 for
    # d = 0.2 / 0.5 / 0.8, alpha .05 two-sided, power .80. The exact noncentral t needs
    # 393.4 / 63.8 / 25.5 per group; Cohen's table rounds to the nearest unit (393), whereas a
    # sample size is rounded up (394) so that the power is at least the target. Hence 788 / 128 /
    # 52 in all.
    design = DESIGNS["two_means"]
    sc = _two_means(np.nan, np.nan)
    got = design.required_size(sc, np.array([d]), _spec(1))
    assert got[0] == total
    # The continuous solution is the one quoted above (to one decimal).
    n1 = per_group_exact
    power_at = TTestIndPower().power(effect_size=d, nobs1=n1, alpha=0.05, ratio=1.0)
    assert power_at == pytest.approx(0.80, abs=0.002)


def test_cohen_sizes_through_the_table_api():
    # Same check as above, end to end through audit_table and n_required_plan.
    df = pd.DataFrame(
        {
            "study_id": ["d2", "d5", "d8"],
            "design": "two_means",
            "effect_scale": "d",
            "planned_effect": [0.2, 0.5, 0.8],
            "planned_n1": [394, 64, 26],
            "planned_n2": [394, 64, 26],
            "realized_n1": [394, 64, 26],
            "realized_n2": [394, 64, 26],
        }
    )
    result = audit.audit_table(df)
    assert result.metrics["n_required_plan"].tolist() == [788, 128, 52]
    assert result.metrics["plan_discrepancy"].tolist() == pytest.approx([0, 0, 0])


def test_bloom_multiplier_for_estimate_rows():
    # Bloom (1995): MDE = 2.80 SE two-sided and 2.49 SE one-sided at alpha .05, power .80,
    # large df (normal). An estimate row with SE = 1 has exactly that MDE.
    df = pd.DataFrame(
        {
            "study_id": ["two", "one", "t"],
            "design": "estimate",
            "realized_se": [1.0, 1.0, 1.0],
            "sides": [2, 1, 2],
            "df": [None, None, 1e6],
            # A one-sided test needs a direction (issue 13); blank for the two-sided rows.
            "direction": [None, "increase", None],
        }
    )
    mde = audit.audit_table(df).metrics["mde"].to_numpy()
    assert mde[0] == pytest.approx(2.80, abs=0.005)
    assert mde[1] == pytest.approx(2.49, abs=0.005)
    assert mde[2] == pytest.approx(2.80, abs=0.005)


def test_ancova_reduction_matches_borm():
    # Borm, Fransen & Lemmens (2007): adjusting for a baseline covariate with correlation rho
    # multiplies the required size by about (1 - rho^2) (plus one df). For d = 0.5, rho = 0.5
    # the unadjusted 128 becomes about 0.75 * 128 = 96.
    design = DESIGNS["two_means"]
    adjusted = design.required_size(
        _two_means(np.nan, np.nan, covariates=1, r2=0.25), np.array([0.5]), _spec(1)
    )[0]
    assert 96 <= adjusted <= 100


def test_ancova_power_against_direct_noncentral_t():
    # Independent computation with scipy: ncp = delta / (sd sqrt(1 - R^2) sqrt(1/n1 + 1/n2)),
    # df = n1 + n2 - 2 - q, both tails.
    design = DESIGNS["two_means"]
    n1, n2, sd, q, r2, delta = 40.0, 55.0, 9.0, 3.0, 0.3, 4.0
    got = design.power(_two_means(n1, n2, sd, q, r2), np.array([delta]), _spec(1))[0]
    ncp = delta / (sd * np.sqrt(1 - r2) * np.sqrt(1 / n1 + 1 / n2))
    df = n1 + n2 - 2 - q
    c = stats.t.isf(0.025, df)
    expected = stats.nct.sf(c, df, ncp) + stats.nct.cdf(-c, df, ncp)
    assert got == pytest.approx(expected, rel=1e-9)


# -- reference library on random parameters ----------------------------------------------


def _random_two_means(rng, k):
    n1 = rng.integers(3, 300, k).astype(float)
    ratio = rng.choice([0.5, 1.0, 1.0, 1.5, 2.0, 3.0], k)
    n2 = np.maximum(np.round(n1 * ratio), 2.0)
    d = rng.uniform(0.02, 1.2, k)
    alpha = rng.uniform(0.001, 0.2, k)
    sides = rng.integers(1, 3, k).astype(float)
    power = rng.uniform(0.3, 0.97, k)
    sd = rng.uniform(0.5, 40.0, k)
    return n1, n2, d, alpha, sides, power, sd


def test_two_means_power_and_mde_against_statsmodels():
    # statsmodels TTestIndPower (pooled two-sample t, df = n1 + n2 - 2) on 200 random settings.
    rng = np.random.default_rng(42)
    k = 200
    n1, n2, d, alpha, sides, power, sd = _random_two_means(rng, k)
    design = DESIGNS["two_means"]
    sc = _two_means(n1, n2, sd)
    spec = TestSpec(alpha, sides, power, np.ones(k))
    got_power = design.power(sc, d * sd, spec)
    got_mde = design.mde(sc, spec) / sd
    ref = TTestIndPower()
    for i in range(k):
        alt = "two-sided" if sides[i] == 2 else "larger"
        kw = {"nobs1": n1[i], "alpha": alpha[i], "ratio": n2[i] / n1[i], "alternative": alt}
        expected = ref.power(effect_size=d[i], **kw)
        if np.isfinite(expected):  # statsmodels is nan where power is ~1 (see test_power)
            assert got_power[i] == pytest.approx(expected, rel=1e-6)
        else:
            assert got_power[i] == pytest.approx(1.0, abs=1e-9)

        def excess(x, kw=kw, i=i):
            v = ref.power(effect_size=x, **kw)
            return 1.0 - power[i] if np.isnan(v) else v - power[i]

        root = brentq(excess, 1e-9, 5.0, xtol=1e-15, rtol=1e-14)
        assert got_mde[i] == pytest.approx(root, rel=1e-6)


@pytest.mark.parametrize("name", ["one_mean", "paired_means"])
def test_one_group_power_and_mde_against_statsmodels(name):
    # statsmodels TTestPower (one-sample / paired t, df = n - 1) on 200 random settings.
    rng = np.random.default_rng(99 if name == "one_mean" else 100)
    k = 200
    n = rng.integers(2, 400, k).astype(float)
    d = rng.uniform(0.02, 1.5, k)
    alpha = rng.uniform(0.001, 0.2, k)
    sides = rng.integers(1, 3, k).astype(float)
    power = rng.uniform(0.3, 0.97, k)
    sd = rng.uniform(0.1, 20.0, k)
    design = DESIGNS[name]
    sc = {"n1": n, "sd": sd}
    spec = TestSpec(alpha, sides, power, np.ones(k))
    got_power = design.power(sc, d * sd, spec)
    got_mde = design.mde(sc, spec) / sd
    ref = TTestPower()
    for i in range(k):
        alt = "two-sided" if sides[i] == 2 else "larger"
        kw = {"nobs": n[i], "alpha": alpha[i], "alternative": alt}
        expected = ref.power(effect_size=d[i], **kw)
        if np.isfinite(expected):
            assert got_power[i] == pytest.approx(expected, rel=1e-6)

        def excess(x, kw=kw, i=i):
            v = ref.power(effect_size=x, **kw)
            return 1.0 - power[i] if np.isnan(v) else v - power[i]

        root = brentq(excess, 1e-9, 60.0, xtol=1e-15, rtol=1e-14)
        assert got_mde[i] == pytest.approx(root, rel=1e-6)


def test_estimate_against_statsmodels_normal_and_t():
    # A t-based estimate with df equals a one-sample t with n = df + 1 and d = ncp / sqrt(n)
    # (statsmodels TTestPower); with df blank it is the normal test (ncp = effect / se).
    rng = np.random.default_rng(5)
    k = 200
    se = rng.uniform(0.01, 5.0, k)
    effect = se * rng.uniform(0.05, 5.0, k)
    df = np.where(rng.uniform(size=k) < 0.5, np.inf, rng.integers(2, 300, k).astype(float))
    alpha = rng.uniform(0.001, 0.2, k)
    sides = rng.integers(1, 3, k).astype(float)
    design = DESIGNS["estimate"]
    got = design.power(
        {"se": se, "df": df}, effect, TestSpec(alpha, sides, np.full(k, 0.8), np.ones(k))
    )
    ref = TTestPower()
    for i in range(k):
        ncp = effect[i] / se[i]
        if np.isinf(df[i]):
            z = stats.norm.isf(alpha[i] / sides[i])
            expected = stats.norm.sf(z - ncp) + (sides[i] == 2) * stats.norm.cdf(-z - ncp)
        else:
            nobs = df[i] + 1
            alt = "two-sided" if sides[i] == 2 else "larger"
            expected = ref.power(
                effect_size=ncp / np.sqrt(nobs), nobs=nobs, alpha=alpha[i], alternative=alt
            )
            if np.isnan(expected):
                continue
        assert got[i] == pytest.approx(expected, rel=1e-6)


def test_required_size_is_the_smallest_reaching_target():
    # Checked with statsmodels' power function at the integer sizes: the returned size reaches
    # the target and one unit fewer per group (1:1) does not.
    rng = np.random.default_rng(8)
    k = 60
    d = rng.uniform(0.15, 1.2, k)
    alpha = rng.uniform(0.01, 0.1, k)
    sides = rng.integers(1, 3, k).astype(float)
    power = rng.uniform(0.5, 0.95, k)
    design = DESIGNS["two_means"]
    total = design.required_size(
        _two_means(np.full(k, np.nan), np.nan), d, TestSpec(alpha, sides, power, np.ones(k))
    )
    ref = TTestIndPower()
    for i in range(k):
        alt = "two-sided" if sides[i] == 2 else "larger"
        per = total[i] / 2
        assert per == int(per)
        at = ref.power(effect_size=d[i], nobs1=per, alpha=alpha[i], alternative=alt)
        below = ref.power(effect_size=d[i], nobs1=per - 1, alpha=alpha[i], alternative=alt)
        assert at >= power[i] - 1e-12
        assert below < power[i]


def test_required_size_keeps_allocation():
    # 2:1 allocation (n2 = 2 n1) at d = 0.5: each group rounded up from the continuous
    # solution, checked with statsmodels TTestIndPower(ratio=2).
    design = DESIGNS["two_means"]
    total = design.required_size(_two_means(50.0, 100.0), np.array([0.5]), _spec(1))[0]
    n1 = TTestIndPower().solve_power(effect_size=0.5, alpha=0.05, power=0.8, ratio=2.0)
    assert total == np.ceil(n1) + np.ceil(2 * n1)


def test_negative_planned_effect_one_sided_direction():
    # A one-sided test in the direction of a negative planned effect: power at -delta equals
    # the power at +delta of the mirror study, and the MDE carries the planned sign.
    design = DESIGNS["one_mean"]
    sc = {"n1": np.array([30.0, 30.0]), "sd": np.array([5.0, 5.0])}
    spec = TestSpec(np.full(2, 0.05), np.full(2, 1.0), np.full(2, 0.8), np.array([-1.0, 1.0]))
    p = design.power(sc, np.array([-2.0, 2.0]), spec)
    assert p[0] == pytest.approx(p[1], rel=1e-12)
    m = design.mde(sc, spec)
    assert m[0] == pytest.approx(-m[1], rel=1e-12) and m[0] < 0


# -- facts of the trade (common practice), as properties ---------------------------------------


_sizes = st.integers(min_value=3, max_value=2000)
_effects = st.floats(min_value=0.01, max_value=2.0)
_alphas = st.floats(min_value=1e-4, max_value=0.3)
_sds = st.floats(min_value=0.1, max_value=100.0)


def _power_two_means(n, effect, alpha, sd, sides=2.0):
    design = DESIGNS["two_means"]
    return design.power(
        _two_means(float(n), float(n), sd),
        np.array([effect * sd]),
        _spec(1, alpha=alpha, sides=sides),
    )[0]


@settings(max_examples=60, deadline=None)
@given(n=_sizes, effect=_effects, alpha=_alphas, sd=_sds)
def test_power_rises_with_n(n, effect, alpha, sd):
    assert _power_two_means(n + 5, effect, alpha, sd) >= _power_two_means(n, effect, alpha, sd)


@settings(max_examples=60, deadline=None)
@given(n=_sizes, effect=_effects, alpha=_alphas, sd=_sds)
def test_power_rises_with_effect(n, effect, alpha, sd):
    assert _power_two_means(n, effect * 1.1, alpha, sd) >= _power_two_means(n, effect, alpha, sd)


@settings(max_examples=60, deadline=None)
@given(n=_sizes, effect=_effects, alpha=_alphas, sd=_sds)
def test_power_rises_with_alpha(n, effect, alpha, sd):
    assert _power_two_means(n, effect, min(alpha * 1.5, 0.45), sd) >= _power_two_means(
        n, effect, alpha, sd
    )


@settings(max_examples=60, deadline=None)
@given(n=_sizes, raw_effect=st.floats(min_value=0.01, max_value=20.0), alpha=_alphas, sd=_sds)
def test_power_falls_with_sd(n, raw_effect, alpha, sd):
    design = DESIGNS["two_means"]

    def at(s):
        return design.power(
            _two_means(float(n), float(n), s),
            np.array([raw_effect]),
            _spec(1, alpha=alpha),
        )[0]

    assert at(sd * 1.2) <= at(sd)


@settings(max_examples=60, deadline=None)
@given(n=_sizes, alpha=_alphas, sd=_sds)
def test_one_sided_power_at_zero_effect_is_alpha(n, alpha, sd):
    assert _power_two_means(n, 0.0, alpha, sd, sides=1.0) == pytest.approx(alpha, rel=1e-9)


@settings(max_examples=60, deadline=None)
@given(
    n=_sizes,
    alpha=st.floats(min_value=1e-4, max_value=0.2),
    power=st.floats(min_value=0.25, max_value=0.99),
    sides=st.sampled_from([1.0, 2.0]),
)
def test_mde_round_trip(n, alpha, power, sides):
    # The MDE fed back into the power function gives the target power.
    design = DESIGNS["two_means"]
    sc = _two_means(float(n), float(n + 3), 7.0)
    spec = _spec(1, alpha=alpha, sides=sides, power=power)
    mde = design.mde(sc, spec)
    assert design.power(sc, mde, spec)[0] == pytest.approx(power, abs=1e-8)
