"""Retrospective inference (audit/retro.py): observed power, Type S/M, result derivations, CI
verdicts — each against a published value, a reference library or an independent computation
written here."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats
from statsmodels.stats.power import NormalIndPower, TTestPower

from audit import retro

# -- observed power -------------------------------------------------------------------------------


def test_observed_power_at_p_equal_alpha_is_one_half():
    # Hoenig & Heisey (2001), The American Statistician 55:19-24: for a z test, the observed
    # power at p = alpha is 0.50 (one-sided exactly; two-sided plus the negligible far tail
    # Phi(-2 z_.975) = 0.00004).
    assert retro.observed_power_from_p(0.05, np.inf, 0.05, 2)[()] == pytest.approx(0.50, abs=1e-4)
    assert retro.observed_power_from_p(0.05, np.inf, 0.05, 1)[()] == pytest.approx(0.5, abs=1e-12)
    assert retro.observed_power_from_p(0.01, np.inf, 0.01, 2)[()] == pytest.approx(0.50, abs=1e-4)


@pytest.mark.parametrize("p", [0.001, 0.01, 0.03, 0.05, 0.10, 0.20, 0.50, 0.80])
@pytest.mark.parametrize("sides", [1, 2])
def test_observed_power_table_against_statsmodels(p, sides):
    # The p -> observed power table, computed independently with statsmodels' NormalIndPower
    # (one-sample z test: ratio = 0, nobs1 = 1, so the standardized effect is the z statistic)
    # and scipy's normal quantile for the statistic a p-value implies.
    z = stats.norm.isf(p / 2) if sides == 2 else stats.norm.isf(p)
    expected = NormalIndPower().power(
        effect_size=z,
        nobs1=1,
        alpha=0.05,
        ratio=0,
        alternative="two-sided" if sides == 2 else "larger",
    )
    got = retro.observed_power_from_p(p, np.inf, 0.05, sides)[()]
    assert got == pytest.approx(expected, rel=1e-9)


def test_observed_power_is_a_function_of_p_only():
    # Hoenig & Heisey (2001): observed power is a decreasing function of p; a non-significant
    # result always has observed power below about one half. Random p-values, z test.
    rng = np.random.default_rng(7)
    p = np.sort(rng.uniform(0.0005, 0.999, 300))
    power = retro.observed_power_from_p(p, np.inf, 0.05, 2)
    assert np.all(np.diff(power) < 0)
    assert np.all(power[p > 0.05] < 0.5 + 1e-4)
    assert np.all(power[p < 0.05] > 0.5)
    # The same value whether computed from effect and SE or from the p they imply.
    effect = rng.normal(0.0, 3.0, 50)
    se = rng.uniform(0.5, 2.0, 50)
    p_two = 2 * stats.norm.sf(np.abs(effect / se))  # computed with scipy
    np.testing.assert_allclose(
        retro.observed_power(effect / se, np.inf, 0.05, 2),
        retro.observed_power_from_p(p_two, np.inf, 0.05, 2),
        rtol=1e-7,
    )


def test_observed_power_with_t_against_statsmodels():
    # Observed power of a one-sample t test: power at the observed d = t / sqrt(n), computed
    # with statsmodels' TTestPower (noncentral t, df = n - 1).
    for t_obs, n in [(1.2, 10), (2.5, 25), (0.4, 60)]:
        expected = TTestPower().power(effect_size=t_obs / np.sqrt(n), nobs=n, alpha=0.05)
        got = retro.observed_power(t_obs, n - 1.0, 0.05, 2)[()]
        assert got == pytest.approx(expected, rel=1e-6)


# -- Type S and Type M ----------------------------------------------------------------------------


def _integrated(lam: float, alpha: float, sides: int) -> tuple[float, float, float]:
    """Power, Type S and exaggeration by numerical integration of the normal density (scipy
    quad), written independently of the closed forms in audit/retro.py."""
    c = stats.norm.isf(alpha / sides)

    def density(z):
        return stats.norm.pdf(z, loc=lam)

    def weighted(z):
        return abs(z) * stats.norm.pdf(z, loc=lam)

    hi = integrate.quad(density, c, np.inf, epsabs=1e-13)[0]
    hi_mean = integrate.quad(weighted, c, np.inf, epsabs=1e-13)[0]
    lo = lo_mean = 0.0
    if sides == 2:
        lo = integrate.quad(density, -np.inf, -c, epsabs=1e-13)[0]
        lo_mean = integrate.quad(weighted, -np.inf, -c, epsabs=1e-13)[0]
    power = hi + lo
    wrong = lo if lam > 0 else hi
    return power, wrong / power, (hi_mean + lo_mean) / (power * abs(lam))


@pytest.mark.parametrize("ratio", [0.05, 0.25, 0.5, 1.0, 2.0, 2.8, 4.0])
@pytest.mark.parametrize("sides", [1, 2])
def test_type_s_m_against_numerical_integration(ratio, sides):
    # True effect / SE ratios from negligible to high power; alpha .05.
    power, type_s, exaggeration = _integrated(ratio, 0.05, sides)
    got = retro.sign_and_magnitude_errors(np.array([ratio * 3.0]), 3.0, 0.05, sides)
    assert got.power[0] == pytest.approx(power, rel=1e-7)
    assert got.type_s[0] == pytest.approx(type_s, rel=1e-6, abs=1e-12)
    assert got.exaggeration[0] == pytest.approx(exaggeration, rel=1e-6)


def test_type_s_m_against_simulation():
    # A large fixed-seed simulation, as Gelman & Carlin (2014) compute these quantities:
    # estimates drawn from N(effect, se), kept when significant (two-sided z test at .05).
    rng = np.random.default_rng(20140901)
    c = stats.norm.isf(0.025)
    for effect, se in [(0.5, 1.0), (1.0, 1.0), (2.0, 8.1)]:
        est = rng.normal(effect, se, 4_000_000)
        sig = np.abs(est / se) > c
        sim_s = np.mean(np.sign(est[sig]) != np.sign(effect))
        sim_m = np.mean(np.abs(est[sig])) / effect
        got = retro.sign_and_magnitude_errors(np.array([effect]), se, 0.05, 2)
        assert got.type_s[0] == pytest.approx(sim_s, abs=0.01)
        assert got.exaggeration[0] == pytest.approx(sim_m, rel=0.02)


def test_gelman_carlin_worked_examples_from_memory():
    # Gelman & Carlin (2014), Perspectives on Psychological Science 9:641-651 — values recalled
    # from memory, hence the loose tolerances. Ovulation-and-voting example: true effect 2
    # percentage points, SE 8.1 -> power about 0.06, Type S about 24 %, exaggeration about 9.5.
    r = retro.sign_and_magnitude_errors(np.array([2.0]), 8.1, 0.05, 2)
    assert r.power[0] == pytest.approx(0.06, abs=0.005)
    assert r.type_s[0] == pytest.approx(0.24, abs=0.01)
    assert r.exaggeration[0] == pytest.approx(9.5, rel=0.05)
    # Beauty-and-sex-ratio example: SE 3.3; true effect 0.3 -> Type S about 40 %, exaggeration
    # about 25; true effect 0.1 -> Type S about 46 %, exaggeration about 77 (from memory).
    r = retro.sign_and_magnitude_errors(np.array([0.3, 0.1]), 3.3, 0.05, 2)
    assert r.type_s.tolist() == pytest.approx([0.40, 0.46], abs=0.01)
    assert r.exaggeration.tolist() == pytest.approx([25.0, 77.0], rel=0.05)


def test_type_s_m_facts_of_the_trade():
    # Gelman & Carlin (2014): with no power to speak of, a significant estimate is as likely to
    # have either sign (Type S -> 1/2) and is hugely exaggerated; with high power, Type S -> 0
    # and the exaggeration ratio -> 1. Exaggeration falls as the effect/SE ratio rises.
    ratio = np.array([1e-4, 0.1, 0.5, 1.0, 2.0, 3.0, 5.0, 10.0])
    r = retro.sign_and_magnitude_errors(ratio, 1.0, 0.05, 2)
    assert r.type_s[0] == pytest.approx(0.5, abs=1e-3)
    assert r.exaggeration[0] > 1000
    assert r.type_s[-1] < 1e-20 and r.exaggeration[-1] == pytest.approx(1.0, abs=1e-6)
    assert np.all(np.diff(r.exaggeration) < 0) and np.all(np.diff(r.type_s) < 0)
    # Two-sided: only the magnitude of the effect matters.
    neg = retro.sign_and_magnitude_errors(-ratio, 1.0, 0.05, 2)
    np.testing.assert_allclose(neg.exaggeration, r.exaggeration)
    # One-sided: a significant estimate always points the way the test looks.
    one = retro.sign_and_magnitude_errors(ratio, 1.0, 0.05, 1)
    assert np.all(one.type_s == 0.0)
    # Power at a zero effect is alpha; Type S and M are undefined there.
    zero = retro.sign_and_magnitude_errors(np.array([0.0]), 1.0, 0.05, 2)
    assert zero.power[0] == 0.05 and np.isnan(zero.type_s[0]) and np.isnan(zero.exaggeration[0])


# -- results: derivations ------------------------------------------------------------------------


def _complete(**kw):
    base = dict(
        effect=np.nan,
        se=np.nan,
        ci_low=np.nan,
        ci_high=np.nan,
        p=np.nan,
        df=np.inf,
        alpha=0.05,
        sides=2.0,
        direction=1.0,
    )
    base.update(kw)
    args = [base.pop(k) for k in ("effect", "se", "ci_low", "ci_high", "p")]
    return retro.complete_results(*args, **base)


@pytest.mark.parametrize("df", [np.inf, 12.0, 48.0])
def test_se_from_ci_round_trip(df):
    # A CI built with scipy's t (or normal) interval gives back the SE it was built from.
    rng = np.random.default_rng(3)
    est = rng.normal(0, 5, 40)
    se = rng.uniform(0.2, 4, 40)
    dist = stats.norm() if np.isinf(df) else stats.t(df)
    lo, hi = est + se * np.array(dist.interval(0.95))[:, None]
    r = _complete(ci_low=lo, ci_high=hi, df=df)
    np.testing.assert_allclose(r.se, se, rtol=1e-9)
    np.testing.assert_allclose(r.effect, est, rtol=1e-9, atol=1e-12)
    assert np.all(r.effect_from == retro.FROM_CI) and np.all(r.se_from == retro.FROM_CI)
    # The p-value then follows from estimate / SE, as scipy computes it.
    np.testing.assert_allclose(r.p, 2 * dist.sf(np.abs(est / se)), rtol=1e-7)
    # The reported interval is at the test's level, so it is kept as given.
    assert np.all(r.ci_from == retro.REPORTED)
    np.testing.assert_allclose(r.ci_low, lo)


def test_se_from_p_round_trip():
    # SE -> p (scipy) -> SE, two-sided and one-sided, normal and t.
    rng = np.random.default_rng(5)
    est = rng.normal(0, 5, 40)
    est[est == 0] = 1.0
    se = rng.uniform(0.2, 4, 40)
    for df in (np.inf, 20.0):
        dist = stats.norm() if np.isinf(df) else stats.t(df)
        p_two = 2 * dist.sf(np.abs(est / se))
        r = _complete(effect=est, p=p_two, df=df)
        np.testing.assert_allclose(r.se, se, rtol=1e-7)
        assert np.all(r.se_from == retro.FROM_P)
        # One-sided p in the test's direction (+1). Estimates far on the other side give p
        # within 1e-12 of 1, which no longer carries their statistic to many digits; keep
        # those within five SEs.
        keep = est / se > -5
        p_one = dist.sf(est / se)
        r = _complete(effect=est[keep], p=p_one[keep], df=df, sides=1.0)
        np.testing.assert_allclose(r.se, se[keep], rtol=1e-7)


def test_interval_at_another_level_is_rebuilt_at_the_tests_level():
    # A 95 % interval reported for a one-sided test at alpha .05 (whose dual interval is 90 %):
    # the SE comes from the 95 % width; the 90 % interval is estimate +- z_.95 SE (scipy).
    lo, hi = stats.norm.interval(0.95, loc=2.0, scale=1.5)
    r = _complete(ci_low=lo, ci_high=hi, sides=1.0, ci_level=np.array([0.95]))
    assert r.se[0] == pytest.approx(1.5)
    assert r.ci_level[0] == pytest.approx(0.90)
    expected = stats.norm.interval(0.90, loc=2.0, scale=1.5)
    assert (r.ci_low[0], r.ci_high[0]) == pytest.approx(expected)
    assert r.ci_from[0] == retro.FROM_EFFECT_SE


def test_nothing_to_derive_from():
    r = _complete(effect=np.array([1.0, np.nan, 0.0]), p=np.array([np.nan, 0.2, 1.0]))
    assert np.isnan(r.se).all() and np.isnan(r.ci_low).all()
    # a p-value alone stays (it is what was reported); an estimate of 0 with p = 1 has no SE
    assert r.p[1] == 0.2 and r.p[2] == 1.0


# -- significance and CI verdicts -----------------------------------------------------------------


def test_significance_from_interval_agrees_with_p():
    # The interval dual to the test excludes 0 exactly when p < alpha (p computed with scipy),
    # for two-sided and one-sided tests in either direction.
    rng = np.random.default_rng(11)
    est = rng.normal(0, 3, 400)
    se = rng.uniform(0.5, 2.0, 400)
    for sides, direction in [(2, 1.0), (1, 1.0), (1, -1.0)]:
        z = direction * est / se
        p = 2 * stats.norm.sf(np.abs(z)) if sides == 2 else stats.norm.sf(z)
        r = _complete(effect=est, se=se, sides=float(sides), direction=direction)
        sig = retro.significant(
            r.ci_low, r.ci_high, np.nan, alpha=0.05, sides=sides, direction=direction
        )
        np.testing.assert_array_equal(sig == 1.0, p < 0.05)


@pytest.mark.parametrize(
    "low,high,sig,planned,sesoi,direction,expected",
    [
        # significant: detected, whatever else the interval excludes
        (0.5, 3.0, 1.0, 10.0, 5.0, 1.0, "detected"),
        # not significant; rules out the SESOI (and so the larger planned effect)
        (-1.0, 0.8, 0.0, 2.0, 1.0, 1.0, "excludes_sesoi"),
        # rules out the planned effect but not the SESOI
        (-1.0, 1.5, 0.0, 2.0, 1.0, 1.0, "excludes_planned_effect"),
        # holds both zero and the SESOI
        (-1.0, 3.0, 0.0, 2.0, 1.0, 1.0, "inconclusive"),
        # planned direction negative: the far end is the low limit
        (-1.5, 1.0, 0.0, -2.0, -1.0, -1.0, "excludes_planned_effect"),
        (-0.5, 1.0, 0.0, -2.0, -1.0, -1.0, "excludes_sesoi"),
        # SESOI larger than the planned effect: the smaller (planned) one is named
        (-1.0, 0.5, 0.0, 1.0, 2.0, 1.0, "excludes_planned_effect"),
        # only the SESOI known
        (-1.0, 0.5, 0.0, np.nan, 1.0, 1.0, "excludes_sesoi"),
        # one-sided test, interval entirely on the other side: not significant, rules out both
        (-3.0, -1.0, 0.0, 2.0, 1.0, 1.0, "excludes_sesoi"),
        # no reference effect: nothing to say
        (-1.0, 0.5, 0.0, np.nan, np.nan, 1.0, None),
        # no interval but a significant p
        (np.nan, np.nan, 1.0, 2.0, 1.0, 1.0, "detected"),
        # no interval, not significant
        (np.nan, np.nan, 0.0, 2.0, 1.0, 1.0, None),
    ],
)
def test_ci_verdicts(low, high, sig, planned, sesoi, direction, expected):
    # Hand-made cases: the definitions of DESIGN.md section 5 with the precedence documented in
    # retro.ci_verdicts (detected, then the smallest reference effect excluded).
    got = retro.ci_verdicts(
        np.array([low]),
        np.array([high]),
        np.array([sig]),
        np.array([planned]),
        np.array([sesoi]),
        direction=direction,
    )
    assert got[0] == expected
