"""Survival (hazard ratio, Schoenfeld): published event counts, statsmodels, facts of the trade."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.power import NormalIndPower

import audit
from audit.designs import DESIGNS, TestSpec
from audit.designs.survival import schoenfeld_events

DESIGN = DESIGNS["survival"]


def _spec(n: int, alpha=0.05, sides=2.0, power=0.8, direction=-1.0) -> TestSpec:
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), (n,)).copy()  # noqa: E731
    return TestSpec(full(alpha), full(sides), full(power), full(direction))


def _sc(events, share=0.5, n=1000.0) -> dict[str, np.ndarray]:
    events = np.atleast_1d(np.asarray(events, dtype=float))
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), events.shape).copy()  # noqa: E731
    share = full(share)
    return {"n1": full(n) * share, "n2": full(n) * (1 - share), "events": events, "share": share}


# -- published values -----------------------------------------------------------------------------


@pytest.mark.parametrize("hr,events", [(0.75, 380), (0.50, 66)])
def test_schoenfeld_events(hr, events):
    # Schoenfeld (1983), Biometrics 39:499-503: events = 4 (z_{1-alpha/2} + z_{1-beta})^2 /
    # (ln HR)^2 for 1:1 allocation; alpha .05 two-sided, power .80: HR 0.75 -> 380 events,
    # HR 0.50 -> 66 events.
    df = pd.DataFrame(
        {
            "study_id": ["S"],
            "design": ["survival"],
            "planned_effect": [hr],
            "planned_n1": [400],
            "planned_n2": [400],
            "planned_events": [events],
        }
    )
    r = audit.audit_table(df)
    assert r.metrics.iloc[0]["events_required_plan"] == events
    assert r.to_dict()["studies"][0]["metrics"]["events_required_plan"] == events
    # Same number of events from HR and 1/HR (the direction does not change the size).
    assert np.ceil(schoenfeld_events(1 / hr, 0.5, 0.05, 2, 0.8)) == events


def test_schoenfeld_formula_on_random_settings():
    # Schoenfeld's formula with allocation share p, D = (z_a + z_b)^2 / (p (1 - p) ln^2 HR),
    # written out with scipy's normal quantiles. One-sided: one rejection tail, so the solution
    # is exactly the formula. Two-sided, the far rejection tail (counted here, ignored by the
    # formula) adds a little power, so slightly fewer events suffice: at most 0.2 % fewer over
    # these settings (alpha <= .1, power >= .5).
    rng = np.random.default_rng(91)
    k = 300
    hr = np.exp(rng.uniform(-1.5, 1.5, k))
    hr = np.where(np.abs(np.log(hr)) < 0.02, 0.9, hr)
    share = rng.uniform(0.2, 0.8, k)
    alpha = rng.uniform(0.005, 0.1, k)
    power = rng.uniform(0.5, 0.95, k)
    for sides in (1.0, 2.0):
        got = schoenfeld_events(hr, share, alpha, sides, power)
        za = stats.norm.isf(alpha / sides)
        zb = stats.norm.ppf(power)
        expected = (za + zb) ** 2 / (share * (1 - share) * np.log(hr) ** 2)
        if sides == 1:
            np.testing.assert_allclose(got, expected, rtol=1e-9)
        else:
            assert np.all(got <= expected * (1 + 1e-12))
            assert np.all(got >= expected * (1 - 2e-3))


def test_power_against_statsmodels():
    # The Schoenfeld test is a one-sample z test on ln HR with SE 1 / sqrt(D p (1 - p)):
    # statsmodels NormalIndPower(ratio = 0) with effect |ln HR| sqrt(p (1 - p)) and nobs1 = D.
    rng = np.random.default_rng(92)
    k = 200
    events = rng.integers(5, 3000, k).astype(float)
    share = rng.uniform(0.2, 0.8, k)
    hr = np.exp(rng.uniform(-1.0, 1.0, k))
    alpha = rng.uniform(0.001, 0.2, k)
    sides = rng.integers(1, 3, k).astype(float)
    direction = np.where(hr < 1, -1.0, 1.0)
    got = DESIGN.power(_sc(events, share), hr, TestSpec(alpha, sides, np.full(k, 0.8), direction))
    ref = NormalIndPower()
    for i in range(k):
        alt = "two-sided" if sides[i] == 2 else "larger"
        es = abs(np.log(hr[i])) * np.sqrt(share[i] * (1 - share[i]))
        expected = ref.power(es, nobs1=events[i], alpha=alpha[i], ratio=0, alternative=alt)
        assert got[i] == pytest.approx(expected, rel=1e-9)


def test_analysis_scale_is_log_hazard_ratio():
    hr = np.array([0.3, 0.75, 1.0, 1.4])
    np.testing.assert_allclose(DESIGN.to_analysis(hr), np.log(hr), rtol=1e-15)
    np.testing.assert_allclose(DESIGN.from_analysis(DESIGN.to_analysis(hr)), hr, rtol=1e-15)
    # Schoenfeld's SE: 1 / sqrt(D p (1 - p)); with 400 events 1:1 that is 0.1.
    assert DESIGN.se(_sc(400.0))[0] == pytest.approx(0.1, rel=1e-12)


# -- facts of the trade ---------------------------------------------------------------------------


@settings(max_examples=60, deadline=None)
@given(
    events=st.integers(min_value=1, max_value=10000),
    alpha=st.floats(min_value=1e-4, max_value=0.3),
    sides=st.sampled_from([1.0, 2.0]),
)
def test_power_at_hazard_ratio_one_is_alpha(events, alpha, sides):
    got = DESIGN.power(_sc(float(events)), np.array([1.0]), _spec(1, alpha, sides, direction=1))
    assert got[0] == pytest.approx(alpha, rel=1e-9)


@settings(max_examples=60, deadline=None)
@given(
    events=st.integers(min_value=5, max_value=5000),
    hr=st.floats(min_value=0.2, max_value=0.98),
    alpha=st.floats(min_value=1e-3, max_value=0.3),
)
def test_power_rises_with_events_effect_and_alpha(events, hr, alpha):
    def pw(events=events, hr=hr, alpha=alpha):
        return DESIGN.power(_sc(float(events)), np.array([hr]), _spec(1, alpha))[0]

    assert pw(events=events + 10) >= pw()
    assert pw(hr=hr * 0.95) >= pw()  # further from 1
    assert pw(alpha=min(alpha * 1.5, 0.45)) >= pw()


def test_unbalanced_allocation_costs_power():
    # Common practice: at a fixed number of events, 1:1 allocation maximizes p (1 - p).
    powers = [DESIGN.power(_sc(200.0, p), np.array([0.7]), _spec(1))[0] for p in (0.5, 0.6, 0.75)]
    assert powers == sorted(powers, reverse=True)


def test_mde_round_trip_on_random_rows():
    rng = np.random.default_rng(93)
    k = 400
    sc = _sc(rng.integers(1, 5000, k).astype(float), rng.uniform(0.1, 0.9, k))
    spec = TestSpec(
        rng.uniform(0.001, 0.2, k),
        rng.integers(1, 3, k).astype(float),
        rng.uniform(0.3, 0.97, k),
        rng.choice([-1.0, 1.0], k),
    )
    mde = DESIGN.mde(sc, spec)
    assert np.all((mde < 1) == (spec.direction < 0))
    np.testing.assert_allclose(DESIGN.power(sc, mde, spec), spec.power, atol=1e-9)


# -- rows: patients from events, events ratio, replanning -------------------------------------


def _audit(**cols):
    base = {
        "study_id": "SV",
        "design": "survival",
        "planned_effect": 0.75,
        "planned_n1": 500,
        "planned_n2": 500,
        "planned_events": 380,
        "realized_n1": 480,
        "realized_n2": 490,
        "realized_events": 291,
    }
    return audit.audit_table(pd.DataFrame([{**base, **cols}]))


def test_patients_from_events_and_event_share():
    r = _audit()
    m = r.metrics.iloc[0]
    # 380 events at a planned event share of 380 / 1000 need 1000 patients: the plan reproduces.
    assert m["events_required_plan"] == 380
    assert m["n_required_plan"] == 1000
    assert m["plan_discrepancy"] == 0
    assert m["events_ratio"] == pytest.approx(291 / 380)
    assert m["n_ratio"] == pytest.approx(970 / 1000)
    # Realized event share 291 / 970 = 0.3: the plan needed 380 / 0.3 = 1266.7 patients,
    # i.e. 634 + 634 with each group rounded up.
    assert m["n_required_realized"] == 1268
    # Planned patients at the realized event share would have given 300 events.
    expected = DESIGN.power(_sc(300.0), np.array([0.75]), _spec(1))[0]
    assert m["power_if_planned_size"] == pytest.approx(expected)
    assert m["power_at_planned_effect"] < m["power_if_planned_size"] < m["plan_power"]


def test_sesoi_is_a_magnitude_on_the_log_scale():
    a = _audit(sesoi=0.8).metrics.iloc[0]["power_at_sesoi"]
    b = _audit(sesoi=1.25).metrics.iloc[0]["power_at_sesoi"]
    assert a == pytest.approx(b, rel=1e-12)


def test_mde_points_in_planned_direction():
    benefit = _audit().metrics.iloc[0]["mde"]
    harm = _audit(planned_effect=1.3).metrics.iloc[0]["mde"]
    assert benefit < 1 < harm
    assert np.log(benefit) == pytest.approx(-np.log(harm), rel=1e-12)


def test_missing_patient_counts_give_events_but_null_patients_with_notes():
    r = _audit(planned_n1=None, planned_n2=None, realized_n1=None, realized_n2=None)
    m = r.metrics.iloc[0]
    assert r.status[0] == "audited"
    assert m["events_required_plan"] == 380 and np.isfinite(m["power_at_planned_effect"])
    assert np.isnan(m["n_required_plan"])
    notes = list(r.notes["text"])
    assert "n_required_plan: not computed, missing planned_n1, planned_n2" in notes
    assert any(t.startswith("planned_n1/planned_n2 not both given: 1:1") for t in notes)


def test_hazard_ratio_one_explains_null_sizes():
    r = _audit(planned_effect=1.0)
    assert any(
        t.startswith("events_required_plan: the planned hazard ratio is 1") for t in r.notes["text"]
    )


@pytest.mark.parametrize(
    "cols,column",
    [
        ({"planned_effect": 0}, "planned_effect"),
        ({"sesoi": -0.8}, "sesoi"),
        ({"realized_events": 2000}, "realized_events"),
    ],
)
def test_bad_cells_are_row_errors(cols, column):
    r = _audit(**cols)
    assert r.status[0] == "invalid"
    assert column in set(r.errors["column"])
