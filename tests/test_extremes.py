"""Numerical extremes and properties of the maths, for every design in ``audit.designs.DESIGNS``.

A design joins these tests by adding one entry to ``EXAMPLES``: a function that writes an input
row for a given size (units per group) and standardized effect, and one that makes that row
noisier (a larger SD, SE or ICC: power must fall). The facts checked are common practice of the
trade: power at a zero effect equals alpha (the size of the test); power rises with the sample
size, the effect and alpha and falls with the noise; the MDE at a target power has that power.
The noncentral t used for extreme noncentralities is checked against numerical integration of
its definition, computed with scipy.integrate.quad.
"""

from __future__ import annotations

import itertools
import math
import time
import warnings
from collections.abc import Callable

import mpmath
import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, special, stats

import audit
from audit.designs import DESIGNS
from audit.designs._power import (
    f_upper_point,
    t_critical,
    t_critical_computable,
    t_ncp_for_power,
    t_power,
)
from audit.designs._solve import solve_increasing
from audit.metrics import test_settings as settings_for
from audit.read import raw_from_frame
from audit.validate import validate

Row = dict[str, object]


def _means(n: float, d: float) -> Row:
    return {"planned_n1": n, "realized_n1": n, "planned_sd": 1.0, "planned_effect": d}


def _two_means(n: float, d: float) -> Row:
    return {
        "planned_n1": n,
        "planned_n2": n,
        "realized_n1": n,
        "realized_n2": n,
        "planned_sd": 1.0,
        "planned_effect": d,
    }


def _estimate(n: float, d: float) -> Row:
    # The SE of a standardized mean from n units; df n - 1 for small n (t), normal otherwise.
    return {
        "planned_se": 1.0 / math.sqrt(n),
        "realized_se": 1.0 / math.sqrt(n),
        "planned_effect": d,
        "df": n - 1 if n < 50 else None,
    }


def _noisier_sd(row: Row) -> Row:
    return {**row, "realized_sd": 2.0 * float(row["planned_sd"])}


def _noisier_se(row: Row) -> Row:
    return {**row, "realized_se": 2.0 * float(row["realized_se"])}


def _bounded(d: float, limit: float) -> float:
    """A standardized effect of any size mapped into (-limit, limit), keeping its sign."""
    return limit * d / (abs(d) + 1.0)


def _proportions(n: float, d: float) -> Row:
    # Control rate 0.2; the risk difference stays within (-0.25, 0.25), so p2 is in (0, 0.45).
    return {
        "planned_n1": n,
        "planned_n2": n,
        "realized_n1": n,
        "realized_n2": n,
        "planned_p1": 0.2,
        "planned_p2": 0.2 + _bounded(d, 0.25),
    }


def _noisier_rate(row: Row) -> Row:
    # A control rate nearer one half: both proportions move towards 0.5, the variance grows.
    return {**row, "realized_p1": 0.35}


def _correlation(n: float, d: float) -> Row:
    return {"planned_n1": n + 3, "realized_n1": n + 3, "planned_effect": _bounded(d, 0.9)}


def _k_means(n: float, d: float) -> Row:
    return {"groups": 3, "planned_n1": 3 * n, "realized_n1": 3 * n, "planned_effect": abs(d) / 2}


def _regression(n: float, d: float) -> Row:
    return {
        "predictors": 2,
        "covariates": 1,
        "planned_n1": n + 10,
        "realized_n1": n + 10,
        "planned_effect": d * d / 4,
    }


def _fewer_units(row: Row) -> Row:
    # Designs without a nuisance parameter: less information is half the units (F designs keep
    # enough for their denominator df).
    spent = 4 if "predictors" in row else 3
    return {**row, "realized_n1": max(spent + 1, round(float(row["realized_n1"]) / 2))}


def _cluster(n: float, d: float) -> Row:
    return {
        "planned_n1": n + 1,
        "planned_n2": n + 1,
        "realized_n1": n + 1,
        "realized_n2": n + 1,
        "planned_sd": 1.0,
        "planned_effect": d,
        "planned_cluster_size": 10,
        "planned_icc": 0.05,
    }


def _noisier_icc(row: Row) -> Row:
    return {**row, "realized_icc": 0.2}


def _survival(n: float, d: float) -> Row:
    # Hazard ratio exp(-d) (bounded away from 0), half of the participants with an event.
    hr = math.exp(-max(min(d, 20.0), -20.0))
    return {
        "planned_n1": n,
        "planned_n2": n,
        "realized_n1": n,
        "realized_n2": n,
        "planned_events": n,
        "realized_events": n,
        "planned_effect": hr,
    }


def _fewer_events(row: Row) -> Row:
    return {**row, "realized_events": max(1, round(float(row["planned_events"]) / 2))}


def _cluster_proportions(n: float, d: float) -> Row:
    return {**_proportions(n + 1, d), "planned_cluster_size": 10, "planned_icc": 0.05}


def _rates(n: float, d: float) -> Row:
    # Rate ratio exp(-d) kept within (1/e, e): far beyond it the Wald test of a log rate ratio
    # loses power as the intervention arm runs out of events (see docs/methods/outcomes.md).
    return {
        "planned_n1": n,
        "planned_n2": n,
        "realized_n1": n,
        "realized_n2": n,
        "planned_rate1": 1.0,
        "exposure": 1.5,
        "dispersion": 0.3,
        "planned_effect": math.exp(-_bounded(d, 1.0)),
    }


def _fewer_control_events(row: Row) -> Row:
    return {**row, "realized_rate1": 0.3}


def _crossover(n: float, d: float) -> Row:
    # n + 2 subjects: the smallest size still has a degree of freedom (n - 2).
    return {"planned_n1": n + 2, "realized_n1": n + 2, "planned_sd": 1.0, "planned_effect": d}


def _paired_proportions(n: float, d: float) -> Row:
    # Discordant shares 0.15 and 0.15 + delta, delta within (-0.1, 0.1).
    return {
        "planned_n1": n,
        "realized_n1": n,
        "planned_p1": 0.15,
        "planned_p2": 0.15 + _bounded(d, 0.1),
    }


def _more_discordance(row: Row) -> Row:
    return {**row, "realized_p1": 0.3}


def _stepped_wedge(n: float, d: float) -> Row:
    return {
        "planned_n1": 3 * n,
        "realized_n1": 3 * n,
        "periods": 4,
        "planned_cluster_size": 10,
        "planned_icc": 0.05,
        "planned_sd": 1.0,
        "planned_effect": d,
    }


#: design -> (row for (size per group, standardized effect), the same row made noisier).
EXAMPLES: dict[str, tuple[Callable[[float, float], Row], Callable[[Row], Row]]] = {
    "one_mean": (_means, _noisier_sd),
    "paired_means": (_means, _noisier_sd),
    "two_means": (_two_means, _noisier_sd),
    "estimate": (_estimate, _noisier_se),
    "two_proportions": (_proportions, _noisier_rate),
    "correlation": (_correlation, _fewer_units),
    "k_means": (_k_means, _fewer_units),
    "regression": (_regression, _fewer_units),
    "cluster_two_means": (_cluster, _noisier_icc),
    "survival": (_survival, _fewer_events),
    "cluster_two_proportions": (_cluster_proportions, _noisier_icc),
    "two_rates": (_rates, _fewer_control_events),
    "crossover": (_crossover, _noisier_sd),
    "paired_proportions": (_paired_proportions, _more_discordance),
    "stepped_wedge": (_stepped_wedge, _noisier_sd),
}

#: Designs whose effect scale is bounded (a risk difference, a correlation): a high target can
#: need an effect past the bound, and the MDE is then null with a note instead of a number.
BOUNDED = {"two_proportions", "correlation", "cluster_two_proportions", "paired_proportions"}
# A falling rate has a bounded power too: with few units no rate ratio below 1 reaches a high
# target (the Wald test loses power as the intervention arm's events vanish).
BOUNDED |= {"two_rates"}

DESIGN_NAMES = sorted(DESIGNS)


def _example(name: str) -> tuple[Callable[[float, float], Row], Callable[[Row], Row]]:
    if name not in EXAMPLES:
        pytest.fail(f"design {name} has no entry in EXAMPLES of tests/test_extremes.py; add one")
    return EXAMPLES[name]


def _frame(name: str, rows: list[Row]) -> pd.DataFrame:
    out = []
    for i, r in enumerate(rows):
        out.append({"study_id": f"{name}-{i}", "design": name, **r})
    return pd.DataFrame(out)


def _realized(name: str, rows: list[Row]):
    """The realized scenario and test settings of validated example rows (design API level)."""
    validated = validate(raw_from_frame(_frame(name, rows)))
    assert validated.valid.all(), validated.failures
    table = validated.table
    design = DESIGNS[name]
    return design, design.scenario(table, "realized"), settings_for(table, design)


# -- extremes -------------------------------------------------------------------------------------

SIZES = [2, 3, 30, 10**7]  # 2: df of 1 for one-group designs
EFFECTS = [1e-12, 1e-3, 0.5, 1e6, -0.5]
ALPHAS = [1e-8, 0.05, 0.5, 0.9]
POWERS = [1e-6, 0.5, 0.8, 0.999999]


@pytest.mark.parametrize("name", DESIGN_NAMES)
def test_extremes_are_finite_or_null_with_a_note(name):
    row, _ = _example(name)
    rows = []
    for n, d, a, p, s in itertools.product(SIZES, EFFECTS, ALPHAS, POWERS, (1, 2)):
        r = row(n, d)
        effect = r.get(
            "planned_effect", float(r.get("planned_p2", 0)) - float(r.get("planned_p1", 0))
        )
        if name in ("survival", "two_rates"):
            effect = math.log(float(effect))  # half the effect on the log scale
            sesoi = math.exp(-abs(effect) / 2)
        else:
            sesoi = abs(float(effect)) / 2
        rows.append({**r, "alpha": a, "target_power": p, "sides": s, "sesoi": sesoi})
    df = _frame(name, rows)
    start = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no warning of any kind escapes
        result = audit.audit_table(df)
    elapsed = time.perf_counter() - start
    assert elapsed < 60, f"{len(rows)} rows took {elapsed:.0f} s"
    assert (result.status == "audited").all(), result.errors.head()
    doc = result.to_dict()
    for study in doc["studies"]:
        for metric, value in study["metrics"].items():
            # An object-valued metric (reference_power): each of its values in the same way.
            for part in value.values() if isinstance(value, dict) else [value]:
                if part is None:
                    assert any(metric in n or name in n for n in study["notes"]), (study, metric)
                elif not isinstance(part, str):
                    assert math.isfinite(part), (study["study_id"], metric, part)
    metrics = result.metrics
    for column in ("plan_power", "power_at_planned_effect", "power_at_sesoi"):
        values = metrics[column].dropna()
        assert ((values >= 0) & (values <= 1)).all(), column
    # A target power at or below alpha has no MDE (the test reaches it at a zero effect).
    weak = (df["target_power"] <= df["alpha"]).to_numpy()
    assert metrics.loc[weak, "mde"].isna().all()


def test_power_at_alpha_1e8_and_df_1_against_the_definition():
    # One-sample t with n = 2 (df = 1) and alpha = 1e-8 one-sided: the critical value is about
    # 3.2e7, and reaching power needs noncentralities near 1e7 to 1e8, where scipy's noncentral
    # t series fails (0.38 instead of 0.88 at c = 6.4e7, ncp = 1e8). Reference: the definition,
    # integrated with scipy.integrate.quad (see _definition), and for df = 1, where
    # sqrt(V) = |W| with W standard normal, the median of T is ncp / c = z_0.75 exactly as ncp
    # grows (P(|W| < ncp / c) = 1/2), computed with scipy.stats.
    mde = float(t_ncp_for_power(0.5, 1.0, 1e-8, 1.0)[()])
    assert _definition(mde, 1.0, 1e-8) == pytest.approx(0.5, rel=1e-6)
    assert mde == pytest.approx(stats.t.isf(1e-8, 1) * stats.norm.isf(0.25), rel=1e-6)


def _definition(ncp: float, df: float, alpha: float) -> float:
    """P(T > c) from the definition T = (Z + ncp) / sqrt(V / df), V chi-square on df, Z normal.

    For c > 0, T > c exactly when Z + ncp > 0 and V < df ((Z + ncp) / c)^2, so
    P = integral over z > -ncp of phi(z) P(V < df ((z + ncp) / c)^2) dz, integrated adaptively.
    """
    c = stats.t.isf(alpha, df)

    def f(z: float) -> float:
        return stats.norm.pdf(z) * stats.chi2.cdf(df * ((z + ncp) / c) ** 2, df)

    lo = max(-ncp, -40.0)
    return integrate.quad(f, lo, 40.0, points=[0.0], limit=500, epsabs=1e-16, epsrel=1e-12)[0]


@pytest.mark.parametrize("df", [1.0, 2.0, 5.0, 30.0])
@pytest.mark.parametrize("ncp", [2e3, 1e5, 1e8])
@pytest.mark.parametrize("alpha", [1e-8, 0.05])
def test_large_noncentrality_against_the_definition(df, ncp, alpha):
    expected = _definition(ncp, df, alpha)
    got = float(t_power(ncp, df, alpha, 1.0)[()])
    assert got == pytest.approx(expected, rel=1e-7, abs=1e-12)


def test_solver_gives_nan_for_an_unreachable_target_and_stops():
    # A function that never reaches the target: the bracket search gives up, nothing hangs.
    start = time.perf_counter()
    root = solve_increasing(
        lambda x: 1.0 - 1.0 / (1.0 + x), np.array([2.0, 0.5]), np.array([1.0, 1.0]), lower=0.0
    )
    assert math.isnan(root[0]) and root[1] == pytest.approx(1.0)
    assert time.perf_counter() - start < 5


def test_power_targets_near_0_and_1():
    # One-sided z test (df inf): the MDE multiplier is exactly z_(1-alpha) + z_power (Bloom
    # 1995: 2.49 at alpha .05, power .80), finite up to a target of 1 - 1e-12, undefined (nan)
    # at or below alpha and at 1.
    targets = np.array([1e-12, 0.05, 0.050001, 0.5, 0.8, 1 - 1e-12, 1.0])
    mult = t_ncp_for_power(targets, np.inf, 0.05, 1.0)
    assert np.isnan(mult[[0, 1, 6]]).all()
    ok = [2, 3, 4, 5]
    reference = special.ndtri(0.95) + special.ndtri(targets[ok])
    np.testing.assert_allclose(mult[ok], reference, rtol=1e-8)
    assert mult[4] == pytest.approx(2.49, abs=0.005)
    # Two-sided, both tails counted: the power at the multiplier is the target.
    two = t_ncp_for_power(targets[ok], np.inf, 0.05, 2.0)
    np.testing.assert_allclose(t_power(two, np.inf, 0.05, 2.0), targets[ok], rtol=1e-9)


# -- properties -----------------------------------------------------------------------------------

PROPERTY = settings(max_examples=40, deadline=None, derandomize=True)

sizes = st.floats(min_value=3, max_value=1e6)
effects = st.floats(min_value=1e-3, max_value=5.0)
alphas = st.floats(min_value=1e-6, max_value=0.4)
sides = st.sampled_from([1, 2])
factors = st.floats(min_value=1.05, max_value=20.0)


def _rows(name: str, params: list[tuple[float, float, float, int]]) -> list[Row]:
    row, _ = _example(name)
    return [
        {**row(round(n), d), "alpha": a, "sides": s, "target_power": 0.8} for n, d, a, s in params
    ]


def _power(name: str, rows: list[Row]) -> np.ndarray:
    design, sc, test = _realized(name, rows)
    return design.power(sc, design.planned_effect(_typed(name, rows)), test)


def _typed(name: str, rows: list[Row]) -> pd.DataFrame:
    return validate(raw_from_frame(_frame(name, rows))).table


params = st.lists(st.tuples(sizes, effects, alphas, sides), min_size=1, max_size=12)


@pytest.mark.parametrize("name", DESIGN_NAMES)
@PROPERTY
@given(params=params, k=factors)
def test_power_rises_with_size(name, params, k):
    low = _power(name, _rows(name, params))
    high = _power(name, _rows(name, [(n * k, d, a, s) for n, d, a, s in params]))
    assert (high >= low - 1e-12).all()


@pytest.mark.parametrize("name", DESIGN_NAMES)
@PROPERTY
@given(params=params, k=factors)
def test_power_rises_with_effect_and_alpha(name, params, k):
    base = _power(name, _rows(name, params))
    bigger = _power(name, _rows(name, [(n, d * k, a, s) for n, d, a, s in params]))
    looser = _power(name, _rows(name, [(n, d, min(a * k, 0.9), s) for n, d, a, s in params]))
    assert (bigger >= base - 1e-12).all()
    assert (looser >= base - 1e-12).all()


@pytest.mark.parametrize("name", DESIGN_NAMES)
@PROPERTY
@given(params=params)
def test_power_falls_with_noise(name, params):
    _, noisier = _example(name)
    rows = _rows(name, params)
    assert (_power(name, [noisier(r) for r in rows]) <= _power(name, rows) + 1e-12).all()


@pytest.mark.parametrize("name", DESIGN_NAMES)
@PROPERTY
@given(params=params, target=st.floats(min_value=0.45, max_value=0.99))
def test_mde_round_trip(name, params, target):
    rows = [{**r, "target_power": target} for r in _rows(name, params)]
    design, sc, test = _realized(name, rows)
    mde = design.mde(sc, test)
    ok = np.isfinite(mde)
    if name not in BOUNDED:
        assert ok[test.power > test.alpha].all()
    np.testing.assert_allclose(design.power(sc, mde, test)[ok], test.power[ok], rtol=1e-6)


@pytest.mark.parametrize("name", DESIGN_NAMES)
@PROPERTY
@given(params=params)
def test_power_at_zero_effect_is_alpha(name, params):
    # The size of the test: one- and two-sided (both tails counted) alike.
    design, sc, test = _realized(name, _rows(name, params))
    zero = design.from_analysis(np.zeros(len(params)))  # no effect: 0, or a hazard ratio of 1
    np.testing.assert_allclose(design.power(sc, zero, test), test.alpha, rtol=1e-9)


# -- extreme tails: upper points from the small tail itself (issue 20) ---------------------------


def _mp_z_upper(tail: float) -> mpmath.mpf:
    """Upper ``tail`` point of the standard normal, with mpmath (40 digits beyond the tail's
    exponent, so that 2 tail - 1 keeps the tail's digits)."""
    with mpmath.workdps(40 + int(-math.log10(tail))):
        return -mpmath.sqrt(2) * mpmath.erfinv(2 * mpmath.mpf(tail) - 1)


@pytest.mark.parametrize("tail", [0.5, 0.025, 1e-6, 1e-12, 5e-17, 1e-100, 1e-300])
def test_z_upper_point_keeps_every_digit_of_a_small_tail(tail):
    # 1 - 1e-12 rounds away 4 of the tail's digits (z was off in the 6th digit); below 1.1e-16
    # it is 1 and ndtri(1) is infinite. Reference: mpmath at 50 digits.
    got = float(t_critical(tail, 1, np.inf))
    want = float(_mp_z_upper(tail))
    assert got == pytest.approx(want, rel=1e-12, abs=1e-15)


def test_t_upper_point_against_mpmath():
    # Upper point of Student's t on random df (0.02 to 1e4) and tails (1e-15 to 0.5): where it
    # is accepted (t_critical_computable), its tail computed back with mpmath's incomplete
    # beta is the tail asked for; where it is not, the true point is beyond 1e150 (mpmath's
    # tail there is still above the one asked for).
    rng = np.random.default_rng(20)
    df = 10 ** rng.uniform(np.log10(0.02), 4, 80)
    tail = 10 ** rng.uniform(-15, np.log10(0.5), 80)
    c = t_critical(tail, np.ones(80), df)
    ok = t_critical_computable(tail, df)
    assert ok[df >= 1].all() and not ok.all()

    def mp_tail(d, x):
        return mpmath.betainc(d / 2, 0.5, 0, d / (d + mpmath.mpf(x) ** 2), regularized=True) / 2

    with mpmath.workdps(40):
        for d, t, x, fine in zip(df, tail, c, ok, strict=True):
            if fine:
                assert float(mp_tail(d, x)) == pytest.approx(t, rel=1e-9), (d, t, x)
            else:
                assert mp_tail(d, 1e150) > t, (d, t)


@pytest.mark.parametrize("dfn,dfd", [(1, 10), (3, 40), (12, 2.5), (2, 1e4)])
@pytest.mark.parametrize("alpha", [0.05, 1e-9, 1e-14])
def test_f_upper_point_against_mpmath(dfn, dfd, alpha):
    f = float(f_upper_point(np.float64(dfn), np.float64(dfd), alpha))
    with mpmath.workdps(40):
        x = mpmath.mpf(dfd) / (dfd + dfn * mpmath.mpf(f))
        back = mpmath.betainc(mpmath.mpf(dfd) / 2, mpmath.mpf(dfn) / 2, 0, x, regularized=True)
    assert float(back) == pytest.approx(alpha, rel=1e-9)


def test_two_sided_alpha_1e_16_at_20_se_is_power_one_not_zero():
    # Exact: P(Z > c - 20) + P(Z < -c - 20) with c the upper 5e-17 point: 1 - 5.6e-32, which is
    # 1.0 in double precision. ndtri(1 - 5e-17) = ndtri(1) = inf gave power 0 and a serious
    # flag. Reference: mpmath at 50 digits.
    with mpmath.workdps(50):
        c = _mp_z_upper(5e-17)
        exact = mpmath.ncdf(20 - c) + mpmath.ncdf(-20 - c)
        assert 1e-32 < 1 - exact < 1e-31
    assert float(t_power(20.0, np.inf, 1e-16, 2)) == 1.0 == float(exact)
    table = pd.DataFrame(
        {
            "study_id": ["T-1"],
            "design": ["estimate"],
            "realized_se": [1.0],
            "planned_effect": [20.0],
            "alpha": [1e-16],
            "sides": [2],
        }
    )
    study = audit.audit_table(table).to_dict()["studies"][0]
    assert study["status"] == "audited"
    assert study["metrics"]["power_at_planned_effect"] == 1.0
    assert not [f for f in study["flags"] if f["severity"] == "serious"]


@pytest.mark.parametrize("df", [0.01, 0.05, 0.2, 0.5, 0.999, 1.0, 3.0, 1e3, np.inf])
@pytest.mark.parametrize("alpha,sides", [(0.05, 2), (0.05, 1), (1e-6, 2), (1e-12, 1), (0.6, 1)])
def test_power_at_zero_effect_is_alpha_at_every_df_that_is_accepted(df, alpha, sides):
    # Common practice: the size of the test. Rows whose critical value cannot be computed are
    # refused by validation (below); every other df gives alpha at a zero effect.
    if not t_critical_computable(alpha / sides, df):
        # Refused by validation (see the next test); checked to be so only where df < 1.
        assert df < 1
        return
    assert float(t_power(0.0, df, alpha, sides)) == pytest.approx(alpha, rel=1e-9)


@pytest.mark.parametrize("df", [1e-4, 0.001, 0.005])
def test_df_too_small_for_the_alpha_is_refused(df):
    # At df 0.005 and alpha 0.05 the critical value is about 1e260, past what scipy returns
    # (about 5e152): the power at a zero effect came out 0.17 (0.70 at df 0.001), not 0.05.
    table = pd.DataFrame(
        {"study_id": ["D-1", "D-2"], "design": ["estimate"] * 2, "realized_se": [1.0, 1.0]}
    )
    table["df"] = [df, 30.0]
    studies = audit.audit_table(table).to_dict()["studies"]
    assert studies[0]["status"] == "invalid"
    assert any("df = " in e and "too small for a t test" in e for e in studies[0]["errors"])
    assert studies[1]["status"] == "audited"
