"""The reference tests (t, z, F) against published values, scipy and statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.power import FTestAnovaPower, TTestPower

from audit.designs._power import (
    f_lambda_for_power,
    f_power,
    t_critical,
    t_ncp_for_power,
    t_power,
)


def test_bloom_multipliers_large_df():
    # Bloom (1995), Evaluation Review 19:547-556: MDE multiplier 2.80 two-sided and 2.49
    # one-sided at alpha .05 and power .80 with large df (normal reference distribution).
    assert t_ncp_for_power(0.8, np.inf, 0.05, 2) == pytest.approx(2.80, abs=0.005)
    assert t_ncp_for_power(0.8, np.inf, 0.05, 1) == pytest.approx(2.49, abs=0.005)
    # and the same multipliers with a very large but finite df (noncentral t)
    assert t_ncp_for_power(0.8, 1e6, 0.05, 2) == pytest.approx(2.8016, abs=1e-3)


def test_power_at_zero_effect_is_alpha():
    # Common practice (definition of the size of a test): power at a zero effect equals alpha.
    alpha = np.array([1e-4, 0.01, 0.05, 0.2])
    for df in (1.0, 5.0, 60.0, np.inf):
        for sides in (1, 2):
            np.testing.assert_allclose(t_power(0.0, df, alpha, sides), alpha, rtol=1e-9)
    np.testing.assert_allclose(f_power(0.0, 3, 40, alpha), alpha, rtol=1e-9)


def test_two_sided_power_counts_both_tails():
    # Common practice: a two-sided z test at ncp = 1 rejects with probability
    # Phi(1 - 1.96) + Phi(-1 - 1.96); computed here with scipy's normal distribution.
    z = stats.norm.isf(0.025)
    expected = stats.norm.cdf(1 - z) + stats.norm.cdf(-1 - z)
    assert t_power(1.0, np.inf, 0.05, 2) == pytest.approx(expected, rel=1e-12)
    # and for a t test, both noncentral t tails (scipy's nct).
    c = stats.t.isf(0.025, 9)
    expected_t = stats.nct.sf(c, 9, 1.0) + stats.nct.cdf(-c, 9, 1.0)
    assert t_power(1.0, 9, 0.05, 2) == pytest.approx(expected_t, rel=1e-9)


@pytest.mark.parametrize("df,ncp", [(2, 50.0), (10, 40.0), (5, 200.0), (1, 1e4), (1e7, 60.0)])
def test_power_near_one_is_a_number(df, ncp):
    # Some reference implementations return NaN for very large noncentrality (scipy's
    # nct.cdf does for the lower tail; statsmodels inherits it). The tool must give ~1.
    p = t_power(ncp, df, 0.05, 2)
    assert np.isfinite(p) and p == pytest.approx(1.0, abs=1e-6)


def test_noncentral_survival_functions_match_scipy_stats():
    # The noncentral t and F survival functions are taken from scipy.special (to spare the
    # import of scipy.stats); they must be the ones scipy.stats' public methods compute.
    from audit.designs._power import _ncf_sf, _nct_sf

    rng = np.random.default_rng(11)
    x = rng.uniform(-3.0, 8.0, 500)
    df = np.exp(rng.uniform(0.0, np.log(1e4), 500))
    nc = rng.uniform(-20.0, 40.0, 500)
    # scipy.stats clips the t's survival function to [0, 1], as audit's t_power does after it.
    np.testing.assert_allclose(
        np.clip(_nct_sf(x, df, nc), 0, 1), stats.nct.sf(x, df, nc), rtol=1e-12, atol=1e-300
    )
    f = rng.uniform(0.1, 10.0, 500)
    dfn = rng.integers(1, 12, 500).astype(float)
    lam = rng.uniform(0.1, 60.0, 500)
    np.testing.assert_allclose(
        _ncf_sf(f, dfn, df, lam), stats.ncf.sf(f, dfn, df, lam), rtol=1e-12, atol=1e-300
    )


def test_threaded_evaluation_equals_the_single_call(monkeypatch):
    # Large arrays are split over threads; the parts must give exactly the values of one call.
    from audit.designs import _power

    monkeypatch.setattr(_power, "THREADS", 3)
    rng = np.random.default_rng(5)
    n = _power.THREADED_MIN + 1001
    x, df, nc = rng.uniform(0, 4, n), rng.uniform(1, 500, n), rng.uniform(-2, 8, n)
    np.testing.assert_array_equal(
        _power.threaded(_power._nct_sf, x, df, nc), _power._nct_sf(x, df, nc)
    )


def test_importing_the_audit_leaves_scipy_stats_alone():
    # Start-up time: scipy.stats takes about 0.45 s to import and the audit does not need it.
    import subprocess
    import sys

    code = (
        "import sys, audit.cli, audit.pipeline, audit.export; "
        "print(any(m.startswith('scipy.stats') for m in sys.modules))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_t_critical_matches_scipy():
    # scipy.stats.t.isf is the reference quantile function.
    df = np.array([1.0, 3.0, 30.0, 1e4])
    np.testing.assert_allclose(t_critical(0.05, 2, df), stats.t.isf(0.025, df), rtol=1e-12)
    assert t_critical(0.05, 1, np.inf) == pytest.approx(stats.norm.isf(0.05), rel=1e-12)


def test_t_power_against_statsmodels_random():
    # statsmodels' TTestPower (one-sample t) is a general reference library: power at
    # effect size d with n observations is the noncentral t with ncp = d sqrt(n), df = n - 1.
    rng = np.random.default_rng(20261201)
    ref = TTestPower()
    for _ in range(200):
        n = int(rng.integers(3, 400))
        d = float(rng.uniform(0.01, 1.2))
        alpha = float(rng.uniform(0.001, 0.2))
        sides = int(rng.integers(1, 3))
        alt = "two-sided" if sides == 2 else "larger"
        expected = ref.power(effect_size=d, nobs=n, alpha=alpha, alternative=alt)
        got = t_power(d * np.sqrt(n), n - 1.0, alpha, sides)
        if np.isnan(expected):
            # statsmodels returns nan when its lower-tail nct.cdf fails at a large ncp; the
            # upper tail from scipy's nct.sf is then the whole power (lower tail < 1e-300).
            c = stats.t.isf(alpha / sides, n - 1)
            expected = stats.nct.sf(c, n - 1, d * np.sqrt(n))
        assert got == pytest.approx(expected, rel=1e-6), (n, d, alpha, sides)


def _reference_effect(n: float, alpha: float, power: float, alt: str) -> float:
    """Effect size solving statsmodels' power function = target, with brentq to 1e-15.

    statsmodels' own solve_power stops at about 1e-5 relative (and can return the negative
    root of a two-sided problem), so the reference root is found here with scipy's brentq on
    statsmodels' power function instead.
    """
    from scipy.optimize import brentq

    ref = TTestPower()
    sides = 2 if alt == "two-sided" else 1
    # A bracket wide enough for the t root, narrow enough to avoid statsmodels' nan region.
    upper = 2.0 * (stats.norm.isf(alpha / sides) + stats.norm.ppf(power) + 2.0) / np.sqrt(n)

    def excess(d: float) -> float:
        value = ref.power(effect_size=d, nobs=n, alpha=alpha, alternative=alt)
        # statsmodels gives nan only where power is indistinguishable from 1 (above target).
        return 1.0 - power if np.isnan(value) else value - power

    return brentq(
        excess,
        1e-9,
        upper,
        xtol=1e-15,
        rtol=1e-14,
    )


def test_t_ncp_inverse_against_statsmodels_random():
    # MDE (as an effect size) against statsmodels' power function solved independently, and
    # against statsmodels' solve_power within its own tolerance.
    rng = np.random.default_rng(7)
    ref = TTestPower()
    n = rng.integers(4, 300, 200).astype(float)
    power = rng.uniform(0.3, 0.97, 200)
    alpha = rng.uniform(0.005, 0.1, 200)
    sides = rng.integers(1, 3, 200).astype(float)
    ncp = t_ncp_for_power(power, n - 1, alpha, sides)
    for i in range(200):
        alt = "two-sided" if sides[i] == 2 else "larger"
        d = _reference_effect(n[i], alpha[i], power[i], alt)
        assert ncp[i] / np.sqrt(n[i]) == pytest.approx(d, rel=1e-6)
        if i < 40:
            loose = ref.solve_power(nobs=n[i], alpha=alpha[i], power=power[i], alternative=alt)
            assert abs(float(np.squeeze(loose))) == pytest.approx(d, rel=1e-4)


def test_t_ncp_round_trip_vectorised():
    # The MDE fed back into the power function gives the target power (round trip).
    rng = np.random.default_rng(3)
    df = rng.integers(1, 2000, 5000).astype(float)
    power = rng.uniform(0.06, 0.999, 5000)
    sides = rng.integers(1, 3, 5000).astype(float)
    ncp = t_ncp_for_power(power, df, 0.05, sides)
    np.testing.assert_allclose(t_power(ncp, df, 0.05, sides), power, atol=1e-9)


def test_t_ncp_undefined_when_target_not_above_alpha():
    # No positive effect is needed to reach a power the test has at zero effect.
    assert np.isnan(t_ncp_for_power(0.04, 20, 0.05, 1))
    assert np.isnan(t_ncp_for_power(0.05, 20, 0.05, 2))


def test_f_power_against_statsmodels_random():
    # statsmodels FTestAnovaPower: power of the one-way ANOVA F test with lambda = f^2 N,
    # df = (k - 1, N - k).
    rng = np.random.default_rng(11)
    ref = FTestAnovaPower()
    for _ in range(100):
        k = int(rng.integers(2, 7))
        nobs = int(rng.integers(k + 2, 400))
        f = float(rng.uniform(0.02, 0.8))
        alpha = float(rng.uniform(0.005, 0.15))
        expected = ref.power(effect_size=f, nobs=nobs, alpha=alpha, k_groups=k)
        got = f_power(f * f * nobs, k - 1, nobs - k, alpha)
        assert got == pytest.approx(expected, rel=1e-6)


def test_f_lambda_round_trip():
    rng = np.random.default_rng(5)
    d1 = rng.integers(1, 8, 300).astype(float)
    d2 = rng.integers(2, 500, 300).astype(float)
    power = rng.uniform(0.1, 0.99, 300)
    lam = f_lambda_for_power(power, d1, d2, 0.05)
    np.testing.assert_allclose(f_power(lam, d1, d2, 0.05), power, atol=1e-9)


def test_noncentrality_interpolant_matches_the_direct_search():
    # NcpLookup interpolates the root of t_power(ncp) = power over df; the reference is the
    # direct bracketed search on scipy's noncentral t (which statsmodels agrees with, above).
    from audit.designs._power import NcpLookup, _exact_ncp

    rng = np.random.default_rng(17)
    k = 3000
    power = rng.choice([0.06, 0.5, 0.8, 0.9, 0.95, 0.999], k)
    alpha = rng.choice([1e-8, 1e-4, 0.01, 0.025, 0.05, 0.2], k)
    sides = rng.choice([1.0, 2.0], k)
    keep = power > alpha
    power, alpha, sides = power[keep], alpha[keep], sides[keep]
    df = np.exp(rng.uniform(np.log(2.0), np.log(1e7), len(power)))
    df[:50] = np.inf
    df[50:100] = 2.0
    df[100:150] = 30.0
    interpolated = NcpLookup(power, alpha, sides).at(df)
    direct = _exact_ncp(power, df, alpha, sides)
    np.testing.assert_allclose(interpolated, direct, rtol=1e-9)


def test_a_full_table_store_keeps_the_tables_a_lookup_reads(monkeypatch):
    # Issue 13: a file with many distinct target powers filled the process-wide store; the
    # clear then dropped keys the lookup read next (KeyError: (0.5, 0.05, 2.0)). With a store
    # of 3 tables and 5 settings, the lookup must still answer, and answer what scipy's
    # noncentral t says (reference: scipy.stats.nct at the returned noncentrality).
    from audit.designs import _power

    monkeypatch.setattr(_power, "_TABLES", {})
    monkeypatch.setattr(_power, "_TABLES_MAX", 3)
    first = _power.NcpLookup(np.array([0.5, 0.6]), np.array([0.05, 0.05]), np.array([2.0, 2.0]))
    first.at(np.array([40.0, 40.0]))
    power = np.array([0.5, 0.6, 0.7, 0.8, 0.9])
    alpha = np.full(5, 0.05)
    sides = np.full(5, 2.0)
    df = np.full(5, 40.0)
    ncp = _power.NcpLookup(power, alpha, sides).at(df)
    c = stats.t.isf(0.025, 40)
    achieved = stats.nct.sf(c, 40, ncp) + stats.nct.cdf(-c, 40, ncp)
    np.testing.assert_allclose(achieved, power, rtol=1e-9)
    assert len(_power._TABLES) <= 3


def test_the_public_nctdtr_loses_the_far_upper_tail():
    # Why the fallback of the private ufunc is scipy.stats' method and not 1 - nctdtr: at a
    # central t with 100 df, P(T > 12) is about 1e-21 (scipy.stats.t.sf, an independent
    # closed form at zero noncentrality); 1 - nctdtr cancels to nothing there.
    from scipy.special import nctdtr

    from audit.designs._power import _nct_sf

    exact = stats.t.sf(12.0, 100.0)
    assert exact < 1e-18
    assert _nct_sf(12.0, 100.0, 0.0) == pytest.approx(exact, rel=1e-10)
    assert abs((1.0 - nctdtr(100.0, 0.0, 12.0)) - exact) > 0.5 * exact


@pytest.mark.parametrize("change", ["missing", "fewer arguments", "arguments reordered"])
def test_a_changed_private_ufunc_falls_back_to_the_public_method(change):
    # A scipy release may drop _nct_sf or change what it takes; the audit must then use
    # scipy.stats' public survival function, not fail or compute something else.
    # (scipy.stats calls the real ufunc itself, so the changed one is handed in, not patched.)
    from types import SimpleNamespace

    from scipy.special import _ufuncs

    from audit.designs import _power

    real = _ufuncs._nct_sf
    changed = {
        "missing": SimpleNamespace(),
        "fewer arguments": SimpleNamespace(_nct_sf=lambda df, nc: real(1.0, df, nc)),
        "arguments reordered": SimpleNamespace(_nct_sf=lambda df, nc, x: real(x, df, nc)),
    }[change]
    probe = (2.0, 7.0, 1.5)
    func = _power._stats_ufunc("nct", "sf", probe, _power._public_nct_sf, changed)
    assert func == stats.nct.sf
    x, df, nc = np.array([1.0, 3.0]), np.array([5.0, 40.0]), np.array([0.5, 2.0])
    np.testing.assert_allclose(func(x, df, nc), real(x, df, nc), rtol=1e-12)


def test_the_private_ufuncs_in_use_pass_their_probe():
    from types import SimpleNamespace

    from scipy.special import _ufuncs

    from audit.designs import _power

    assert _power._nct_sf is _ufuncs._nct_sf and _power._ncf_sf is _ufuncs._ncf_sf
    same = SimpleNamespace(_nct_sf=_ufuncs._nct_sf)
    assert _power._stats_ufunc("nct", "sf", (2.0, 7.0, 1.5), _power._public_nct_sf, same) is (
        _ufuncs._nct_sf
    )
