"""The test of excess significance and the Poisson-binomial distribution (audit/excess.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from audit.excess import excess_significance_test, poisson_binomial_pmf, poisson_binomial_sf


def _pmf_by_recursion(p: np.ndarray) -> np.ndarray:
    """The Poisson-binomial pmf by the textbook recursion over trials (O(n^2)), written here
    independently of the divide-and-conquer product in audit/excess.py."""
    pmf = np.array([1.0])
    for q in p:
        nxt = np.zeros(len(pmf) + 1)
        nxt[:-1] += pmf * (1 - q)
        nxt[1:] += pmf * q
        pmf = nxt
    return pmf


@pytest.mark.parametrize("n", [1, 2, 3, 5, 17, 64, 65, 200, 1500])
def test_pmf_against_scipy_and_recursion(n):
    # Reference: scipy.stats.poisson_binom (computed with scipy) and the recursion above.
    rng = np.random.default_rng(n)
    p = rng.uniform(0, 1, n)
    got = poisson_binomial_pmf(p)
    np.testing.assert_allclose(got, stats.poisson_binom(p).pmf(np.arange(n + 1)), atol=1e-14)
    np.testing.assert_allclose(got, _pmf_by_recursion(p), atol=1e-14)


def test_pmf_equal_probabilities_is_binomial():
    # Common fact: with equal success probabilities the Poisson-binomial is the binomial
    # (reference computed with scipy.stats.binom).
    got = poisson_binomial_pmf(np.full(300, 0.37))
    np.testing.assert_allclose(got, stats.binom.pmf(np.arange(301), 300, 0.37), atol=1e-14)


def test_far_tail_keeps_relative_accuracy():
    # P(X >= k) far above the mean, against the sum of scipy's pmf over the tail (scipy's own
    # sf is 1 - cdf and bottoms out near 1e-16, so the pmf is summed instead).
    rng = np.random.default_rng(1)
    p = rng.uniform(0.05, 0.95, 2500)
    ref = stats.poisson_binom(p)
    for k in (1300, 1400, 1500, 1700):
        expected = ref.pmf(np.arange(k, len(p) + 1)).sum()
        assert poisson_binomial_sf(k, p) == pytest.approx(expected, rel=1e-8)
    # Degenerate ends: nothing is certain, all must succeed, impossible.
    assert poisson_binomial_sf(0, p) == 1.0
    assert poisson_binomial_sf(len(p), p) == pytest.approx(np.prod(p), rel=1e-9)
    assert poisson_binomial_sf(3, [0.5, 0.0, 0.5]) == 0.0


def test_pmf_of_a_large_portfolio_keeps_its_moments():
    # 100 000 studies (its time is measured in benchmarks/run.py, not here).
    p = np.random.default_rng(2).uniform(0.02, 0.98, 100_000)
    pmf = poisson_binomial_pmf(p)
    tail = poisson_binomial_sf(int(p.sum() + 8 * np.sqrt(p @ (1 - p))), p)
    assert pmf.sum() == pytest.approx(1.0)
    # mean and variance of the distribution (facts: sum p and sum p(1 - p))
    k = np.arange(len(pmf))
    assert pmf @ k == pytest.approx(p.sum(), rel=1e-10)
    assert pmf @ (k - p.sum()) ** 2 == pytest.approx(p @ (1 - p), rel=1e-8)
    assert 0 < tail < 1e-12


def test_excess_equal_powers_against_scipy_binomtest():
    # A hand-made portfolio: 12 studies, each with power 0.45 at the basis, 10 significant.
    # Reference: scipy.stats.binomtest, one-sided ("greater").
    sig = np.array([True] * 10 + [False] * 2)
    power = np.full(12, 0.45)
    r = excess_significance_test(sig, power)
    assert (r.observed, r.studies, r.method) == (10, 12, "binomial")
    assert r.expected == pytest.approx(5.4)
    expected = stats.binomtest(10, 12, 0.45, alternative="greater").pvalue
    assert r.p_value == pytest.approx(expected, rel=1e-12)


def test_excess_unequal_powers_against_scipy_poisson_binom():
    # Unequal powers: P(X >= O) computed with scipy.stats.poisson_binom; the binomial test at
    # the mean power (scipy.stats.binomtest) is close but not the same.
    power = np.array([0.2, 0.35, 0.5, 0.5, 0.6, 0.3, 0.25, 0.8, 0.4, 0.45])
    sig = np.array([1, 1, 1, 1, 1, 0, 1, 1, 1, 0], dtype=bool)
    r = excess_significance_test(sig, power)
    assert r.method == "poisson-binomial" and r.observed == 8
    assert r.expected == pytest.approx(power.sum())
    assert r.p_value == pytest.approx(stats.poisson_binom(power).sf(7), rel=1e-10)
    mean_binomial = stats.binomtest(8, 10, power.mean(), alternative="greater").pvalue
    assert r.p_value == pytest.approx(mean_binomial, rel=0.3)


def test_excess_chi_square_form():
    # Ioannidis & Trikalinos (2007): A = (O - E)^2 / E + (O - E)^2 / (n - E), chi-square on 1 df
    # (computed with scipy.stats.chi2), one-sided by halving the tail.
    power = np.array([0.3, 0.4, 0.5, 0.35, 0.45, 0.3, 0.4, 0.5])
    sig = np.array([1, 1, 1, 1, 1, 1, 0, 1], dtype=bool)
    r = excess_significance_test(sig, power, method="chi2")
    o, e, n = 7, power.sum(), 8
    a = (o - e) ** 2 / e + (o - e) ** 2 / (n - e)
    assert r.statistic == pytest.approx(a)
    assert r.p_value == pytest.approx(stats.chi2.sf(a, 1) / 2)
    # Fewer significant results than expected: the one-sided p-value is above one half.
    low = excess_significance_test(np.zeros(8, dtype=bool), power, method="chi2")
    assert low.p_value > 0.5
    with pytest.raises(ValueError, match="method must be"):
        excess_significance_test(sig, power, method="bogus")


def test_deficit_lower_tail_against_scipy():
    # P(X <= O) for a Poisson-binomial (scipy.stats.poisson_binom.cdf) and, with equal powers,
    # the binomial (scipy.stats.binom.cdf).
    from audit.excess import deficit_p_value

    power = np.array([0.8, 0.9, 0.7, 0.85, 0.95, 0.6, 0.75, 0.8, 0.9, 0.65, 0.7, 0.8])
    sig = np.zeros(12, dtype=bool)
    sig[:4] = True
    assert deficit_p_value(sig, power) == pytest.approx(stats.poisson_binom(power).cdf(4), rel=1e-9)
    assert deficit_p_value(sig, np.full(12, 0.8)) == pytest.approx(
        stats.binom.cdf(4, 12, 0.8), rel=1e-12
    )


def test_a_shortfall_of_significant_results_is_reported_as_a_deficit():
    # Issue 13: the demo had 13 significant results where the powers predicted 24.5, and the
    # report said only "p = 1". The portfolio now gives P(X <= 13) and the report a sentence.
    import io

    from rich.console import Console

    import audit
    from audit.report import THEME, render_report
    from audit.resources import bundled_dir

    result = audit.audit_file(bundled_dir("demo_data") / "demo_portfolio.csv")
    excess = result.portfolio["excess_significance"]
    deficit = excess["deficit"]
    assert deficit["observed"] == excess["observed"] < excess["expected"] == deficit["expected"]
    sig = result.metrics["result_significant"].to_numpy(dtype=float)
    power = result.metrics["power_at_planned_effect"].to_numpy(dtype=float)
    use = result.valid & np.isfinite(sig) & np.isfinite(power)
    cdf = stats.poisson_binom(power[use]).cdf(deficit["observed"])
    assert deficit["p_value"] == pytest.approx(cdf, rel=1e-9) and deficit["p_value"] < 0.05
    console = Console(file=io.StringIO(), width=100, color_system=None, theme=THEME)
    render_report(result, console)
    text = " ".join(console.file.getvalue().split())
    assert "far fewer results are significant than the studies' powers predict" in text
    assert "planned effects look optimistic" in text
