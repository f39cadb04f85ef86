"""Two proportions: Fleiss, Levin & Paik's published sizes, statsmodels, facts of the trade."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.proportion import (
    power_proportions_2indep,
    samplesize_proportions_2indep_onetail,
)

import audit
from audit.designs import DESIGNS, TestSpec
from audit.designs.proportions import cohens_h, proportions_power

DESIGN = DESIGNS["two_proportions"]


def _spec(n: int, alpha=0.05, sides=2.0, power=0.8, direction=1.0) -> TestSpec:
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), (n,)).copy()  # noqa: E731
    return TestSpec(full(alpha), full(sides), full(power), full(direction))


def _sc(n1, n2, p1, cc=0.0) -> dict[str, np.ndarray]:
    p1 = np.atleast_1d(np.asarray(p1, dtype=float))
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), p1.shape).copy()  # noqa: E731
    return {"n1": full(n1), "n2": full(n2), "p1": p1, "continuity_correction": full(cc)}


# -- published values -----------------------------------------------------------------------------


@pytest.mark.parametrize("cc,per_group", [(0.0, 199), (1.0, 219)])
def test_fleiss_levin_paik_sizes(cc, per_group):
    # Fleiss, Levin & Paik (2003), Statistical Methods for Rates and Proportions, 3rd ed.,
    # section 4.2: p1 = .10 vs p2 = .20, alpha .05 two-sided, power .80 needs 199 per group
    # without and 219 with the continuity correction.
    got = DESIGN.required_size(_sc(np.nan, np.nan, 0.10, cc), np.array([0.10]), _spec(1))
    assert got[0] == 2 * per_group


def test_fleiss_sizes_through_the_table_api_and_run_default():
    # Same published values end to end: per-row column, and the run default for blank cells.
    df = pd.DataFrame(
        {
            "study_id": ["plain", "corrected", "default"],
            "design": "two_proportions",
            "planned_p1": 0.10,
            "planned_p2": 0.20,
            "planned_n1": 199,
            "planned_n2": 199,
            "continuity_correction": ["no", "yes", None],
        }
    )
    plain = audit.audit_table(df)
    assert plain.metrics["n_required_plan"].tolist() == [398, 438, 398]
    assert plain.settings["continuity_correction_default"] is False
    corrected = audit.audit_table(df, continuity_correction=True)
    assert corrected.metrics["n_required_plan"].tolist() == [398, 438, 438]
    assert corrected.settings["continuity_correction_default"] is True


def test_cohens_h_from_arcsine_table():
    # Cohen (1988), table 6.2.1 (from memory): phi = 2 asin(sqrt(p)) is 0.6435 at .10 and 0.9273
    # at .20, so h = 0.2838; and h = 0.5 corresponds to about .50 vs .74 (his medium effect).
    assert cohens_h(0.10, 0.20) == pytest.approx(0.9273 - 0.6435, abs=1e-4)
    assert cohens_h(0.50, 0.7397) == pytest.approx(0.5, abs=1e-3)


def _fleiss_textbook(p1, p2, r, alpha, sides, power, corrected):
    # The formulas as printed by Fleiss, Levin & Paik (2003), section 4.2, for group sizes n and
    # r n, written out independently of the module (one rejection tail).
    q1, q2 = 1 - p1, 1 - p2
    pbar = (p1 + r * p2) / (r + 1)
    qbar = 1 - pbar
    za = stats.norm.isf(alpha / sides)
    zb = stats.norm.ppf(power)
    d = abs(p2 - p1)
    n = (za * np.sqrt((r + 1) * pbar * qbar) + zb * np.sqrt(r * p1 * q1 + p2 * q2)) ** 2 / (
        r * d * d
    )
    if corrected:
        n = n / 4 * (1 + np.sqrt(1 + 2 * (r + 1) / (n * r * d))) ** 2
    return n


@pytest.mark.parametrize("corrected", [False, True])
def test_power_is_the_exact_inverse_of_the_fleiss_formula(corrected):
    # One-sided tests have a single rejection tail, so the power at Fleiss's (continuous) size
    # must be the target exactly: the corrected power function inverts the corrected formula.
    rng = np.random.default_rng(11)
    for _ in range(300):
        p1 = rng.uniform(0.02, 0.9)
        p2 = rng.uniform(0.02, 0.98)
        if abs(p2 - p1) < 0.01:
            continue
        r = rng.choice([0.5, 1.0, 1.5, 2.0, 3.0])
        alpha = rng.uniform(0.005, 0.1)
        power = rng.uniform(0.5, 0.95)
        n = _fleiss_textbook(p1, p2, r, alpha, 1, power, corrected)
        direction = np.sign(p2 - p1)
        got = proportions_power(n, r * n, p1, p2, alpha, 1, corrected, direction)
        assert got == pytest.approx(power, abs=1e-9)


def test_closed_form_matches_solution_where_far_tail_is_negligible():
    # The exact solution (both tails) and the textbook formula agree to the unit at usual
    # settings (two-sided alpha .05, power .80 / .90), for plain and corrected tests.
    rng = np.random.default_rng(12)
    k = 200
    p1 = rng.uniform(0.05, 0.7, k)
    p2 = np.clip(p1 + rng.choice([-1, 1], k) * rng.uniform(0.05, 0.25, k), 0.01, 0.99)
    r = rng.choice([1.0, 2.0], k)
    power = rng.choice([0.8, 0.9], k)
    cc = rng.choice([0.0, 1.0], k)
    spec = TestSpec(np.full(k, 0.05), np.full(k, 2.0), power, np.sign(p2 - p1))
    got = DESIGN.required_size(_sc(np.ones(k), r, p1, cc), p2 - p1, spec)
    for i in range(k):
        n1 = _fleiss_textbook(p1[i], p2[i], r[i], 0.05, 2, power[i], cc[i] > 0)
        assert got[i] == np.ceil(n1 - 1e-9) + np.ceil(r[i] * n1 - 1e-9)


# -- reference library on random parameters --------------------------------------------------


def test_power_against_statsmodels():
    # statsmodels power_proportions_2indep: pooled variance under H0, unpooled under the
    # alternative, both tails for a two-sided test. Its sample 1 is our group 2 (p2, n2); its
    # reference proportion prop2 is our p1 with nobs2 = ratio * nobs1 = n1.
    rng = np.random.default_rng(21)
    k = 300
    n1 = rng.integers(5, 800, k).astype(float)
    n2 = np.maximum(np.round(n1 * rng.choice([0.5, 1.0, 2.0, 3.0], k)), 2.0)
    p1 = rng.uniform(0.01, 0.95, k)
    p2 = rng.uniform(0.01, 0.95, k)
    alpha = rng.uniform(0.001, 0.2, k)
    sides = rng.integers(1, 3, k).astype(float)
    direction = np.where(p2 < p1, -1.0, 1.0)
    got = DESIGN.power(_sc(n1, n2, p1), p2 - p1, TestSpec(alpha, sides, np.full(k, 0.8), direction))
    for i in range(k):
        alt = "two-sided" if sides[i] == 2 else ("larger" if direction[i] > 0 else "smaller")
        expected = power_proportions_2indep(
            p2[i] - p1[i],
            p1[i],
            n2[i],
            ratio=n1[i] / n2[i],
            alpha=alpha[i],
            alternative=alt,
            return_results=False,
        )
        assert got[i] == pytest.approx(expected, rel=1e-9, abs=1e-12)


def test_closed_form_against_statsmodels_sample_size():
    # statsmodels samplesize_proportions_2indep_onetail evaluates the same one-tail formula.
    from audit.designs.proportions import fleiss_n1

    rng = np.random.default_rng(22)
    for _ in range(100):
        p1, p2 = rng.uniform(0.02, 0.95, 2)
        if abs(p2 - p1) < 0.01:
            continue
        r = rng.choice([0.5, 1.0, 2.0])
        alpha = rng.uniform(0.01, 0.1)
        power = rng.uniform(0.5, 0.95)
        # statsmodels: nobs1 is the sample with proportion p2 (our group 2, size r * n1).
        n_sm = samplesize_proportions_2indep_onetail(
            p2 - p1, p1, power, ratio=1 / r, alpha=alpha, alternative="two-sided"
        )
        n1 = fleiss_n1(p1, p2, r, alpha, 2, power, False)
        assert r * n1 == pytest.approx(n_sm, rel=1e-9)


def test_required_size_is_the_smallest_reaching_target():
    # Checked with statsmodels' power at the integer sizes (1:1, uncorrected): the returned
    # size reaches the target and one unit fewer per group does not.
    rng = np.random.default_rng(23)
    k = 60
    p1 = rng.uniform(0.05, 0.6, k)
    p2 = p1 + rng.uniform(0.05, 0.3, k)
    alpha = rng.uniform(0.01, 0.1, k)
    sides = rng.integers(1, 3, k).astype(float)
    power = rng.uniform(0.5, 0.95, k)
    total = DESIGN.required_size(
        _sc(np.nan, np.nan, p1), p2 - p1, TestSpec(alpha, sides, power, np.ones(k))
    )
    for i in range(k):
        alt = "two-sided" if sides[i] == 2 else "larger"
        per = total[i] / 2
        assert per == int(per)

        def at(n, i=i, alt=alt):
            return power_proportions_2indep(
                p2[i] - p1[i], p1[i], n, alpha=alpha[i], alternative=alt, return_results=False
            )

        assert at(per) >= power[i] - 1e-12
        assert at(per - 1) < power[i]


# -- facts of the trade (common practice) ------------------------------------------------------


@settings(max_examples=80, deadline=None)
@given(
    n=st.integers(min_value=2, max_value=5000),
    ratio=st.sampled_from([0.5, 1.0, 2.0]),
    p=st.floats(min_value=0.01, max_value=0.99),
    alpha=st.floats(min_value=1e-4, max_value=0.3),
    sides=st.sampled_from([1.0, 2.0]),
)
def test_power_at_zero_effect_is_alpha_and_below_with_correction(n, ratio, p, alpha, sides):
    # The uncorrected test has size alpha; the continuity correction makes it conservative.
    plain = proportions_power(n, n * ratio, p, p, alpha, sides, False)
    corrected = proportions_power(n, n * ratio, p, p, alpha, sides, True)
    assert plain == pytest.approx(alpha, rel=1e-9)
    assert corrected < alpha


@settings(max_examples=80, deadline=None)
@given(
    n=st.integers(min_value=5, max_value=3000),
    p1=st.floats(min_value=0.05, max_value=0.6),
    diff=st.floats(min_value=0.02, max_value=0.3),
    alpha=st.floats(min_value=1e-3, max_value=0.2),
    cc=st.sampled_from([0.0, 1.0]),
)
def test_power_rises_with_n_effect_and_alpha(n, p1, diff, alpha, cc):
    def pw(n=n, diff=diff, alpha=alpha):
        return proportions_power(n, n, p1, p1 + diff, alpha, 2, cc)

    base = pw()
    assert pw(n=n + 10) >= base
    assert pw(diff=diff * 1.1) >= base
    assert pw(alpha=min(alpha * 1.5, 0.45)) >= base


def test_mde_round_trip_on_random_rows():
    # Each MDE fed back into the power function gives the target power.
    rng = np.random.default_rng(31)
    k = 400
    n1 = rng.integers(10, 2000, k).astype(float)
    n2 = np.round(n1 * rng.choice([0.5, 1.0, 2.0], k))
    p1 = rng.uniform(0.02, 0.9, k)
    cc = rng.choice([0.0, 1.0], k)
    spec = TestSpec(
        rng.uniform(0.005, 0.1, k),
        rng.integers(1, 3, k).astype(float),
        rng.uniform(0.5, 0.95, k),
        rng.choice([-1.0, 1.0], k),
    )
    sc = _sc(n1, n2, p1, cc)
    mde = DESIGN.mde(sc, spec)
    reached = np.isfinite(mde)
    assert reached.mean() > 0.9
    assert np.all(np.sign(mde[reached]) == spec.direction[reached])
    back = DESIGN.power(sc, mde, spec)
    np.testing.assert_allclose(back[reached], spec.power[reached], atol=1e-8)
    # Where no MDE exists, even the largest difference in the planned direction falls short.
    room = np.where(spec.direction > 0, 1 - p1, -p1)
    at_edge = DESIGN.power(sc, room, spec)
    assert np.all(at_edge[~reached] < spec.power[~reached])


def test_mde_std_is_cohens_h_of_the_mde():
    sc = _sc(150.0, 150.0, 0.3)
    spec = _spec(1)
    mde = DESIGN.mde(sc, spec)
    assert DESIGN.standardize(sc, mde)[0] == pytest.approx(cohens_h(0.3, 0.3 + mde[0])[()])


# -- rows: realized control rate, validation, notes ---------------------------------------------


def _audit(**cols):
    base = {"study_id": "P", "design": "two_proportions"}
    return audit.audit_table(pd.DataFrame([{**base, **cols}]))


def test_realized_control_rate_drives_realized_metrics():
    # The planned risk difference (+0.10) sits on the realized control rate (0.30): power equals
    # the power of 0.30 vs 0.40, and n_required_realized is the size for 0.30 vs 0.40.
    r = _audit(
        planned_p1=0.10,
        planned_p2=0.20,
        realized_p1=0.30,
        planned_n1=199,
        planned_n2=199,
        realized_n1=190,
        realized_n2=185,
    )
    m = r.metrics.iloc[0]
    assert m["power_at_planned_effect"] == pytest.approx(
        proportions_power(190, 185, 0.30, 0.40, 0.05, 2, False)[()]
    )
    fresh = _audit(planned_p1=0.30, planned_p2=0.40, planned_n1=1, planned_n2=1)
    assert m["n_required_realized"] == fresh.metrics.iloc[0]["n_required_plan"]
    assert m["n_required_realized"] > m["n_required_plan"]


def test_blank_realized_control_rate_falls_back_with_note():
    r = _audit(
        planned_p1=0.1,
        planned_p2=0.2,
        planned_n1=199,
        planned_n2=199,
        realized_n1=199,
        realized_n2=199,
    )
    assert r.metrics.iloc[0]["power_at_planned_effect"] == pytest.approx(
        r.metrics.iloc[0]["plan_power"]
    )
    assert any("realized_p1 not reported" in t for t in r.notes["text"])


def test_realized_rate_outside_range_gives_null_with_reason():
    r = _audit(
        planned_p1=0.10,
        planned_p2=0.02,
        realized_p1=0.05,
        planned_n1=300,
        planned_n2=300,
        realized_n1=300,
        realized_n2=300,
    )
    assert np.isnan(r.metrics.iloc[0]["power_at_planned_effect"])
    assert any(
        t.startswith("power_at_planned_effect:") and "outside [0, 1]" in t for t in r.notes["text"]
    )
    # The MDE is still defined: a risk difference downwards from 0.05 that can be detected.
    assert -0.05 < r.metrics.iloc[0]["mde"] < 0


def test_planned_effect_may_stand_in_for_p2():
    a = _audit(planned_p1=0.1, planned_effect=0.1, planned_n1=199, planned_n2=199)
    assert a.metrics.iloc[0]["n_required_plan"] == 398


@pytest.mark.parametrize(
    "cols,column",
    [
        ({"planned_p1": 0.1, "planned_p2": 0.2, "planned_effect": 0.2}, "planned_effect"),
        ({"planned_p1": 0.9, "planned_effect": 0.2}, "planned_effect"),
        ({"planned_p1": 0.1, "planned_p2": 0.2, "sesoi": 1.5}, "sesoi"),
        ({"planned_p1": 0.1, "planned_p2": 0.2, "continuity_correction": "maybe"}, None),
    ],
)
def test_bad_cells_are_row_errors(cols, column):
    r = _audit(**cols, planned_n1=100, planned_n2=100)
    assert r.status[0] == "invalid"
    column = column or "continuity_correction"
    assert column in set(r.errors["column"])
    if column == "continuity_correction":
        assert "maybe" in set(r.errors["value"])


@pytest.mark.parametrize("text,expected", [("TRUE", 438), ("0", 398), ("Yes", 438), ("n", 398)])
def test_continuity_correction_spellings(text, expected):
    r = _audit(
        planned_p1=0.1, planned_p2=0.2, planned_n1=199, planned_n2=199, continuity_correction=text
    )
    assert r.metrics.iloc[0]["n_required_plan"] == expected
