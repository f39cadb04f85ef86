"""Reproducing a stated sample-size calculation by the published methods of each design.

Each method is checked against a published table or worked example (the source beside each
check; "from memory" where the value is recalled without the text), against its closed form or a
direct computation of our own, and against reference libraries (statsmodels, scipy, mpmath) on
random parameters. Then: a plan made with each method is recognised as made with it; a plan no
method reproduces still fires the rule; the dropout allowance; the tolerance in force.
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pandas as pd
import pytest
from scipy import integrate, special, stats
from statsmodels.stats.power import NormalIndPower, TTestIndPower, TTestPower

import audit
from audit import plan_methods
from audit.designs import DESIGNS, TestSpec
from audit.designs._exact_r import exact_r_size, r_critical, r_power, r_tail
from audit.metrics import REPRODUCTION_METRICS
from audit.plan_methods import PlanInputs, reproduce

Z = special.ndtri(0.975) + special.ndtri(0.8)  # 2.8016: alpha .05 two-sided, power .80


def _spec(n: int, alpha=0.05, sides=2.0, power=0.8, direction=1.0) -> TestSpec:
    full = lambda v: np.broadcast_to(np.asarray(v, dtype=float), (n,)).copy()  # noqa: E731
    return TestSpec(full(alpha), full(sides), full(power), full(direction))


def _sizes(design: str, plan: dict, effect, test: TestSpec | None = None) -> dict[str, float]:
    """Required total per method for a one-row plan (no dropout)."""
    plan = {k: np.atleast_1d(np.asarray(v, dtype=float)) for k, v in plan.items()}
    effect = np.atleast_1d(np.asarray(effect, dtype=float))
    test = test or _spec(len(effect))
    d = DESIGNS[design]
    rep = reproduce(d, plan, effect, test, d.total_size(plan), np.full(len(effect), np.nan))
    return {name: rep.required[i] for i, name in enumerate(rep.names)}


def _two_means(n1=np.nan, n2=np.nan, sd=1.0, q=0.0, r2=0.0) -> dict:
    return {"n1": n1, "n2": n2, "sd": sd, "covariates": q, "covariate_r2": r2}


def _audit(rows: list[dict], **kw) -> audit.AuditResult:
    df = pd.DataFrame([{"study_id": f"S{i}", **row} for i, row in enumerate(rows)])
    return audit.audit_table(df, **kw)


# -- t tests: exact t, normal approximation, Guenther -------------------------------------------


@pytest.mark.parametrize("d,exact,normal", [(0.2, 394, 393), (0.5, 64, 63), (0.8, 26, 25)])
def test_two_sample_methods_on_cohens_cells(d, exact, normal):
    # Cohen (1988), table 2.4.1: 393 / 64 / 26 per group for d = .2 / .5 / .8 (alpha .05
    # two-sided, power .80); the exact t needs 393.4 / 63.8 / 25.5, rounded up. The normal
    # approximation 2 (z_a + z_b)^2 / d^2 = 392.4 / 62.8 / 24.5 (closed form), and Guenther's
    # correction adds z_a^2 / 4 = 0.96 per group, which recovers the exact t in all three cells
    # (Guenther 1981: the correction is exact to about one unit).
    sizes = _sizes("two_means", _two_means(), d)
    assert sizes["exact t"] == 2 * exact
    assert sizes["normal approximation"] == 2 * normal
    assert sizes["normal approximation, Guenther correction"] == 2 * exact
    assert 2 * (Z / d) ** 2 == pytest.approx({0.2: 392.4, 0.5: 62.8, 0.8: 24.5}[d], abs=0.06)


def test_two_sample_methods_against_statsmodels_and_closed_forms():
    # statsmodels' TTestIndPower (exact noncentral t) and NormalIndPower (z test) on random
    # designs with unequal allocation; our groups are each rounded up from the continuous root.
    rng = np.random.default_rng(18)
    for _ in range(12):
        d = rng.uniform(0.15, 1.2)
        r = rng.choice([0.5, 1.0, 2.0, 3.0])
        alpha = rng.choice([0.01, 0.05, 0.1])
        power = rng.choice([0.8, 0.9])
        test = _spec(1, alpha, 2.0, power)
        plan = _two_means(10.0, 10.0 * r)
        inputs = PlanInputs(
            DESIGNS["two_means"],
            {k: np.atleast_1d(np.asarray(v, dtype=float)) for k, v in plan.items()},
            np.array([d]),
            test,
        )
        exact = TTestIndPower().solve_power(effect_size=d, alpha=alpha, power=power, ratio=r)
        assert plan_methods.design_size(inputs)[0] == pytest.approx(exact, rel=1e-6)
        normal = NormalIndPower().solve_power(effect_size=d, alpha=alpha, power=power, ratio=r)
        # statsmodels counts the far tail too; it is negligible at these sizes.
        assert plan_methods.normal_two_groups(inputs)[0] == pytest.approx(normal, rel=1e-4)
        za, zb = special.ndtri(1 - alpha / 2), special.ndtri(power)
        closed = (za + zb) ** 2 * (1 + 1 / r) / d**2 + za**2 / (2 * (1 + r))
        assert plan_methods.guenther_two_groups(inputs)[0] == pytest.approx(
            max(closed, 1.0), rel=1e-12
        )


def test_one_sample_methods():
    # statsmodels' TTestPower for the exact t; the normal approximation (z_a + z_b)^2 / d^2 and
    # Guenther's z_a^2 / 2 (Guenther 1981) in closed form. For d = 0.5 (alpha .05 two-sided,
    # power .80): exact 33.4 -> 34, normal 31.4 -> 32, Guenther 33.3 -> 34.
    sizes = _sizes("one_mean", {"n1": np.nan, "sd": 1.0}, 0.5)
    exact = TTestPower().solve_power(effect_size=0.5, alpha=0.05, power=0.8)
    assert sizes["exact t"] == math.ceil(exact) == 34
    assert sizes["normal approximation"] == math.ceil((Z / 0.5) ** 2) == 32
    za = special.ndtri(0.975)
    assert sizes["normal approximation, Guenther correction"] == math.ceil(
        (Z / 0.5) ** 2 + za**2 / 2
    )
    paired = _sizes("paired_means", {"n1": np.nan, "sd": 8.0}, 4.0)
    assert paired == sizes  # d_z = 4 / 8 = 0.5: the same numbers


def test_ancova_methods():
    # Borm, Fransen & Lemmens (2007): adjusting for a covariate with correlation rho multiplies
    # the normal-approximation size by the design factor 1 - rho^2. d = 0.5, R^2 = 0.25: 62.8 x
    # 0.75 = 47.1 -> 48 per group. The noncentral t (df n1 + n2 - 3) is checked against a direct
    # scipy search over whole sizes.
    sizes = _sizes("two_means", _two_means(q=1.0, r2=0.25), 0.5)
    assert sizes["ANCOVA, normal approximation × (1 − R²)"] == 2 * math.ceil(
        2 * (Z / 0.5) ** 2 * 0.75
    )
    assert np.isnan(sizes["exact t"]) and np.isnan(sizes["normal approximation"])

    def power(n):
        se = math.sqrt(0.75) * math.sqrt(2 / n)
        df = 2 * n - 3
        c = stats.t.isf(0.025, df)
        return stats.nct.sf(c, df, 0.5 / se) + stats.nct.cdf(-c, df, 0.5 / se)

    n = next(n for n in range(3, 200) if power(n) >= 0.8)
    assert sizes["ANCOVA, noncentral t"] == 2 * n


# -- cluster trials ------------------------------------------------------------------------------


def _cluster(m=20.0, icc=0.05, cv=0.0, sd=1.0, r=1.0) -> dict:
    return {
        "n1": 10.0,
        "n2": 10.0 * r,
        "sd": sd,
        "icc": icc,
        "cluster_size": m,
        "cluster_size_cv": cv,
    }


def test_cluster_methods_closed_forms():
    # Donner & Klar (2000): individuals by the normal approximation x the design effect, in
    # clusters of m. d = 0.5, m = 20, ICC 0.05: DE = 1 + 19 x 0.05 = 1.95 (Kish 1965);
    # 62.8 x 1.95 / 20 = 6.12 -> 7 clusters per arm; Hayes & Bennett (1999) add one cluster per
    # arm (7.12 -> 8). With the exact t for individuals: 63.8 x 1.95 / 20 = 6.22 -> 7.
    sizes = _sizes("cluster_two_means", _cluster(), 0.5)
    deff = 1 + 19 * 0.05
    assert sizes["design effect × normal approximation"] == 2 * math.ceil(
        2 * (Z / 0.5) ** 2 * deff / 20
    )
    assert sizes["design effect × normal approximation, one extra cluster per arm"] == 2 * (
        math.ceil(2 * (Z / 0.5) ** 2 * deff / 20 + 1)
    )
    exact_individuals = TTestIndPower().solve_power(effect_size=0.5, alpha=0.05, power=0.8)
    assert sizes["design effect × exact t"] == 2 * math.ceil(exact_individuals * deff / 20)
    # Unequal cluster sizes: Eldridge, Ashby & Kerry (2006), DE = 1 + ((cv^2 + 1) m - 1) ICC.
    unequal = _sizes("cluster_two_means", _cluster(cv=0.5), 0.5)
    deff = 1 + ((0.25 + 1) * 20 - 1) * 0.05
    assert unequal["design effect × normal approximation"] == 2 * math.ceil(
        2 * (Z / 0.5) ** 2 * deff / 20
    )


def test_cluster_exact_t_on_clusters_against_a_direct_search():
    # The default: noncentral t on J - 2 df with the design-effect variance (scipy, whole
    # numbers of clusters per arm, 1:1).
    m, icc, d = 8.0, 0.1, 0.4
    deff = 1 + (m - 1) * icc

    def power(k):
        se = math.sqrt(deff * 2 / (k * m))
        df = 2 * k - 2
        c = stats.t.isf(0.025, df)
        return stats.nct.sf(c, df, d / se) + stats.nct.cdf(-c, df, d / se)

    k = next(k for k in range(2, 500) if power(k) >= 0.8)
    assert _sizes("cluster_two_means", _cluster(m=m, icc=icc), d)["exact t on clusters"] == 2 * k


def test_cluster_methods_reduce_to_individual_ones():
    # Clusters of one with no ICC are individuals: the design-effect methods give the
    # individually randomised sizes (a fact of the trade: DE = 1).
    cluster = _sizes("cluster_two_means", _cluster(m=1.0, icc=0.0), 0.3)
    single = _sizes("two_means", _two_means(), 0.3)
    assert cluster["design effect × normal approximation"] == single["normal approximation"]
    assert cluster["design effect × exact t"] == single["exact t"]


# -- two proportions -----------------------------------------------------------------------------


def _props(p1=0.1, r=1.0, cc=0.0) -> dict:
    return {"n1": 100.0, "n2": 100.0 * r, "p1": p1, "continuity_correction": cc}


def test_proportion_methods_on_fleiss_example():
    # Fleiss, Levin & Paik (2003), section 4.2: 0.10 against 0.20, alpha .05 two-sided, power
    # .80: 199 per group without, 219 with the continuity correction. Cohen's h = 0.2838:
    # 2 (2.8016 / 0.2838)^2 = 194.9 -> 195 per group (closed form). Unpooled variance:
    # 7.849 (0.09 + 0.16) / 0.01 = 196.2 -> 197 (closed form).
    sizes = _sizes("two_proportions", _props(), 0.1)
    assert sizes["Fleiss"] == 398
    assert sizes["Fleiss continuity correction"] == 438
    assert sizes["arcsine (Cohen's h)"] == 390
    assert sizes["normal approximation, unpooled variance"] == 394
    h = 2 * math.asin(math.sqrt(0.2)) - 2 * math.asin(math.sqrt(0.1))
    assert math.ceil(2 * (Z / h) ** 2) == 195


def test_arcsine_against_statsmodels_and_cohen():
    # statsmodels' NormalIndPower takes Cohen's h as the effect size (it counts the far
    # rejection tail too, which moves small sizes by a few parts in a million). Cohen (1988),
    # table 6.4.1: h = .20 needs 392 per group at power .80 (from memory); the closed form
    # gives 392.4, rounded up here to 393.
    rng = np.random.default_rng(6)
    for _ in range(10):
        p1, p2 = sorted(rng.uniform(0.05, 0.9, 2))
        r = rng.choice([1.0, 2.0, 0.5])
        inputs = PlanInputs(
            DESIGNS["two_proportions"],
            {k: np.atleast_1d(np.asarray(v, dtype=float)) for k, v in _props(p1, r).items()},
            np.array([p2 - p1]),
            _spec(1),
        )
        h = 2 * math.asin(math.sqrt(p2)) - 2 * math.asin(math.sqrt(p1))
        want = NormalIndPower().solve_power(effect_size=h, alpha=0.05, power=0.8, ratio=r)
        got = plan_methods.proportions_arcsine(inputs)[0]
        assert got == pytest.approx(max(want, 1.0, 1.0 / r), rel=1e-4)
    assert (Z / 0.2) ** 2 * 2 == pytest.approx(392.4, abs=0.05)


def test_continuity_correction_default_follows_the_row():
    # The audit's own method is the corrected test where the row asks for it: ties go to it.
    row = {"design": "two_proportions", "planned_p1": 0.1, "planned_p2": 0.2}
    result = _audit(
        [
            {**row, "planned_n1": 219, "planned_n2": 219, "continuity_correction": "yes"},
            {**row, "planned_n1": 199, "planned_n2": 199, "continuity_correction": "no"},
            {**row, "planned_n1": 219, "planned_n2": 219, "continuity_correction": "no"},
        ]
    )
    assert result.metrics["plan_reproduced_by"].tolist() == [
        "Fleiss continuity correction",
        "Fleiss",
        "Fleiss continuity correction",
    ]
    assert result.metrics["plan_discrepancy"].iat[2] == pytest.approx(438 / 398 - 1)


# -- correlation: Fisher z and the exact distribution of r ----------------------------------------


def _mp_tail(c: float, rho: float, n: float) -> float:
    """P(r >= c) by mpmath's adaptive quadrature of Hotelling's (1953) density, 25 digits."""
    mpmath.mp.dps = 25
    n, rho, c = mpmath.mpf(n), mpmath.mpf(rho), mpmath.mpf(c)

    def f(r):
        return (
            (n - 2)
            * mpmath.gamma(n - 1)
            * (1 - rho**2) ** ((n - 1) / 2)
            * (1 - r**2) ** ((n - 4) / 2)
            / (mpmath.sqrt(2 * mpmath.pi) * mpmath.gamma(n - 0.5) * (1 - rho * r) ** (n - 1.5))
            * mpmath.hyp2f1(0.5, 0.5, n - 0.5, (1 + rho * r) / 2)
        )

    points = [c, rho, 1] if rho > c else [c, 1]
    return float(mpmath.quad(f, points))


def _mixture_tail(c: float, rho: float, n: float) -> float:
    """The same tail by another exact route: given the x values, the t statistic of r is
    noncentral t on n - 2 df with noncentrality rho / sqrt(1 - rho^2) sqrt(V), V chi-square on
    n - 1 df (regression of y on x); integrated over V with scipy."""
    t = c * math.sqrt(n - 2) / math.sqrt(1 - c * c)
    theta = rho / math.sqrt(1 - rho * rho)

    def integrand(v):
        return stats.nct.sf(t, n - 2, theta * math.sqrt(v)) * stats.chi2.pdf(v, n - 1)

    lo, hi = stats.chi2.ppf([1e-12, 1 - 1e-12], n - 1)
    return integrate.quad(integrand, lo, hi, epsabs=1e-13, epsrel=1e-11, limit=200)[0]


def test_exact_r_tail_against_mpmath_and_the_mixture():
    rng = np.random.default_rng(21)
    for _ in range(30):
        n = float(rng.choice([4, 5, 7, 12, 30, 85, 300, 2000]))
        rho = rng.uniform(-0.9, 0.9)
        c = rng.uniform(-0.8, 0.9)
        got = float(r_tail(c, rho, n))
        tol = 1e-8 if n < 8 else 1e-11
        assert got == pytest.approx(_mp_tail(c, rho, n), abs=tol), (c, rho, n)
    for c, rho, n in [(0.2, 0.3, 85.0), (0.45, 0.6, 20.0), (0.1, 0.05, 900.0)]:
        assert float(r_tail(c, rho, n)) == pytest.approx(_mixture_tail(c, rho, n), abs=1e-9)


def test_exact_r_under_the_null_is_the_t_distribution():
    # rho = 0: r sqrt(n - 2) / sqrt(1 - r^2) is t on n - 2 df (closed form); power = alpha.
    n = np.array([4.0, 10.0, 50.0, 500.0])
    t = np.array([0.5, 1.7, 2.2, -1.0])
    c = t / np.sqrt(n - 2 + t * t)
    np.testing.assert_allclose(r_tail(c, 0.0, n), stats.t.sf(t, n - 2), atol=1e-9)
    for sides in (1.0, 2.0):
        np.testing.assert_allclose(r_power(0.0, n, 0.05, sides), 0.05, atol=1e-9)
    # The critical value is that of the t test of the slope.
    assert float(r_critical(20, 0.05, 2)) == pytest.approx(
        stats.t.isf(0.025, 18) / math.sqrt(18 + stats.t.isf(0.025, 18) ** 2)
    )


def test_exact_r_power_rises_with_n_and_rho():
    # Common practice: power rises with the sample size and with the effect.
    n = np.arange(5.0, 200.0)
    p = r_power(np.full(n.shape, 0.3), n, 0.05, 2.0)
    assert np.all(np.diff(p) > 0)
    rho = np.linspace(0.0, 0.9, 50)
    p = r_power(rho, np.full(rho.shape, 30.0), 0.05, 2.0)
    assert np.all(np.diff(p) > 0)


@pytest.mark.parametrize("r,n", [(0.1, 782), (0.3, 84), (0.7, 13), (0.9, 6)])
def test_exact_r_sizes_on_cohens_table(r, n):
    # Cohen (1988), table 3.4.1 (alpha .05 two-sided, power .80): 782 / 84 / 13 / 6 pairs for
    # r = .10 / .30 / .70 / .90 (from memory). Fisher's z needs 783 / 85 / 14 / 7. The exact
    # answer is the smallest n whose exact power reaches .80: checked around it directly.
    sizes = _sizes("correlation", {"n1": np.nan}, r)
    assert sizes["exact r"] == n
    assert sizes["Fisher z"] == math.ceil((Z / math.atanh(r)) ** 2 + 3)
    assert r_power(r, n, 0.05, 2) >= 0.8 > r_power(r, n - 1, 0.05, 2)


def test_exact_r_sizes_are_the_smallest_reaching_the_target():
    # Random settings, one-sided and two-sided, negative correlations with direction decrease:
    # each size reaches the target and one pair fewer does not (mpmath for the power there).
    rng = np.random.default_rng(3)
    rho = rng.uniform(0.05, 0.85, 8)
    alpha = rng.choice([0.01, 0.05], 8)
    sides = rng.choice([1.0, 2.0], 8)
    power = rng.choice([0.8, 0.9], 8)
    fisher = (special.ndtri(1 - alpha / sides) + special.ndtri(power)) ** 2 / np.arctanh(
        rho
    ) ** 2 + 3
    n = exact_r_size(rho, alpha, sides, power, fisher)
    for i in range(8):

        def exact_power(m, i=i):
            c = float(r_critical(m, alpha[i], sides[i]))
            p = _mp_tail(c, rho[i], m)
            return p + (_mp_tail(c, -rho[i], m) if sides[i] == 2 else 0.0)

        assert exact_power(n[i]) >= power[i] > exact_power(n[i] - 1) or n[i] == 4
    # Far from the Fisher-z guess, the search still finds it.
    assert exact_r_size(0.3, 0.05, 2, 0.8, 400.0)[0] == 84
    assert exact_r_size(0.3, 0.05, 2, 0.8, 10.0)[0] == 84


# -- F tests -----------------------------------------------------------------------------------


def test_noncentral_chi_square_lambda():
    # Cohen (1988), table 9.4.2 (v = infinity): lambda = 7.85 for u = 1 and 9.64 for u = 2 at
    # alpha .05, power .80 (from memory); checked with scipy's ncx2. N = lambda / f^2.
    for u, lam in [(1, 7.85), (2, 9.64)]:
        crit = stats.chi2.isf(0.05, u)
        root = special.chndtrinc(crit, u, 0.2)
        assert root == pytest.approx(lam, abs=0.01)
        assert stats.ncx2.sf(crit, u, root) == pytest.approx(0.8, abs=1e-9)
    sizes = _sizes("regression", {"n1": np.nan, "predictors": 2.0, "covariates": 0.0}, 0.15)
    assert sizes["noncentral chi-square (large sample)"] == math.ceil(
        special.chndtrinc(stats.chi2.isf(0.05, 2), 2, 0.2) / 0.15
    )
    # Finite error df need a little more than the large-sample N (fact of the trade).
    assert sizes["noncentral F"] > sizes["noncentral chi-square (large sample)"]


def test_regression_with_cohens_lambda_against_scipy():
    # Cohen's lambda = f^2 (u + v + 1) = f^2 (N - q) with q covariates partialled out: the
    # smallest N whose noncentral F power reaches the target (scipy's ncf, whole N).
    f2, u, q = 0.09, 2, 3

    def power(n):
        dfd = n - u - q - 1
        return stats.ncf.sf(stats.f.isf(0.05, u, dfd), u, dfd, f2 * (n - q))

    n = next(n for n in range(u + q + 2, 1000) if power(n) >= 0.8)
    sizes = _sizes("regression", {"n1": np.nan, "predictors": u, "covariates": q}, f2)
    assert sizes["noncentral F, λ = f²(N − q)"] == n
    assert sizes["noncentral F"] < n  # lambda = f^2 N is the larger noncentrality
    # Without covariates the two noncentralities are one: the method does not apply.
    plain = _sizes("regression", {"n1": np.nan, "predictors": u, "covariates": 0.0}, f2)
    assert np.isnan(plain["noncentral F, λ = f²(N − q)"])


def test_k_means_chi_square_in_equal_groups():
    # k = 3, f = 0.25: lambda(chi-square, 2 df) = 9.64 (above), N = 9.64 / 0.0625 = 154.2, so
    # 3 groups of 52; the noncentral F needs 157.2, so 3 groups of 53 (Cohen 1988, table 8.4.4
    # gives 52 per group, from memory).
    sizes = _sizes("k_means", {"n1": np.nan, "groups": 3.0}, 0.25)
    assert sizes["noncentral F"] == 159
    assert sizes["noncentral chi-square (large sample)"] == 3 * math.ceil(
        special.chndtrinc(stats.chi2.isf(0.05, 2), 2, 0.2) / 0.0625 / 3
    )


# -- survival: Schoenfeld and Freedman ----------------------------------------------------------


def _surv(events=380.0, n1=500.0, n2=500.0) -> dict:
    return {"n1": n1, "n2": n2, "events": events, "share": n1 / (n1 + n2)}


@pytest.mark.parametrize("hr,schoenfeld,freedman", [(0.75, 380, 385), (0.5, 66, 71)])
def test_events_by_schoenfeld_and_freedman(hr, schoenfeld, freedman):
    # Schoenfeld (1983): 4 (z_a + z_b)^2 / ln(HR)^2 = 380 events for HR 0.75 and 66 for 0.5.
    # Freedman (1982): (z_a + z_b)^2 (1 + HR)^2 / (1 - HR)^2 = 384.6 -> 385 and 70.6 -> 71
    # (Machin et al., Sample Size Tables for Clinical Studies, give 71 for HR 0.5, from memory).
    # With every patient having an event, patients equal events (rounded up per group).
    design = DESIGNS["survival"]
    plan = {k: np.atleast_1d(v) for k, v in _surv(1000.0).items()}
    inputs = PlanInputs(design, plan, np.array([hr]), _spec(1, direction=-1.0))
    assert math.ceil(plan_methods.schoenfeld(inputs)[0]) == schoenfeld
    assert math.ceil(plan_methods.freedman(inputs)[0]) == freedman
    assert math.ceil(Z**2 * (1 + hr) ** 2 / (1 - hr) ** 2) == freedman


def test_freedman_with_unequal_allocation():
    # Closed form with phi = n2 / n1 (derived from the log-rank O - E under H1, Freedman 1982),
    # and a fact of it: swapping the groups (phi -> 1/phi, HR -> 1/HR) gives the same events.
    design = DESIGNS["survival"]
    for phi, hr in [(2.0, 0.7), (0.5, 1.0 / 0.7), (3.0, 1.4)]:
        plan = {k: np.atleast_1d(v) for k, v in _surv(300.0, 100.0, 100.0 * phi).items()}
        inputs = PlanInputs(design, plan, np.array([hr]), _spec(1, direction=np.sign(hr - 1)))
        got = plan_methods.freedman(inputs)[0]
        assert got == pytest.approx(Z**2 * (1 + phi * hr) ** 2 / (phi * (1 - hr) ** 2))
    a = PlanInputs(
        design, {k: np.atleast_1d(v) for k, v in _surv(300.0, 100.0, 200.0).items()},
        np.array([0.7]), _spec(1, direction=-1.0),
    )  # fmt: skip
    b = PlanInputs(
        design, {k: np.atleast_1d(v) for k, v in _surv(300.0, 200.0, 100.0).items()},
        np.array([1 / 0.7]), _spec(1),
    )  # fmt: skip
    assert plan_methods.freedman(a)[0] == pytest.approx(plan_methods.freedman(b)[0])


# -- the registry ---------------------------------------------------------------------------------


def test_every_design_with_sizes_has_registered_methods():
    # A new design registers its published methods in audit/plan_methods.py (one call).
    for name, design in DESIGNS.items():
        if design.size_keys:
            entry = plan_methods.PLAN_METHODS.get(name)
            assert entry is not None, f"{name}: register its methods in audit/plan_methods.py"
            assert len(entry.methods) >= 2


def _random_plans(rng: np.random.Generator, k: int) -> pd.DataFrame:
    """Random plans of every design with sizes, 1:1 (or 2:1) allocation."""
    from tests.test_designs_all import _random_rows

    rows = _random_rows(rng, k)
    return rows[rows["design"] != "estimate"].reset_index(drop=True)


def test_the_default_method_is_the_designs_own_required_size():
    # n_required_plan comes from the registry's default method: it must equal each design's own
    # required_size on random rows (every rounding convention kept).
    from audit.metrics import test_settings
    from audit.read import raw_from_frame
    from audit.validate import validate
    from tests.test_designs_all import _random_rows

    rows = _random_rows(np.random.default_rng(44), 400)
    validated = validate(raw_from_frame(rows))
    table = validated.table[validated.valid]
    checked = 0
    for name, design in DESIGNS.items():
        part = table[table["design"] == name]
        if not len(part) or not design.size_keys:
            continue
        plan = design.scenario(part, "planned")
        test = test_settings(part, design)
        effect = design.planned_effect(part)
        own = design.required_size(plan, effect, test)
        rep = reproduce(
            design, plan, effect, test, design.total_size(plan), np.full(len(part), np.nan)
        )
        np.testing.assert_array_equal(rep.metrics["n_required_plan"], own, err_msg=name)
        checked += int(np.isfinite(own).sum())
    assert checked > 100


# -- a plan made with each method is recognised --------------------------------------------------

#: One planned row per design (1:1), and the effect column(s) it sets.
BASES = {
    "one_mean": {"planned_sd": 10.0, "planned_effect": 4.0},
    "paired_means": {"planned_sd": 6.0, "planned_effect": 2.5},
    "two_means": {"planned_sd": 12.0, "planned_effect": 5.0},
    "two_means_ancova": {"planned_sd": 12.0, "planned_effect": 5.0, "covariates": 1,
                         "covariate_r2": 0.3},
    "cluster_two_means": {"planned_sd": 1.0, "planned_effect": 0.35, "planned_icc": 0.04,
                          "planned_cluster_size": 15.0, "cluster_size_cv": 0.4},
    "two_proportions": {"planned_p1": 0.3, "planned_p2": 0.45},
    "two_proportions_cc": {"planned_p1": 0.3, "planned_p2": 0.45, "continuity_correction": "yes"},
    "correlation": {"planned_effect": 0.35},
    "k_means": {"planned_effect": 0.3, "groups": 4},
    "regression": {"planned_effect": 0.08, "predictors": 3, "covariates": 2},
    "survival": {"planned_effect": 0.7},
    # The designs of issue 16 (their methods: see audit/plan_methods.py).
    "crossover": {"planned_sd": 8.0, "planned_effect": 3.0},
    "paired_proportions": {"planned_p1": 0.1, "planned_p2": 0.2},
    "two_rates": {"planned_rate1": 0.8, "planned_rate2": 0.6, "exposure": 1.0,
                  "dispersion": 0.4},
    "stepped_wedge": {"planned_sd": 1.0, "planned_effect": 0.3, "planned_icc": 0.05,
                      "planned_cluster_size": 10.0, "periods": 5},
    "cluster_two_proportions": {"planned_p1": 0.3, "planned_p2": 0.2, "planned_icc": 0.03,
                                "planned_cluster_size": 25.0},
}  # fmt: skip


def _design_of(key: str) -> str:
    return key.removesuffix("_ancova").removesuffix("_cc")


def _plan_made_with(key: str, method_index: int) -> dict | None:
    """A row whose planned size is what method ``method_index`` of its design requires."""
    name = _design_of(key)
    design = DESIGNS[name]
    base = {"design": name, **BASES[key]}
    probe = pd.DataFrame([{"study_id": "probe", **base, "planned_n1": 100, "planned_n2": 100,
                           "planned_events": 300, "realized_n1": 100}])  # fmt: skip
    from audit.metrics import test_settings
    from audit.read import raw_from_frame
    from audit.validate import validate

    table = validate(raw_from_frame(probe)).table
    plan = design.scenario(table, "planned")
    test = test_settings(table, design)
    effect = design.planned_effect(table)
    rep = reproduce(design, plan, effect, test, design.total_size(plan), np.full(1, np.nan))
    groups = rep.groups[method_index]
    sizes = [float(size[0]) for size, _ in groups]
    if not all(np.isfinite(sizes)):
        return None  # the method does not apply to this row
    row = {**base}
    if name == "survival":
        # Patients fixed at 1000 (1:1): the plan's events are the method's events.
        events = math.ceil(float(plan_methods.methods_for(design).methods[method_index].size(
            PlanInputs(design, plan, effect, test))[0]) * (1 - 1e-12))  # fmt: skip
        row.update(planned_n1=500, planned_n2=500, planned_events=events)
    elif name == "k_means":
        row.update(planned_n1=sizes[0] * float(groups[0][1][0]))
    elif len(groups) == 1:  # one sample, or equal sequences (crossover, stepped wedge)
        row.update(planned_n1=sizes[0] * float(np.asarray(groups[0][1]).ravel()[0]))
    else:
        row.update(planned_n1=sizes[0], planned_n2=sizes[1])
    return row


@pytest.mark.parametrize("key", list(BASES))
def test_a_plan_made_with_each_method_is_recognised(key):
    name = _design_of(key)
    methods = plan_methods.PLAN_METHODS[name].methods
    rows, made_with = [], []
    for i, method in enumerate(methods):
        row = _plan_made_with(key, i)
        if row is not None:
            rows.append(row)
            made_with.append(method.name)
    assert len(rows) >= 2, key
    result = _audit(rows)
    assert result.errors.empty, result.error_sentences()
    m = result.metrics
    for pos, method in enumerate(made_with):
        # The method's own size reproduces the plan exactly. Where another method gives the
        # same size the tie goes to the audit's default, then to the method listed first.
        assert m["plan_discrepancy_closest"].iat[pos] == 0.0, (key, method)
        by = m["plan_reproduced_by"].iat[pos]
        assert by == m["plan_closest_method"].iat[pos]
        if by != method:
            names = [x.name for x in methods]
            assert names.index(by) < names.index(method) or m["plan_discrepancy"].iat[pos] == 0
        flagged = result.findings.loc[
            result.findings["rule"] == "sample-size-not-reproducible", "pos"
        ]
        assert pos not in flagged.tolist()
    # Most methods give a size of their own on these rows: each is named for its plan.
    distinct = sum(m["plan_reproduced_by"].iat[p] == meth for p, meth in enumerate(made_with))
    # Woertman's design effect is Hussey & Hughes' variance in another form (Woertman et al.
    # 2013): the two differ only by where a planner rounds, so a Woertman plan is a tie.
    assert distinct >= (1 if name == "stepped_wedge" else 2), (key, m["plan_reproduced_by"])


def test_a_plan_no_method_reproduces_fires_the_rule():
    # 30 % above every method's size: no method reproduces it; the rule fires and names the
    # closest; the note lists each method's size.
    rows = []
    for key in BASES:
        methods = plan_methods.PLAN_METHODS[_design_of(key)].methods
        row = next(r for i in range(len(methods)) if (r := _plan_made_with(key, i)))
        for column in ("planned_n1", "planned_n2", "planned_events"):
            if column in row:
                row[column] = math.ceil(row[column] * 1.3)
        if row["design"] == "survival":
            row["planned_events"] = math.ceil(row["planned_events"] * 1.3 / 1.3)
            row["planned_n1"], row["planned_n2"] = 380, 380  # fewer patients for the events
        rows.append(row)
    result = _audit(rows)
    assert result.errors.empty, result.error_sentences()
    m = result.metrics
    assert m["plan_reproduced_by"].isna().all(), m["plan_reproduced_by"].tolist()
    assert (m["plan_discrepancy_closest"].abs() > 0.10).all()
    flags = result.findings[result.findings["rule"] == "sample-size-not-reproducible"]
    assert sorted(flags["pos"]) == list(range(len(rows)))
    for pos, message in zip(flags["pos"], flags["message"], strict=True):
        assert m["plan_closest_method"].iat[pos] in message
        assert "n/a" not in message
    notes = result.notes["text"]
    listed = notes[notes.str.startswith("plan_reproduced_by: no listed method")]
    assert len(listed) == len(rows)


def test_plan_reproduced_by_is_the_closest_within_tolerance():
    # The closest method is named even where the audit's default also reproduces the plan;
    # a note is added only where the default alone would not have.
    base = {"design": "two_means", "effect_scale": "d", "planned_effect": 0.5}
    result = _audit(
        [
            {**base, "planned_n1": 63, "planned_n2": 63},  # normal 63 exact; exact t -1.6 %
            {**base, "planned_n1": 57, "planned_n2": 57},  # -9.5 % normal; -11 % exact t
            {**base, "planned_n1": 64, "planned_n2": 64},  # exact t, Guenther: tie to default
        ]
    )
    m = result.metrics
    assert m["plan_reproduced_by"].tolist() == [
        "normal approximation",
        "normal approximation",
        "exact t",
    ]
    assert m["plan_discrepancy"].tolist() == pytest.approx([126 / 128 - 1, 114 / 128 - 1, 0])
    assert m["plan_discrepancy_closest"].tolist() == pytest.approx([0, 114 / 126 - 1, 0])
    notes = result.notes
    only_other = notes[notes["text"].str.startswith("the planned size reproduces only with")]
    assert only_other["pos"].tolist() == [1]
    assert "normal approximation requires 126 units" in only_other["text"].iat[0]


# -- dropout --------------------------------------------------------------------------------------


def test_dropout_divides_each_group_and_rounds_up():
    # 64 per group (Cohen 1988) with 15 % dropout: 64 / 0.85 = 75.3 -> 76 per group, 152 to
    # recruit (the planner's rounding per group; the total 128 / 0.85 = 150.6 would give 151).
    base = {"design": "two_means", "effect_scale": "d", "planned_effect": 0.5,
            "planned_dropout": 0.15}  # fmt: skip
    result = _audit([{**base, "planned_n1": 76, "planned_n2": 76}])
    m = result.metrics.iloc[0]
    assert m["n_required_plan"] == 128
    assert m["n_required_with_dropout"] == 152
    assert m["plan_discrepancy"] == 0
    assert m["plan_reproduced_by"] == "exact t"
    note = [t for t in result.notes["text"] if t.startswith("planned_dropout")]
    assert note and "15%" in note[0] and "128 analysable units need 152 recruited" in note[0]
    # Unequal allocation (2:1): each group is divided, kept apart.
    result = _audit([{**base, "planned_n1": 40, "planned_n2": 80, "planned_dropout": 0.2}])
    m = result.metrics.iloc[0]
    n1 = TTestIndPower().solve_power(effect_size=0.5, alpha=0.05, power=0.8, ratio=2.0)
    g1, g2 = math.ceil(n1), math.ceil(2 * n1)
    assert m["n_required_with_dropout"] == math.ceil(g1 / 0.8) + math.ceil(g2 / 0.8)


def test_an_unstated_dropout_is_only_guessed_in_a_note():
    # 71 per group: +11 % against 64 (no method reproduces it), but 64 / 0.9 = 71.1 -> 72 per
    # group would (-1.4 %): a note says so as a guess, the rule still fires.
    base = {"design": "two_means", "effect_scale": "d", "planned_effect": 0.5,
            "planned_n1": 71, "planned_n2": 71}  # fmt: skip
    result = _audit([base, {**base, "planned_dropout": 0.0}])
    assert result.metrics["plan_reproduced_by"].isna().all()
    guess = result.notes[result.notes["text"].str.startswith("a guess")]
    assert guess["pos"].tolist() == [0]  # a stated 0 is not second-guessed
    assert "exact t and a 10% dropout allowance" in guess["text"].iat[0]
    assert "fill planned_dropout" in guess["text"].iat[0]
    assert sorted(result.findings.loc[
        result.findings["rule"] == "sample-size-not-reproducible", "pos"]) == [0, 1]  # fmt: skip


def test_bad_dropout_is_a_row_error_naming_the_column():
    base = {"design": "two_means", "effect_scale": "d", "planned_effect": 0.5,
            "planned_n1": 70, "planned_n2": 70}  # fmt: skip
    result = _audit([{**base, "planned_dropout": v} for v in ("1", "1.2", "-0.1", "x", "15%")])
    assert result.status.tolist() == ["invalid"] * 4 + ["audited"]
    errors = result.errors
    assert set(errors["column"]) == {"planned_dropout"}
    assert all("[0, 1)" in r or "not a number" in r for r in errors["reason"])
    assert result.metrics["n_required_with_dropout"].iat[4] == 2 * math.ceil(64 / 0.85)


def test_dropout_on_an_estimate_row_is_noted_as_unused():
    result = _audit([{"design": "estimate", "realized_se": 1.0, "planned_dropout": 0.1}])
    assert any("planned_dropout" in t and "not used" in t for t in result.notes["text"])


# -- the tolerance in force ------------------------------------------------------------------------


def test_the_rules_tolerance_decides_plan_reproduced_by():
    # 63 per group against 64 (exact t, -1.6 %) and 63 (normal approximation, exact): a
    # tolerance of 1.5 % keeps only the normal approximation; 65 per group (+1.6 % against the
    # exact t, +3.2 % against the normal) is then reproduced by none, and the rule fires.
    base = {"design": "two_means", "effect_scale": "d", "planned_effect": 0.5}
    rows = [{**base, "planned_n1": n, "planned_n2": n} for n in (63, 65)]
    strict = {"override": {"sample-size-not-reproducible": {"max_discrepancy": 0.015}}}
    result = _audit(rows, rules=strict)
    assert result.settings["plan_reproduction_tolerance"] == 0.015
    m = result.metrics
    assert m["plan_reproduced_by"].iat[0] == "normal approximation"
    assert pd.isna(m["plan_reproduced_by"].iat[1])
    flags = result.findings[result.findings["rule"] == "sample-size-not-reproducible"]
    assert flags["pos"].tolist() == [1]
    assert "exact t" in flags["message"].iat[0]
    # The signed value is sharpened against the threshold on its side: "+2%" would read as
    # the 1.5 % tolerance does.
    assert "+1.6%" in flags["message"].iat[0]
    # Switched off, the rule's parameter still sets the metric.
    off = {"override": {"sample-size-not-reproducible": {"max_discrepancy": 0.015,
                                                          "enabled": False}}}  # fmt: skip
    quiet = _audit(rows, rules=off)
    assert quiet.metrics["plan_reproduced_by"].tolist() == m["plan_reproduced_by"].tolist()
    assert not (quiet.findings["rule"] == "sample-size-not-reproducible").any()
    # The bundled tolerance is the rule file's.
    assert plan_methods.bundled_tolerance() == 0.10
    assert audit.load_rules().get("sample-size-not-reproducible").param_values() == {
        "max_discrepancy": 0.10
    }


def test_reproduction_metrics_are_null_with_a_note_when_the_plan_cannot_be_redone():
    result = _audit(
        [
            {"design": "two_means", "planned_sd": 10, "planned_n1": 50, "planned_n2": 50},
            {"design": "survival", "planned_effect": 0.7, "planned_events": 200},
        ]
    )
    for metric in REPRODUCTION_METRICS:
        for pos in (0, 1):
            assert pd.isna(result.metrics[metric].iat[pos])
            texts = result.notes.loc[result.notes["pos"] == pos, "text"]
            assert any(t.startswith(f"{metric}:") for t in texts), (metric, pos)


def test_the_study_view_and_respond_state_the_method():
    import io

    from rich.console import Console

    from audit.report import THEME, render_study
    from audit.respond import respond_text

    base = {"design": "two_means", "effect_scale": "d", "planned_effect": 0.5,
            "realized_n1": 60, "realized_n2": 60}  # fmt: skip
    result = _audit(
        [
            {**base, "planned_n1": 57, "planned_n2": 57},
            {**base, "planned_n1": 80, "planned_n2": 80, "planned_dropout": 0.1},
        ]
    )
    console = Console(file=io.StringIO(), width=160, color_system=None, theme=THEME)
    render_study(result, console, [0, 1])
    text = " ".join(console.file.getvalue().split())
    assert "sample size: reproduced by normal approximation: 126 units" in text
    assert "planned 114 (-9.5%)" in text
    assert "not reproduced within 10% by any listed method; the closest, exact t" in text
    assert "with the stated 10% dropout allowance" in text
    first = respond_text(result, "S0")
    assert (
        "with the normal approximation, that calculation requires 126 analysable units, in "
        "line with the planned size" in first
    )
    second = respond_text(result, "S1")
    assert "does not reproduce with any of the standard methods" in second
    assert (
        "the exact t, requires 144 units to be recruited, allowing for the stated 10% "
        "dropout," in second
    )
    assert "11% larger" in second


def test_random_rows_with_dropout_keep_their_invariants():
    # Random rows of every design, a third with a dropout allowance: every null reproduction
    # metric has a note; the allowance never lowers a size; the closest method is at least as
    # close as the audit's own; plan_reproduced_by is set exactly where the closest is within
    # the tolerance; the rule fires exactly where it is not.
    from tests.test_designs_all import _explained, _random_rows

    rng = np.random.default_rng(1818)
    rows = _random_rows(rng, 300)
    rows["planned_dropout"] = np.where(rng.uniform(size=300) < 0.33, rng.uniform(0, 0.4, 300), None)
    result = audit.audit_table(rows)
    m = result.metrics[result.valid]
    assert len(m) > 200
    notes = result.by_row(result.notes, "text")
    for pos in np.flatnonzero(result.valid):
        for metric in REPRODUCTION_METRICS:
            if pd.isna(result.metrics[metric].iat[pos]):
                design = result.table["design"].iat[pos]
                assert design == "estimate" or _explained(metric, notes[pos]), (metric, pos)
    known = m["n_required_plan"].notna()
    assert (m.loc[known, "n_required_with_dropout"] >= m.loc[known, "n_required_plan"]).all()
    closest = m["plan_discrepancy_closest"].abs()
    compared = m["plan_discrepancy"].notna()
    assert compared.sum() > 100
    assert (closest[compared] <= m.loc[compared, "plan_discrepancy"].abs() + 1e-12).all()
    within = closest <= 0.10
    assert (m["plan_reproduced_by"].notna() == within).all()
    flagged = set(
        result.findings.loc[result.findings["rule"] == "sample-size-not-reproducible", "pos"]
    )
    positions = np.flatnonzero(result.valid)
    assert flagged == {p for p, w, c in zip(positions, within, closest, strict=True)
                       if not w and np.isfinite(c)}  # fmt: skip


# -- the methods of the designs of issue 16 --------------------------------------------------------


def _inputs(name: str, row: dict) -> PlanInputs:
    from audit.metrics import test_settings
    from audit.read import raw_from_frame
    from audit.validate import validate

    frame = pd.DataFrame([{"study_id": "x", "design": name, **row}])
    table = validate(raw_from_frame(frame)).table
    design = DESIGNS[name]
    return PlanInputs(
        design, design.scenario(table, "planned"), design.planned_effect(table),
        test_settings(table, design),
    )  # fmt: skip


def test_rate_ratio_variances_under_h0_and_h1_match_statsmodels():
    # statsmodels' power_negbin_ratio_2indep: method_var="score" is the variance at the pooled
    # rate under H0, "alt" at the true rates; ours per first-arm unit, so times 1 / n1 there.
    from statsmodels.stats.rates import power_negbin_ratio_2indep, power_poisson_ratio_2indep

    for rate1, rate2, k, ratio in [(0.8, 0.6, 0.4, 1.0), (2.5, 1.5, 0.8, 2.0), (0.3, 0.45, 0, 1)]:
        inputs = _inputs("two_rates", {"planned_rate1": rate1, "planned_rate2": rate2,
                                       "dispersion": k, "exposure": 1.5, "planned_n1": 100,
                                       "planned_n2": 100 * ratio})  # fmt: skip
        v1, v0 = plan_methods._rate_variances(inputs)
        with np.errstate(all="ignore"):
            # Group 1 = the control arm, as ours; Poisson counts through the Poisson function.
            ref = power_negbin_ratio_2indep(
                rate1, rate2, 100, nobs_ratio=ratio, exposure=1.5, value=1, alpha=0.05,
                dispersion=k, alternative="two-sided", method_var="score",
            ) if k else power_poisson_ratio_2indep(
                rate1, rate2, 100, nobs_ratio=ratio, exposure=1.5, value=1, alpha=0.05,
                alternative="two-sided", method_var="score",
            )  # fmt: skip
        assert v0[0] == pytest.approx(ref.std_null**2, rel=1e-6)
        assert v1[0] == pytest.approx(ref.std_alt**2, rel=1e-6)


def test_miettinen_pairs_reach_the_target_in_simulated_mcnemar_tests():
    # Miettinen's variance (Miettinen 1968, as given by Connor 1987): at p1 = 0.1, p2 = 0.2 the
    # McNemar z test with 229 pairs has power 0.80 in 200,000 simulated trials (numpy's
    # multinomial draws; the simulation's SE is 0.001), Connor's 234 pairs slightly more.
    inputs = _inputs("paired_proportions", {"planned_p1": 0.1, "planned_p2": 0.2})
    n = plan_methods.paired_miettinen(inputs)[0]
    assert math.ceil(n) == 229
    rng = np.random.default_rng(20261202)
    draws = rng.multinomial(229, [0.1, 0.2, 0.7], size=200_000)
    b, c = draws[:, 0], draws[:, 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (c - b) / np.sqrt(b + c)
    assert np.mean(np.abs(z) > 1.959964) == pytest.approx(0.80, abs=0.004)


def test_cluster_proportions_by_the_design_effect():
    # Donner, Birkett & Buck (1981): the individually randomised size times the design effect.
    # Fleiss, Levin & Paik: 199 per group for 0.10 against 0.20 (section 4.2); clusters of 20
    # at ICC 0.05 have Kish's design effect 1.95: 199 x 1.95 / 20 = 19.4, so 20 clusters per
    # arm, 21 with Hayes & Bennett's extra cluster.
    inputs = _inputs(
        "cluster_two_proportions",
        {"planned_p1": 0.1, "planned_p2": 0.2, "planned_icc": 0.05, "planned_cluster_size": 20,
         "planned_n1": 20, "planned_n2": 20},
    )  # fmt: skip
    per_arm = plan_methods.cluster_fleiss(inputs)[0]
    assert per_arm == pytest.approx(198.98 * 1.95 / 20, rel=2e-4)
    assert math.ceil(per_arm) == 20
    assert math.ceil(plan_methods.cluster_fleiss_plus_one(inputs)[0]) == 21


def test_a_stated_dropout_leaves_the_analysable_units_the_plan_expected():
    # A plan to recruit 100 per group allowing 20 % dropout expects 80 analysable per group: its
    # power is that of 80 per group (statsmodels TTestIndPower, d = 0.5), and 80 analysed per
    # group is the plan kept (n_ratio 1, no size-short-of-plan finding).
    from statsmodels.stats.power import TTestIndPower

    row = {"study_id": "d", "design": "two_means", "effect_scale": "d", "planned_effect": 0.5,
           "planned_n1": 100, "planned_n2": 100, "planned_dropout": 0.2, "realized_n1": 80,
           "realized_n2": 80}  # fmt: skip
    result = _audit([row])
    m = result.metrics
    expected = TTestIndPower().power(effect_size=0.5, nobs1=80, alpha=0.05, ratio=1.0)
    assert m["plan_power"].iat[0] == pytest.approx(expected, rel=1e-9)
    assert m["n_ratio"].iat[0] == pytest.approx(1.0)
    assert "size-short-of-plan" not in set(result.findings["rule"])
    # The stated calculation is still compared with the 200 to recruit: 64 per group (Cohen)
    # need ceil(64 / 0.8) = 80 recruited per group, so 200 is 25 % above that.
    assert m["n_required_with_dropout"].iat[0] == 160
    assert m["plan_discrepancy"].iat[0] == pytest.approx(200 / 160 - 1)
